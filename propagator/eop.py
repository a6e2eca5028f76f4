"""Earth orientation parameters (EOP) from the IERS ``finals2000A.all`` file.

Source: ``finals2000A.all`` as shipped in the ``astropy-iers-data`` package (IERS
Rapid Service/Prediction Centre, IAU 2000A series).  Fixed-width records, layout per
``ReadMe.finals2000A`` in the same directory: MJD (0h UTC), polar motion x, y [arcsec],
UT1-UTC [s], celestial pole offsets dX, dY w.r.t. IAU 2000A [mas], each as a Bulletin A
value (final "I" or predicted "P") and, for the past, a Bulletin B value.

Column choice (same as astropy's IERS_A table): for each quantity the Bulletin B value
is used where present (the IERS final combined series), the Bulletin A value
elsewhere (recent rapid values and ~1 year of predictions).  The switch from B to A
leaves a step of order 0.01 mas / 10 us at the last B row.

Valid span: from the first row to the last row with a UT1-UTC value (the predictions
end ~1 year after the file date; polar motion ends on the same row).  The dX, dY
predictions stop several months earlier; between their last row and the end of the
span the last dX, dY value is held (they drift by ~0.1 mas over months, ~13 mm at
26,600 km).  `EOPTable.cpo_last_mjd` records where that starts.

Interpolation: C2 cubic spline (scipy ``CubicSpline``, not-a-knot ends) through the
daily nodes.  The IERS routine INTERP.F (IERS Gazette No. 13; from memory) uses 4-point
Lagrange instead; both reproduce the nodes, and at mid-day they differ (measured over
1995-2026) by 1 us median / 6 us 99th percentile in UT1 and < 0.07 mas in the pole --
the uncertainty of daily sampling, and below the neglected sub-daily terms (up to
~64 us).  The spline was chosen because piecewise Lagrange has slope kinks at every
node: the hourly rotation table (`propagator.rotation_table`) then reproduced the
direct rotation only to 0.27 mm at 26,600 km, against 0.0015 mm with the spline.  UT1-UTC
jumps by 1 s at each leap second, so UT1-TAI (continuous) is interpolated and TAI-UTC of
the query date (ERFA ``dat``) is added back.  The daily values are not corrected for
the sub-daily tidal and libration terms (IERS Conventions 2010, section 5.5.1 and
Tables 5.1a, 8.2a/b).
"""

from __future__ import annotations

import functools
import logging
from dataclasses import dataclass
from pathlib import Path

import erfa
import numpy as np
from scipy.interpolate import CubicSpline

from propagator import timescales  # noqa: F401  (installs the leap-second table into ERFA)
from propagator.constants import ARCSEC_TO_RAD, MJD_ZERO

__all__ = [
    "EOPRangeError",
    "EOPTable",
    "EOP_POLICIES",
    "load_eop_table",
    "get_eop_table",
    "eop_at",
    "lod_at",
    "eop_and_lod_at",
    "default_eop_file",
]

log = logging.getLogger(__name__)

EOP_POLICIES: tuple[str, ...] = ("error", "zero", "hold")
"""Out-of-span policies: raise, use zero EOP (logged), hold the nearest end value (logged)."""

_MAS_TO_RAD = ARCSEC_TO_RAD / 1000.0


class EOPRangeError(ValueError):
    """An epoch lies outside the span of the EOP table."""


