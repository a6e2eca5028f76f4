"""Time scales, Earth orientation and frames against published values and reference libraries.

    python validation/check_time_frames.py [--quick] --json PATH

JSON keys: ``tt_minus_tai_s``, ``gps_minus_tai_s``, ``tai_minus_utc_2016_s``,
``tai_minus_utc_2017_s``, ``max_abs_tdb_minus_tt_s``, ``gcrf_itrf_vs_astropy_max_mm``,
``rotation_table_max_error_mm`` (26,600 km, 30 days), ``rotation_table_error_by_step_mm``.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import start  # noqa: E402

from propagator.frames import gcrf_to_itrf, gcrf_to_itrf_matrices  # noqa: E402
from propagator.rotation_table import build_rotation_table, rotation_matrices  # noqa: E402
from propagator.timescales import Epoch, tdb_minus_tt_seconds  # noqa: E402

AREA = "frames and time"


def main() -> int:
    rep = start(__file__, __doc__.splitlines()[0])
    e = Epoch.from_iso("2024-05-01T00:00:00 TAI")
    # clock-reading differences of one instant (Epoch - Epoch would be the zero interval)
    tt_tai = (e.to("TT").jd1 - e.jd1 + e.to("TT").jd2 - e.jd2) * 86400.0
    gps_tai = (e.to("GPS").jd1 - e.jd1 + e.to("GPS").jd2 - e.jd2) * 86400.0
    rep.values["tt_minus_tai_s"] = tt_tai
    rep.values["gps_minus_tai_s"] = gps_tai
    rep.check(AREA, "TT - TAI", "IERS Conventions 2010 sec. 10.1 (32.184 s)", tt_tai,
              tolerance="|x-32.184| < 1e-9", passed=abs(tt_tai - 32.184) < 1e-9, unit="s")
    rep.check(AREA, "GPS - TAI (clock reading)", "IS-GPS-200 sec. 3.3.4 (-19 s)", gps_tai,
              tolerance="|x+19| < 1e-6", passed=abs(gps_tai + 19.0) < 1e-6, unit="s")

    def tai_minus_utc(iso: str) -> float:
        u = Epoch.from_iso(iso + " UTC")
        t = u.to("TAI")
        return (t.jd1 - u.jd1 + t.jd2 - u.jd2) * 86400.0

    before, after = tai_minus_utc("2016-12-30T12:00:00"), tai_minus_utc("2017-01-01T12:00:00")
    rep.values["tai_minus_utc_2016_s"], rep.values["tai_minus_utc_2017_s"] = before, after
    rep.check(AREA, "TAI - UTC on 2016-12-30 / 2017-01-01", "IERS Bulletin C 52 (36 s -> 37 s)",
              f"{before:.6f} -> {after:.6f}", tolerance="exact to 1 us",
              passed=abs(before - 36) < 1e-6 and abs(after - 37) < 1e-6, unit="s")

    n = 200 if rep.quick else 2000
    years = np.linspace(2000.0, 2030.0, n)
    dt = [abs(tdb_minus_tt_seconds(Epoch.from_jd(2451545.0 + (y - 2000.0) * 365.25, 0.0, "TT"))) for y in years]
    rep.values["max_abs_tdb_minus_tt_s"] = max(dt)
    rep.check(AREA, "|TDB - TT| 2000-2030", "IERS Conventions 2010 ch. 10 (< 2 ms); erfa.dtdb",
              max(dt), tolerance="< 2e-3 s", passed=max(dt) < 2e-3, unit="s")

    # GCRF -> ITRF vs astropy GCRS -> ITRS (astropy as reference library, offline), at 0h UTC
    # EOP nodes and without CIP offsets (astropy applies none).
    try:
        from astropy.utils import iers

        iers.conf.auto_download = False
        iers.earth_orientation_table.set(iers.IERS_A.open(iers.IERS_A_FILE))
        import astropy.units as u
        from astropy.coordinates import GCRS, ITRS, CartesianRepresentation
        from astropy.time import Time

        pts = 6378137.0 * np.array([[1.0, 0, 0], [0, 1.0, 0], [0, 0, 1.0], [0.6, 0.64, 0.48]])
        worst = 0.0
        for date in ["2000-01-01", "2008-08-08", "2017-01-01", "2024-09-10", "2026-11-20"]:
            mine = gcrf_to_itrf(Epoch.from_iso(f"{date}T00:00:00 UTC"), pts, cip_offsets=False)
            t = Time(f"{date}T00:00:00", scale="utc")
            ref = GCRS(CartesianRepresentation(pts.T * u.m), obstime=t).transform_to(
                ITRS(obstime=t)).cartesian.xyz.to_value(u.m).T
            worst = max(worst, float(np.max(np.linalg.norm(mine - ref, axis=1))))
        rep.values["gcrf_itrf_vs_astropy_max_mm"] = worst * 1e3
        rep.check(AREA, "GCRF->ITRF vs astropy GCRS->ITRS at 6378 km", "astropy (reference library, test-only)",
                  worst * 1e3, tolerance="< 1 mm", passed=worst < 1e-3, unit="mm")
    except ImportError:
        rep.check(AREA, "GCRF->ITRF vs astropy", "astropy", "astropy not installed", tolerance="< 1 mm",
                  passed=False)

    # Rotation table interpolation vs direct pyerfa over 30 days at 26,600 km.
    epoch = Epoch.from_iso("2024-05-01T06:30:00 UTC")
    arc = 30 * 86400.0
    rng = np.random.default_rng(1)
    ts = np.sort(rng.uniform(0.0, arc, 500 if rep.quick else 4000))
    tt = epoch.to("TT")
    direct = gcrf_to_itrf_matrices(np.full(ts.size, tt.jd1), tt.jd2 + ts / 86400.0)[0]
    radius = 26_600e3
    by_step = {}
    for step in ([3600.0] if rep.quick else [3600.0, 7200.0, 10800.0, 21600.0]):
        table = build_rotation_table(epoch, 0.0, arc, step=step)
        interp = rotation_matrices(table, ts)
        err = float(np.max(np.abs(interp - direct).sum(axis=2).max(axis=1))) * radius
        by_step[f"{step / 3600:.0f}h"] = err * 1e3
    rep.values["rotation_table_error_by_step_mm"] = by_step
    rep.values["rotation_table_max_error_mm"] = by_step["1h"]
    rep.check(AREA, "rotation table (1 h nodes) vs pyerfa, 30 d, 26,600 km", "ERFA c2t06a path (reference library)",
              by_step["1h"], tolerance="< 1 mm", passed=by_step["1h"] < 1.0, unit="mm")
    return rep.finish()


if __name__ == "__main__":
    sys.exit(main())
