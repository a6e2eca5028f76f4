"""Element fitting on propagated arcs: broadcast-style and two-body fits, extrapolation,
sliding windows (MEO), and the mean-element J2 RAAN rate (LEO).

    python validation/check_fitting.py [--quick] --json PATH

Scenario (invented for this check): a GNSS-like MEO, a = 26,560 km, e = 0.01, i = 55 deg,
epoch 2024-03-01 00:00 UTC, forces point mass + EGM96 degree/order 12 + Sun + Moon
(DE421) + solar radiation pressure (Cr 1.3, 20 m^2, 1600 kg, conical shadow), output
every 300 s over 7 days (1 day with --quick).  Broadcast-style sets (IS-GPS-200 Table
20-IV) are fitted to the ITRF positions over 4-h windows (every 2 h in sliding mode),
two-body Keplerian elements to the GCRF positions.  LEO: a = 7,000 km, e = 0.001,
i = 50 deg, point mass + zonal J2 about the true pole, 1 day, output every 30 s; mean
RAAN rate from one-period averages against the first-order secular rate (Brouwer 1959;
Kozai 1959).

JSON keys: ``broadcast_fit_rms_m``, ``twobody_fit_rms_m``, ``extrapolation_1h_m`` (largest
3D error of the broadcast set in the hour after its window), ``sliding_median_rms_m``,
``sliding_worst_rms_m``, ``j2_raan_rate_rel_err``; diagnostics ``broadcast_fit_rms_no_polar_motion_m``
(same fit with ITRF polar motion removed) and ``broadcast_fit_rms_e0001_m`` /
``..._no_polar_motion_m`` (same forces, e = 0.001), which separate the two known limits
of the broadcast parametrisation (see propagator/fitting/broadcast.py).
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import erfa
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import ROOT, start  # noqa: E402

from propagator.constants import SECONDS_PER_DAY  # noqa: E402
from propagator.elements import kep_to_cart, mean_to_true  # noqa: E402
from propagator.fitting import (extrapolation_error, fit_broadcast_from_arrays,  # noqa: E402
                                fit_keplerian_from_arrays, fit_residuals, gcrf_arc_to_itrf,
                                mean_elements, plot_residuals_ric, plot_sliding_windows,
                                sliding_window_fits)
from propagator.frames import gcrf_to_itrf_matrix, rotation_parts  # noqa: E402
from propagator.propagate import propagate  # noqa: E402
from propagator.timescales import Epoch  # noqa: E402

AREA = "fitting"
WINDOW_S = 4 * 3600.0
STEP_S = 2 * 3600.0
FIELD_120 = ROOT.parent / "shared" / "data" / "gravity" / "EGM96_deg120.gfc"


def _meo_forces() -> tuple[list, str]:
    if FIELD_120.is_file():
        field = ("gravity_field", {"degree": 12, "order": 12, "field_file": str(FIELD_120)})
        label = "EGM96 12x12"
    else:  # the shipped default stops at degree 8 (README: beyond 8 < 0.3 mm/day at GNSS radius)
        field = ("gravity_field", {"degree": 8, "order": 8})
        label = "EGM96 8x8 (degree-120 file not found)"
    return ["central_gravity", field, "sun_gravity", "moon_gravity",
            ("solar_radiation", {"cr": 1.3, "area_m2": 20.0, "mass_kg": 1600.0})], label


def _meo_arc(epoch: Epoch, e: float, duration: float, step: float):
    el = [26_560e3, e, np.radians(55.0), np.radians(30.0), np.radians(40.0),
          float(mean_to_true(np.radians(10.0), e))]
    forces, label = _meo_forces()
    res = propagate(epoch, kep_to_cart(np.array(el)), forces=forces, duration=duration,
                    output=np.arange(0.0, duration + 0.5 * step, step))
    if not res.ok:
        raise RuntimeError(f"MEO propagation failed: {res.message}")
    return res.times, res.states[:, :3], res.states[:, 3:], label


def _remove_polar_motion(epoch: Epoch, t: np.ndarray, r_itrf: np.ndarray) -> np.ndarray:
    """ITRF -> TIRS (undo W = polar motion + s', IERS Conventions 2010 eq. 5.3; erfa.pom00)."""
    tt = epoch.to("TT")
    p = rotation_parts(np.full(t.size, tt.jd1), tt.jd2 + t / SECONDS_PER_DAY)
    w = erfa.pom00(p["xp"], p["yp"], p["sp"])  # r_itrf = W r_tirs
    return np.einsum("nji,nj->ni", w, r_itrf)


def main() -> int:
    rep = start(__file__, __doc__.splitlines()[0])
    quick = rep.quick
    epoch = Epoch.from_iso("2024-03-01T00:00:00", "UTC").to("TT")
    days = 1.0 if quick else 7.0
    duration = days * SECONDS_PER_DAY + 3600.0  # + 1 h for the last windows' extrapolation

    # ---- MEO, broadcast-style and two-body fits over the first 4 h ---------------------------
    t0 = time.perf_counter()
    t, r, v, field_label = _meo_arc(epoch, 0.01, duration, 300.0)
    rep.values["meo_propagation_s"] = time.perf_counter() - t0
    rep.values["meo_gravity_field"] = field_label
    r_itrf, v_itrf = gcrf_arc_to_itrf(epoch, t, r, v)
    win = (0.0, WINDOW_S)
    bfit = fit_broadcast_from_arrays(t, r_itrf, v_itrf, window=win)
    kfit = fit_keplerian_from_arrays(t, r, v, window=win)
    mask = t <= WINDOW_S
    b_ric, b_st = fit_residuals(bfit, t[mask], r_itrf[mask], v_itrf[mask])
    _, k_st = fit_residuals(kfit, t[mask], r[mask], v[mask])
    _, bx = extrapolation_error(bfit, t, r_itrf, v_itrf, after=3600.0)
    _, kx = extrapolation_error(kfit, t, r, v, after=3600.0)
    rep.values["broadcast_fit_rms_m"] = b_st.rms_3d
    rep.values["broadcast_fit_max_m"] = b_st.max_3d
    rep.values["broadcast_fit_ric_rms_m"] = [b_st.rms_r, b_st.rms_i, b_st.rms_c]
    rep.values["broadcast_elements"] = bfit.elements.to_dict()
    rep.values["twobody_fit_rms_m"] = k_st.rms_3d
    rep.values["twobody_fit_max_m"] = k_st.max_3d
    rep.values["extrapolation_1h_m"] = bx.max_3d
    rep.values["twobody_extrapolation_1h_m"] = kx.max_3d
    rep.check(AREA, "broadcast fit converged (MEO, 4 h)", "common practice", str(bfit.converged),
              tolerance="True", passed=bfit.converged)
    rep.check(AREA, "broadcast-style 4-h fit, 3D RMS (MEO, full forces)",
              "target of the fitting issue (IS-GPS-200 Table 20-IV model)", b_st.rms_3d,
              tolerance="< 0.02 m", passed=b_st.rms_3d < 0.02, unit="m")

    # Diagnostics: the two known limits of the parametrisation (polar motion, J2 x e).
    r_tirs = _remove_polar_motion(epoch, t, r_itrf)
    pm = fit_broadcast_from_arrays(t, r_tirs, window=win)
    rep.values["broadcast_fit_rms_no_polar_motion_m"] = pm.rms_3d
    t2, r2, v2, _ = _meo_arc(epoch, 0.001, WINDOW_S, 300.0)
    r2_itrf, v2_itrf = gcrf_arc_to_itrf(epoch, t2, r2, v2)
    rep.values["broadcast_fit_rms_e0001_m"] = fit_broadcast_from_arrays(t2, r2_itrf, v2_itrf).rms_3d
    rep.values["broadcast_fit_rms_e0001_no_polar_motion_m"] = fit_broadcast_from_arrays(
        t2, _remove_polar_motion(epoch, t2, r2_itrf)).rms_3d

    fig = plot_residuals_ric(t[mask], b_ric, rep.out_dir / "fitting_broadcast_residuals.png",
                             title="Broadcast-style fit, MEO, first 4-h window (ITRF)", unit="cm")
    rep.figure(fig, "Broadcast-style (IS-GPS-200 Table 20-IV) fit residuals in RIC over the first "
                    "4-h window of the MEO arc")

    # ---- sliding windows --------------------------------------------------------------------
    arc = t <= days * SECONDS_PER_DAY + 3600.0
    t0 = time.perf_counter()
    table = sliding_window_fits(t[arc], r_itrf[arc], v_itrf[arc], kind="broadcast",
                                window_s=WINDOW_S, step_s=STEP_S, extrapolate_s=3600.0)
    # keep windows that start within the nominal arc (the extra hour is for extrapolation)
    table.rows = [row for row in table.rows if row["t_end_s"] <= days * SECONDS_PER_DAY + 1e-6]
    rep.values["sliding_fit_s"] = time.perf_counter() - t0
    rep.values["sliding_n_windows"] = len(table.rows)
    rep.values["sliding_median_rms_m"] = table.median_rms_3d
    rep.values["sliding_worst_rms_m"] = table.worst_rms_3d
    extrap = np.array([row["extrap_max_3d_m"] for row in table.rows])
    rep.values["sliding_median_extrapolation_1h_m"] = float(np.nanmedian(extrap))
    rep.check(AREA, f"sliding 4-h windows every 2 h over {days:g} d all converge", "common practice",
              f"{sum(row['converged'] for row in table.rows)}/{len(table.rows)}", tolerance="all",
              passed=table.all_converged)
    print(table.format())
    fig = plot_sliding_windows(table, rep.out_dir / "fitting_sliding_windows.png",
                               title=f"Broadcast-style fits, 4-h windows every 2 h, {days:g} d MEO")
    rep.figure(fig, "3D RMS of each 4-h broadcast-style fit and of its 1-h extrapolation")

    # ---- LEO J2-only: mean RAAN rate ----------------------------------------------------------
    leo0 = kep_to_cart(np.array([7_000e3, 0.001, np.radians(50.0), np.radians(20.0), 1.0, 2.0]))
    leo_dur = SECONDS_PER_DAY
    leo = propagate(epoch, leo0, forces=["central_gravity", "zonal_j2"], duration=leo_dur,
                    output=np.arange(0.0, leo_dur + 1.0, 30.0))
    # J2 acts about the true pole: measure the node in a fixed frame whose z is that pole
    # (ITRF axes at mid-arc; over one day the pole moves < 1e-7 rad in GCRF).
    rot = gcrf_to_itrf_matrix(epoch + 0.5 * leo_dur)
    me = mean_elements(leo.times, leo.states[:, :3] @ rot.T, leo.states[:, 3:] @ rot.T)
    rate = me.rate("raan")
    theory = me.j2_rates()["raan_dot"]
    rel = abs(rate / theory - 1.0)
    rep.values["j2_raan_rate_rad_s"] = rate
    rep.values["j2_raan_rate_theory_rad_s"] = theory
    rep.values["j2_raan_rate_rel_err"] = rel
    rep.check(AREA, "mean RAAN rate vs first-order secular J2 (LEO, 1 d)",
              "Brouwer 1959; Kozai 1959 (first-order secular rate)", rel, tolerance="< 0.005",
              passed=rel < 0.005)
    return rep.finish()


if __name__ == "__main__":
    sys.exit(main())