@dataclass(frozen=True)
class EOPTable:
    """Daily EOP nodes at 0h UTC, combined Bulletin B (where present) / Bulletin A.

    Arrays are float64 of equal length; angles in rad, times in s.
    """

    path: str
    mjd: np.ndarray  #: node MJD (UTC), consecutive days
    xp: np.ndarray  #: polar motion x [rad]
    yp: np.ndarray  #: polar motion y [rad]
    ut1_utc: np.ndarray  #: UT1-UTC [s] (jumps at leap seconds)
    ut1_tai: np.ndarray  #: UT1-TAI [s] (continuous; this is what is interpolated)
    dx: np.ndarray  #: celestial pole offset dX w.r.t. IAU 2006/2000A [rad]
    dy: np.ndarray  #: celestial pole offset dY [rad]
    predicted_from_mjd: float  #: first node whose UT1-UTC is a Bulletin A prediction
    cpo_last_mjd: float  #: last node with a tabulated dX, dY (held constant after it)

    @property
    def first_mjd(self) -> float:
        return float(self.mjd[0])

    @property
    def last_mjd(self) -> float:
        return float(self.mjd[-1])


# Byte ranges (1-based inclusive, ReadMe.finals2000A) -> python slices
_COLS = {
    "mjd": (8, 15),
    "pm_flag_a": (17, 17),
    "pmx_a": (19, 27),
    "pmy_a": (38, 46),
    "ut1_flag_a": (58, 58),
    "ut1_a": (59, 68),
    "dx_a": (98, 106),
    "dy_a": (117, 125),
    "pmx_b": (135, 144),
    "pmy_b": (145, 154),
    "ut1_b": (155, 165),
    "dx_b": (166, 175),
    "dy_b": (176, 185),
}


def _field(line: str, name: str) -> str:
    a, b = _COLS[name]
    return line[a - 1 : b].strip()


def _num(text: str) -> float:
    return float(text) if text else np.nan


def default_eop_file() -> Path:
    """Path of ``finals2000A.all`` in the installed ``astropy-iers-data`` package."""
    import astropy_iers_data

    path = getattr(astropy_iers_data, "IERS_A_FILE", None)
    if path is None:
        path = Path(astropy_iers_data.__file__).parent / "data" / "finals2000A.all"
    return Path(path)


def _tai_minus_utc(mjd_utc: np.ndarray) -> np.ndarray:
    """TAI-UTC [s] on the UTC date(s) (ERFA ``dat`` with the installed leap-second table)."""
    iy, im, iday, fd = erfa.jd2cal(MJD_ZERO, mjd_utc)
    return erfa.dat(iy, im, iday, fd)


def load_eop_table(path: str | Path | None = None) -> EOPTable:
    """Parse a ``finals2000A`` file (default: the one in astropy-iers-data).

    Rows after the last UT1-UTC value (date-only placeholders) are dropped.  Raises
    ``ValueError`` if the nodes are not consecutive days or a value is missing inside
    the span.
    """
    path = Path(path) if path is not None else default_eop_file()
    cols: dict[str, list] = {k: [] for k in _COLS}
    for n, line in enumerate(path.read_text().splitlines(), start=1):
        if not line.strip():
            continue
        line = line.ljust(185)
        try:
            for k in _COLS:
                t = _field(line, k)
                cols[k].append(t if k.endswith("flag_a") else _num(t))
        except ValueError as exc:
            raise ValueError(f"{path}, line {n}: cannot parse EOP record ({exc})") from None
    mjd = np.array(cols["mjd"])
    ut1_a = np.array(cols["ut1_a"])
    have = np.flatnonzero(np.isfinite(ut1_a))
    if have.size < 4:
        raise ValueError(f"{path}: fewer than 4 rows with UT1-UTC")
    end = have[-1] + 1
    sl = slice(0, end)
    mjd = mjd[sl]
    if not np.all(np.diff(mjd) == 1.0):
        raise ValueError(f"{path}: EOP nodes are not consecutive days")

    def combined(a: str, b: str) -> np.ndarray:
        va = np.array(cols[a])[sl]
        vb = np.array(cols[b])[sl]
        return np.where(np.isfinite(vb), vb, va)

    xp = combined("pmx_a", "pmx_b") * ARCSEC_TO_RAD
    yp = combined("pmy_a", "pmy_b") * ARCSEC_TO_RAD
    ut1_utc = combined("ut1_a", "ut1_b")
    dx = combined("dx_a", "dx_b") * _MAS_TO_RAD
    dy = combined("dy_a", "dy_b") * _MAS_TO_RAD
    for name, arr in (("PM-x", xp), ("PM-y", yp), ("UT1-UTC", ut1_utc)):
        if not np.all(np.isfinite(arr)):
            bad = mjd[~np.isfinite(arr)][0]
            raise ValueError(f"{path}: {name} missing at MJD {bad} inside the table span")
    cpo_ok = np.isfinite(dx) & np.isfinite(dy)
    if not cpo_ok[0]:
        raise ValueError(f"{path}: dX/dY missing on the first row")
    last_cpo = int(np.flatnonzero(cpo_ok)[-1])
    if not np.all(cpo_ok[: last_cpo + 1]):
        raise ValueError(f"{path}: dX/dY missing inside their span")
    dx[last_cpo + 1 :] = dx[last_cpo]  # held (documented in the module docstring)
    dy[last_cpo + 1 :] = dy[last_cpo]
    flags = np.array(cols["ut1_flag_a"])[sl]
    pred = np.flatnonzero(flags == "P")
    predicted_from = float(mjd[pred[0]]) if pred.size else float("inf")
    ut1_tai = ut1_utc - _tai_minus_utc(mjd)
    return EOPTable(
        path=str(path),
        mjd=mjd,
        xp=xp,
        yp=yp,
        ut1_utc=ut1_utc,
        ut1_tai=ut1_tai,
        dx=dx,
        dy=dy,
        predicted_from_mjd=predicted_from,
        cpo_last_mjd=float(mjd[last_cpo]),
    )


