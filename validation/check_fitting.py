"""Element fitting on propagated arcs: broadcast-style (LNAV and CNAV sets) and two-body
fits, extrapolation, sliding windows (MEO), and the mean-element J2 RAAN rate (LEO).

    python validation/check_fitting.py [--quick] --json PATH

Scenario (invented for this check): a GNSS-like MEO, a = 26,560 km, e = 0.01, i = 55 deg,
epoch 2024-03-01 00:00 UTC, forces point mass + EGM96 degree/order 12 + Sun + Moon
(DE421) + solar radiation pressure (Cr 1.3, 20 m^2, 1600 kg, conical shadow), output
every 300 s over 7 days (1 day with --quick).  Broadcast-style sets are fitted to the
ITRF positions over 4-h windows (every 2 h in sliding mode): the LNAV set of IS-GPS-200
Table 20-IV (``parameter_set='lnav16'``) and the CNAV set of Table 30-II
(``'cnav18'``); two-body Keplerian elements to the GCRF positions.  LEO: a = 7,000 km,
e = 0.001, i = 50 deg, point mass + zonal J2 about the true pole, 1 day, output every
30 s; mean RAAN rate from one-period averages against the first-order secular rate
(Brouwer 1959; Kozai 1959).

JSON keys (first 4-h window unless said otherwise):
``broadcast_fit_rms_m`` (LNAV, the issue's target < 2 cm), ``broadcast_cnav_fit_rms_m``,
their ``..._max_m``, ``..._ric_rms_m`` and ``..._ure_m``; ``twobody_fit_rms_m``,
``extrapolation_1h_m`` / ``cnav_extrapolation_1h_m`` (largest 3D error in the hour after
the window), ``sliding_median_rms_m``, ``sliding_worst_rms_m`` (LNAV) and
``sliding_cnav_median_rms_m``, ``sliding_cnav_worst_rms_m``, ``j2_raan_rate_rel_err``.

Diagnostics (why the LNAV target is missed, see propagator/fitting/broadcast.py):
``broadcast_fit_gauss_newton_gain`` and ``broadcast_fit_multistart_rms_m`` (the LNAV fit
is the least-squares optimum), ``broadcast_fit_rms_toe_start_m`` (toe at the window
start), ``broadcast_fit_rms_no_polar_motion_m`` / ``broadcast_cnav_...`` (ITRF polar
motion removed), ``broadcast_fit_rms_e0001_m`` / ``..._no_polar_motion_m`` (same forces,
e = 0.001), ``j2_only_e001_fit_rms_m`` / ``j2_only_e001_cnav_fit_rms_m`` (point mass +
J2, e = 0.01, polar motion removed), ``twobody_itrf_fit_rms_m`` /
``twobody_itrf_fit_rms_no_polar_motion_m`` (+ ``_cnav_``: point mass only, GCRF -> ITRF),
``force_decomposition_first_window`` (LNAV/CNAV RMS per force subset, polar motion
removed) and ``pole_offset_arcsec``.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import erfa
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import ROOT, start  # noqa: E402

from propagator.constants import SECONDS_PER_DAY  # noqa: E402
from propagator.elements import kep_to_cart, mean_to_true  # noqa: E402
from propagator.fitting import (BroadcastElements, broadcast_position,  # noqa: E402
                                extrapolation_error, fit_broadcast_from_arrays,
                                fit_keplerian_from_arrays, fit_residuals, gcrf_arc_to_itrf,
                                mean_elements, plot_residuals_ric, plot_sliding_windows,
                                sliding_window_fits)
from propagator.frames import gcrf_to_itrf_matrix, rotation_parts  # noqa: E402
from propagator.propagate import propagate  # noqa: E402
from propagator.timescales import Epoch  # noqa: E402

AREA = "fitting"
WINDOW_S = 4 * 3600.0
STEP_S = 2 * 3600.0
TARGET_M = 0.02  # target of the fitting issue: 4-h broadcast-style fit, 3D RMS < 2 cm
FIELD_120 = ROOT.parent / "shared" / "data" / "gravity" / "EGM96_deg120.gfc"
SRP = ("solar_radiation", {"cr": 1.3, "area_m2": 20.0, "mass_kg": 1600.0})
# GPS global-average user range error weights, URE^2 = (0.98 R)^2 + 0.141^2 (I^2 + C^2)
# (Warren & Raquet, GPS Solutions 7 (2003) 151-156; from memory).  Only to compare with
# published curve-fit errors, which are usually quoted as URE, not as 3D RMS.
URE_W_R, URE_W_IC = 0.98, 0.141


def _field() -> tuple[tuple, str]:
    if FIELD_120.is_file():
        return ("gravity_field", {"degree": 12, "order": 12, "field_file": str(FIELD_120)}), "EGM96 12x12"
    # the shipped default stops at degree 8 (README: beyond 8 < 0.3 mm/day at GNSS radius)
    return ("gravity_field", {"degree": 8, "order": 8}), "EGM96 8x8 (degree-120 file not found)"


def _meo_forces() -> tuple[list, str]:
    field, label = _field()
    return ["central_gravity", field, "sun_gravity", "moon_gravity", SRP], label


def _meo_arc(epoch: Epoch, e: float, duration: float, step: float, forces: list | None = None):
    el = [26_560e3, e, np.radians(55.0), np.radians(30.0), np.radians(40.0),
          float(mean_to_true(np.radians(10.0), e))]
    label = "custom"
    if forces is None:
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


def _ure(ric: np.ndarray) -> float:
    """RMS of the GPS global-average URE of RIC residuals [m] (weights above, from memory)."""
    return float(np.sqrt(np.mean((URE_W_R * ric[:, 0]) ** 2 + URE_W_IC ** 2 * (ric[:, 1] ** 2 + ric[:, 2] ** 2))))


# --- independent optimality check of the LNAV fit -------------------------------------------

_LNAV_FIELDS = ("sqrt_a", "e", "i0", "omega0", "omega", "m0", "delta_n", "omega_dot", "idot",
                "cuc", "cus", "crc", "crs", "cic", "cis")
# central-difference steps giving ~1 cm of position at a = 26,560 km over +-2 h (common practice)
_LNAV_STEPS = np.array([1e-6, 4e-10, 4e-10, 4e-10, 4e-10, 4e-10, 5e-14, 5e-14, 5e-14,
                        4e-10, 4e-10, 1e-2, 1e-2, 4e-10, 4e-10])


def _lnav_rms(x: np.ndarray, toe: float, t: np.ndarray, r: np.ndarray) -> float:
    el = BroadcastElements(toe, *[float(v) for v in x])
    return float(np.sqrt(np.mean(np.sum((broadcast_position(el, t) - r) ** 2, axis=1))))


def _gauss_newton(x: np.ndarray, toe: float, t: np.ndarray, r: np.ndarray, iterations: int) -> np.ndarray:
    """Gauss-Newton on the Table 20-IV parameters themselves (not the fit's internal
    unknowns): central differences, columns scaled by their steps, numpy.linalg.lstsq
    step, accepted only if it lowers the RMS (halved up to 10 times otherwise)."""
    h = _LNAV_STEPS

    def res(z: np.ndarray) -> np.ndarray:
        return (broadcast_position(BroadcastElements(toe, *[float(v) for v in z]), t) - r).ravel()

    rms = _lnav_rms(x, toe, t, r)
    for _ in range(iterations):
        jac = np.stack([(res(x + h * (np.arange(15) == j)) - res(x - h * (np.arange(15) == j))) / 2.0
                        for j in range(15)], axis=1)
        dx = h * np.linalg.lstsq(jac, -res(x), rcond=None)[0]
        for _ in range(10):
            new = _lnav_rms(x + dx, toe, t, r)
            if new < rms:
                x, rms = x + dx, new
                break
            dx = 0.5 * dx
        else:
            break
    return x


def _optimality(fit, t: np.ndarray, r: np.ndarray, n_starts: int) -> dict[str, float]:
    """Gain of an independent Gauss-Newton iteration from the fitted LNAV set, and the RMS
    reached from ``n_starts`` random perturbations of it (A +- 2 km, e +- 0.003, angles
    +- 1 mrad, rates +- 1e-9 rad/s, Crc/Crs +- 500 m, Cuc..Cis +- 1e-5 rad)."""
    el = fit.elements
    x0 = np.array([getattr(el, k) for k in _LNAV_FIELDS])
    rms0 = _lnav_rms(x0, el.toe, t, r)
    gain = 1.0 - _lnav_rms(_gauss_newton(x0, el.toe, t, r, 5), el.toe, t, r) / rms0
    rng = np.random.default_rng(11)
    ends = []
    for _ in range(n_starts):
        x = x0.copy()
        a = x[0] ** 2 + rng.normal(0.0, 2000.0)
        x[0] = np.sqrt(a)
        x[1] = abs(x[1] + rng.normal(0.0, 0.003))
        x[2:6] += rng.normal(0.0, 1e-3, 4)
        x[6:9] += rng.normal(0.0, 1e-9, 3)
        x[9:11] = rng.normal(0.0, 1e-5, 2)
        x[11:13] = rng.normal(0.0, 500.0, 2)
        x[13:15] = rng.normal(0.0, 1e-5, 2)
        ends.append(_lnav_rms(_gauss_newton(x, el.toe, t, r, 40), el.toe, t, r))
    return {"fit_rms_m": rms0, "gauss_newton_gain": gain, "multistart_best_rms_m": float(min(ends)),
            "multistart_worst_rms_m": float(max(ends)), "n_starts": n_starts}


def _plot_sliding_both(lnav, cnav, path: Path, title: str) -> Path:
    """3D RMS of LNAV and CNAV fits per window (log scale), with the 2 cm target line."""
    fig = Figure(figsize=(8, 4))
    FigureCanvasAgg(fig)
    ax = fig.subplots()
    for table, label, style in ((lnav, "LNAV (Table 20-IV, 16 par.)", "o-"),
                                (cnav, "CNAV (Table 30-II, 18 par.)", "s-")):
        start_h = np.array([row["t_start_s"] for row in table.rows]) / 3600.0
        ax.semilogy(start_h, table.rms_3d, style, ms=3, label=label)
    ax.axhline(TARGET_M, color="r", lw=0.8, ls="--", label="target 2 cm")
    ax.set_xlabel("window start [h]")
    ax.set_ylabel("4-h fit RMS 3D [m]")
    ax.grid(True, which="both", lw=0.3)
    ax.legend()
    ax.set_title(title)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    return path


def _sliding(t, r, v, kind_set: str):
    table = sliding_window_fits(t, r, v, kind="broadcast", window_s=WINDOW_S, step_s=STEP_S,
                                extrapolate_s=3600.0, parameter_set=kind_set)
    return table


def main() -> int:
    rep = start(__file__, __doc__.splitlines()[0])
    quick = rep.quick
    epoch = Epoch.from_iso("2024-03-01T00:00:00", "UTC").to("TT")
    days = 1.0 if quick else 7.0
    duration = days * SECONDS_PER_DAY + 3600.0  # + 1 h for the last windows' extrapolation

    # ---- MEO, broadcast-style (LNAV, CNAV) and two-body fits over the first 4 h -------------
    t0 = time.perf_counter()
    t, r, v, field_label = _meo_arc(epoch, 0.01, duration, 300.0)
    rep.values["meo_propagation_s"] = time.perf_counter() - t0
    rep.values["meo_gravity_field"] = field_label
    r_itrf, v_itrf = gcrf_arc_to_itrf(epoch, t, r, v)
    win = (0.0, WINDOW_S)
    mask = t <= WINDOW_S
    bfit = fit_broadcast_from_arrays(t, r_itrf, v_itrf, window=win)
    cfit = fit_broadcast_from_arrays(t, r_itrf, v_itrf, window=win, parameter_set="cnav18")
    kfit = fit_keplerian_from_arrays(t, r, v, window=win)
    b_ric, b_st = fit_residuals(bfit, t[mask], r_itrf[mask], v_itrf[mask])
    c_ric, c_st = fit_residuals(cfit, t[mask], r_itrf[mask], v_itrf[mask])
    _, k_st = fit_residuals(kfit, t[mask], r[mask], v[mask])
    _, bx = extrapolation_error(bfit, t, r_itrf, v_itrf, after=3600.0)
    _, cx = extrapolation_error(cfit, t, r_itrf, v_itrf, after=3600.0)
    _, kx = extrapolation_error(kfit, t, r, v, after=3600.0)
    rep.values["broadcast_fit_rms_m"] = b_st.rms_3d
    rep.values["broadcast_fit_max_m"] = b_st.max_3d
    rep.values["broadcast_fit_ric_rms_m"] = [b_st.rms_r, b_st.rms_i, b_st.rms_c]
    rep.values["broadcast_fit_ure_m"] = _ure(b_ric)
    rep.values["broadcast_elements"] = bfit.elements.to_dict()
    rep.values["broadcast_cnav_fit_rms_m"] = c_st.rms_3d
    rep.values["broadcast_cnav_fit_max_m"] = c_st.max_3d
    rep.values["broadcast_cnav_fit_ric_rms_m"] = [c_st.rms_r, c_st.rms_i, c_st.rms_c]
    rep.values["broadcast_cnav_fit_ure_m"] = _ure(c_ric)
    rep.values["broadcast_cnav_elements"] = cfit.elements.to_dict()
    rep.values["twobody_fit_rms_m"] = k_st.rms_3d
    rep.values["twobody_fit_max_m"] = k_st.max_3d
    rep.values["extrapolation_1h_m"] = bx.max_3d
    rep.values["cnav_extrapolation_1h_m"] = cx.max_3d
    rep.values["twobody_extrapolation_1h_m"] = kx.max_3d
    rep.check(AREA, "broadcast fit converged (MEO, 4 h, LNAV and CNAV)", "common practice",
              f"{bfit.converged}/{cfit.converged}", tolerance="True/True",
              passed=bfit.converged and cfit.converged)
    rep.check(AREA, "broadcast-style 4-h fit, 3D RMS (MEO, full forces, LNAV 16 par.)",
              "target of the fitting issue (IS-GPS-200 Table 20-IV model)", b_st.rms_3d,
              tolerance="< 0.02 m", passed=b_st.rms_3d < TARGET_M, unit="m")
    rep.check(AREA, "broadcast-style 4-h fit, 3D RMS (MEO, full forces, CNAV 18 par.)",
              "target of the fitting issue (IS-GPS-200 Table 30-II model)", c_st.rms_3d,
              tolerance="< 0.02 m", passed=c_st.rms_3d < TARGET_M, unit="m")

    # The LNAV number is the least-squares optimum of that model, not a solver artefact.
    opt = _optimality(bfit, t[mask], r_itrf[mask], 4 if quick else 12)
    rep.values["broadcast_fit_gauss_newton_gain"] = opt["gauss_newton_gain"]
    rep.values["broadcast_fit_multistart_rms_m"] = [opt["multistart_best_rms_m"], opt["multistart_worst_rms_m"]]
    better = 1.0 - opt["multistart_best_rms_m"] / opt["fit_rms_m"]
    rep.check(AREA, "LNAV fit is the least-squares optimum (independent Gauss-Newton + "
                    f"{opt['n_starts']} restarts find no lower RMS)",
              "common practice (Gauss-Newton optimality check)", max(opt["gauss_newton_gain"], better),
              tolerance="< 1e-6 relative", passed=max(opt["gauss_newton_gain"], better) < 1e-6)
    rep.values["broadcast_fit_rms_toe_start_m"] = fit_broadcast_from_arrays(
        t, r_itrf, v_itrf, window=win, toe=0.0).rms_3d

    # ---- diagnostics: the limits of the parametrisations -------------------------------------
    tt = epoch.to("TT")
    pole = rotation_parts(np.array([tt.jd1]), np.array([tt.jd2]))
    rep.values["pole_offset_arcsec"] = [float(np.degrees(pole["xp"][0]) * 3600.0),
                                        float(np.degrees(pole["yp"][0]) * 3600.0)]
    r_tirs = _remove_polar_motion(epoch, t, r_itrf)
    rep.values["broadcast_fit_rms_no_polar_motion_m"] = fit_broadcast_from_arrays(t, r_tirs, window=win).rms_3d
    rep.values["broadcast_cnav_fit_rms_no_polar_motion_m"] = fit_broadcast_from_arrays(
        t, r_tirs, window=win, parameter_set="cnav18").rms_3d
    t2, r2, v2, _ = _meo_arc(epoch, 0.001, WINDOW_S, 300.0)
    r2_itrf, v2_itrf = gcrf_arc_to_itrf(epoch, t2, r2, v2)
    rep.values["broadcast_fit_rms_e0001_m"] = fit_broadcast_from_arrays(t2, r2_itrf, v2_itrf).rms_3d
    rep.values["broadcast_fit_rms_e0001_no_polar_motion_m"] = fit_broadcast_from_arrays(
        t2, _remove_polar_motion(epoch, t2, r2_itrf)).rms_3d
    field, _ = _field()
    subsets = {"point mass": ["central_gravity"],
               "point mass + J2": ["central_gravity", "zonal_j2"],
               "point mass + field": ["central_gravity", field],
               "point mass + Sun + Moon": ["central_gravity", "sun_gravity", "moon_gravity"],
               "point mass + SRP": ["central_gravity", SRP],
               "all": None}
    decomposition = {}
    for name, forces in subsets.items():
        ts, rs, vs, _ = _meo_arc(epoch, 0.01, WINDOW_S, 300.0, forces)
        rs_itrf, _ = gcrf_arc_to_itrf(epoch, ts, rs)
        rs_tirs = _remove_polar_motion(epoch, ts, rs_itrf)
        row = {"lnav_m": fit_broadcast_from_arrays(ts, rs_tirs).rms_3d,
               "cnav_m": fit_broadcast_from_arrays(ts, rs_tirs, parameter_set="cnav18").rms_3d}
        if name == "point mass":
            rep.values["twobody_itrf_fit_rms_m"] = fit_broadcast_from_arrays(ts, rs_itrf).rms_3d
            rep.values["twobody_itrf_cnav_fit_rms_m"] = fit_broadcast_from_arrays(
                ts, rs_itrf, parameter_set="cnav18").rms_3d
            rep.values["twobody_itrf_fit_rms_no_polar_motion_m"] = row["lnav_m"]
            rep.values["twobody_itrf_cnav_fit_rms_no_polar_motion_m"] = row["cnav_m"]
        if name == "point mass + J2":
            rep.values["j2_only_e001_fit_rms_m"] = row["lnav_m"]
            rep.values["j2_only_e001_cnav_fit_rms_m"] = row["cnav_m"]
        decomposition[name] = row
    rep.values["force_decomposition_first_window"] = decomposition
    print("first 4-h window, polar motion removed, 3D RMS [cm]:")
    for name, row in decomposition.items():
        print(f"  {name:<26} LNAV {100 * row['lnav_m']:8.3f}   CNAV {100 * row['cnav_m']:8.3f}")

    fig = plot_residuals_ric(t[mask], b_ric, rep.out_dir / "fitting_broadcast_residuals.png",
                             title="LNAV broadcast-style fit, MEO, first 4-h window (ITRF)", unit="cm")
    rep.figure(fig, "LNAV broadcast-style (IS-GPS-200 Table 20-IV) fit residuals in RIC over the "
                    "first 4-h window of the MEO arc")
    fig = plot_residuals_ric(t[mask], c_ric, rep.out_dir / "fitting_broadcast_cnav_residuals.png",
                             title="CNAV broadcast-style fit, MEO, first 4-h window (ITRF)", unit="cm")
    rep.figure(fig, "CNAV broadcast-style (IS-GPS-200 Table 30-II) fit residuals in RIC over the "
                    "first 4-h window of the MEO arc")

    # ---- sliding windows --------------------------------------------------------------------
    arc = t <= days * SECONDS_PER_DAY + 3600.0
    tables = {}
    for pset in ("lnav16", "cnav18"):
        t0 = time.perf_counter()
        table = _sliding(t[arc], r_itrf[arc], v_itrf[arc], pset)
        # keep windows that start within the nominal arc (the extra hour is for extrapolation)
        table.rows = [row for row in table.rows if row["t_end_s"] <= days * SECONDS_PER_DAY + 1e-6]
        tables[pset] = table
        key = "sliding" if pset == "lnav16" else "sliding_cnav"
        rep.values[f"{key}_fit_s"] = time.perf_counter() - t0
        rep.values[f"{key}_n_windows"] = len(table.rows)
        rep.values[f"{key}_median_rms_m"] = table.median_rms_3d
        rep.values[f"{key}_worst_rms_m"] = table.worst_rms_3d
        rep.values[f"{key}_best_rms_m"] = float(np.min(table.rms_3d))
        extrap = np.array([row["extrap_max_3d_m"] for row in table.rows])
        rep.values[f"{key}_median_extrapolation_1h_m"] = float(np.nanmedian(extrap))
        label = "LNAV" if pset == "lnav16" else "CNAV"
        rep.check(AREA, f"sliding 4-h {label} windows every 2 h over {days:g} d all converge",
                  "common practice", f"{sum(row['converged'] for row in table.rows)}/{len(table.rows)}",
                  tolerance="all", passed=table.all_converged)
        print(f"{label}:")
        print(table.format())
    fig = plot_sliding_windows(tables["lnav16"], rep.out_dir / "fitting_sliding_windows.png",
                               title=f"LNAV broadcast-style fits, 4-h windows every 2 h, {days:g} d MEO")
    rep.figure(fig, "3D RMS of each 4-h LNAV broadcast-style fit and of its 1-h extrapolation")
    fig = _plot_sliding_both(tables["lnav16"], tables["cnav18"],
                             rep.out_dir / "fitting_sliding_lnav_cnav.png",
                             f"4-h broadcast-style fits every 2 h over {days:g} d (MEO, ITRF)")
    rep.figure(fig, "Sliding-window 3D RMS over the arc: LNAV (16 parameters) and CNAV "
                    "(18 parameters) against the 2 cm target")

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