@functools.lru_cache(maxsize=1)
def get_eop_table() -> EOPTable:
    """The default EOP table, parsed once per process (lazy)."""
    return load_eop_table()


def _mjd_to_date(mjd: float) -> str:
    if not np.isfinite(mjd):
        return "not a date"
    iy, im, iday, fd = erfa.jd2cal(MJD_ZERO, mjd)
    return f"{int(iy):04d}-{int(im):02d}-{int(iday):02d}"


def _span_text(tab: EOPTable) -> str:
    return (
        f"MJD {tab.first_mjd:.1f} ({_mjd_to_date(tab.first_mjd)}) to MJD {tab.last_mjd:.1f} "
        f"({_mjd_to_date(tab.last_mjd)}) UTC"
    )


def _check_policy(policy: str) -> None:
    if policy not in EOP_POLICIES:
        raise ValueError(
            f"unknown EOP policy {policy!r}; expected one of {', '.join(EOP_POLICIES)}"
        )


@functools.lru_cache(maxsize=1)
def _spline() -> CubicSpline:
    """C2 cubic spline (not-a-knot ends) through the daily (xp, yp, UT1-TAI, dX, dY)
    of the default table; built once per process (~10 ms)."""
    tab = get_eop_table()
    y = np.column_stack([tab.xp, tab.yp, tab.ut1_tai, tab.dx, tab.dy])
    return CubicSpline(tab.mjd, y, axis=0, bc_type="not-a-knot")


def _split_range(mjd_utc, policy: str, what: str):
    quiet = policy == "_quiet"  # internal: range already reported by the caller
    if not quiet:
        _check_policy(policy)
    tab = get_eop_table()
    mjd = np.array(mjd_utc, dtype=np.float64, ndmin=1).ravel()
    if not np.all(np.isfinite(mjd)):
        raise ValueError(f"{what}: MJD must be finite, got {mjd_utc!r}")
    lo = mjd < tab.first_mjd
    hi = mjd > tab.last_mjd
    out = lo | hi
    if np.any(out):
        bad = mjd[out]
        if policy == "error":
            first = float(bad.flat[0])
            raise EOPRangeError(
                f"{what}: epoch MJD {first:.6f} UTC ({_mjd_to_date(first)}) is outside the EOP "
                f"table span {_span_text(tab)} of {tab.path}"
                + (f" ({bad.size} epochs outside)" if bad.size > 1 else "")
                + "; choose the policy 'zero' or 'hold' (argument policy= / eop_policy=) to "
                "proceed without EOP there"
            )
        if not quiet:
            log.warning(
                "%s: %d epoch(s) in MJD %.3f..%.3f UTC outside the EOP table span %s; "
                "policy %r: %s",
                what,
                bad.size,
                float(bad.min()),
                float(bad.max()),
                _span_text(tab),
                policy,
                "EOP set to zero" if policy == "zero" else "holding the nearest end value",
            )
    return tab, mjd, lo, hi, out


def eop_at(mjd_utc, policy: str = "error") -> tuple:
    """EOP at UTC MJD(s): ``(xp [rad], yp [rad], UT1-UTC [s], dX [rad], dY [rad])``.

    Vectorised: scalars in -> scalars out, arrays in -> arrays of the same shape.
    Interpolation: cubic spline through the daily nodes; UT1-UTC via UT1-TAI so leap
    seconds are handled (see module docstring).  Outside the table span:
    ``policy="error"`` raises `EOPRangeError` naming the epoch and the span; ``"zero"``
    returns zeros there and ``"hold"`` the first/last tabulated values, both logged
    with ``logging.warning``.
    """
    tab, mjd, lo, hi, out = _split_range(mjd_utc, policy, "eop_at")
    inside = np.clip(mjd, tab.first_mjd, tab.last_mjd)
    xp, yp, ut1_tai, dx, dy = _spline()(inside).T.copy()
    dut1 = np.zeros_like(inside)
    if np.any(~out):
        dut1[~out] = ut1_tai[~out] + _tai_minus_utc(inside[~out])
    if np.any(out):
        if policy == "zero":
            for a in (xp, yp, dut1, dx, dy):
                a[out] = 0.0
        else:  # hold
            for a, f in ((xp, "xp"), (yp, "yp"), (dut1, "ut1_utc"), (dx, "dx"), (dy, "dy")):
                arr = getattr(tab, f)
                a[lo] = arr[0]
                a[hi] = arr[-1]
    res = (xp, yp, dut1, dx, dy)
    if np.ndim(mjd_utc) == 0:
        return tuple(float(a[0]) for a in res)
    shape = np.shape(mjd_utc)
    return tuple(a.reshape(shape) for a in res)


def eop_and_lod_at(mjd_utc, policy: str = "error") -> tuple:
    """`eop_at` and `lod_at` in one call (one range check, one log message):
    ``(xp, yp, UT1-UTC, dX, dY, LOD)`` in rad, rad, s, rad, rad, s."""
    res = eop_at(mjd_utc, policy)
    lod = _lod(mjd_utc, "error" if policy == "error" else "_quiet")
    return (*res, lod)


def lod_at(mjd_utc, policy: str = "error") -> "float | np.ndarray":
    """Excess length of day LOD [s] at UTC MJD(s), from the interpolant of UT1-TAI.

    LOD = -d(UT1-TAI)/dt with t in days (IERS convention: LOD = 86400 s x (1 - dUT1/dTAI)
    per day).  Computed from the same spline as `eop_at` (the
    tabulated LOD column is not always filled).  Outside the span: error, or 0 for
    both the "zero" and "hold" policies (a held UT1-UTC has zero rate).
    """
    return _lod(mjd_utc, policy)


def _lod(mjd_utc, policy: str):
    tab, mjd, lo, hi, out = _split_range(mjd_utc, policy, "lod_at")
    inside = np.clip(mjd, tab.first_mjd, tab.last_mjd)
    rate = _spline()(inside, 1)[:, 2]
    lod = -rate
    lod[out] = 0.0
    if np.ndim(mjd_utc) == 0:
        return float(lod[0])
    return lod.reshape(np.shape(mjd_utc))
