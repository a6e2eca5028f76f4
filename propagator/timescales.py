"""Time scales: the `Epoch` type (two-part Julian date + scale) and conversions.

Supported scales: UTC, TAI, TT, TDB, GPS, UT1.  All conversions go through pyerfa
(ERFA, the open-source build of IAU SOFA):

* UTC <-> TAI: ``erfa.utctai`` / ``erfa.taiutc`` with the leap-second table
  ``Leap_Second.dat`` shipped in ``astropy-iers-data`` (installed into ERFA at import).
* TAI <-> TT: ``erfa.taitt`` / ``erfa.tttai`` (TT = TAI + 32.184 s, IERS Conventions
  2010 section 10.1).
* TT <-> TDB: ``erfa.tttdb`` / ``erfa.tdbtt`` with TDB - TT from ``erfa.dtdb`` (Fairhead &
  Bretagnon 1990 series as implemented in SOFA; geocentric, so the topocentric terms are 0).
* TAI <-> GPS: GPS = TAI - 19 s (IS-GPS-200, section 3.3.4).
* UTC <-> UT1: ``erfa.utcut1`` / ``erfa.ut1utc`` with UT1 - UTC from `propagator.eop`.

Precision: an `Epoch` keeps the Julian date in two parts, normalised so that ``jd1`` is
a midnight (an integer + 0.5) and ``0 <= jd2 < 1`` is the day fraction.  The fraction
then resolves ~1e-16 d = 10 ps, and sums/differences are done part by part, so an
offset of a year is kept to far better than a microsecond.

UTC days that contain a leap second are represented by ERFA's "quasi-JD" convention:
``jd2`` is the fraction of that day's 86401 s.  Arithmetic on UTC epochs is therefore
done in TAI and converted back.

Leap seconds after the table's expiry date are unknown; longarc assumes none (TAI-UTC
stays at its last value) and logs one warning per process when such a UTC date is
converted.  UTC before 1960-01-01 is not defined and raises ``ValueError``.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import logging
import math
from functools import lru_cache
import re
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import erfa
import numpy as np

from propagator.constants import GPS_MINUS_TAI_S, MJD_ZERO, SECONDS_PER_DAY

__all__ = [
    "SCALES",
    "Epoch",
    "convert_jd",
    "tdb_minus_tt_seconds",
    "jd_add_seconds",
    "quiet_dubious_year",
    "LEAP_SECOND_FILE",
    "LEAP_SECONDS_EXPIRE",
]

log = logging.getLogger(__name__)

SCALES: tuple[str, ...] = ("UTC", "TAI", "TT", "TDB", "GPS", "UT1")
"""Time scales an `Epoch` may carry."""

_UTC_START_MJD = 36934.0  # 1960-01-01: the first entry of the ERFA/IERS TAI-UTC table


# --------------------------------------------------------------------------------------
# Leap seconds: install astropy-iers-data's Leap_Second.dat into ERFA at import
# --------------------------------------------------------------------------------------
def _find_leap_second_file() -> Path:
    import astropy_iers_data

    path = getattr(astropy_iers_data, "IERS_LEAP_SECOND_FILE", None)
    if path is None:  # older packages: look in the data directory
        path = Path(astropy_iers_data.__file__).parent / "data" / "Leap_Second.dat"
    return Path(path)


class _LeapSecondArray(np.ndarray):
    """Structured array carrying an ``expires`` attribute (read by erfa.leap_seconds)."""

    expires: str | None = None


def _parse_leap_second_file(path: Path) -> tuple[np.ndarray, _dt.date]:
    """Parse IERS ``Leap_Second.dat``: rows ``MJD day month year TAI-UTC``, '#' comments.

    Returns a structured array with erfa's fields (year, month, tai_utc) and the
    expiry date stated in the header ("File expires on 28 June 2027").
    """
    rows = []
    expires = None
    for line in path.read_text().splitlines():
        if line.startswith("#"):
            m = re.search(r"expires on\s+(\d{1,2})\s+([A-Za-z]+)\s+(\d{4})", line)
            if m:
                expires = _dt.datetime.strptime(" ".join(m.groups()), "%d %B %Y").date()
            continue
        parts = line.split()
        if len(parts) != 5:
            continue
        _mjd, day, month, year, tai_utc = parts
        if int(day) != 1:
            raise ValueError(f"{path}: leap second not on the 1st of a month: {line!r}")
        rows.append((int(year), int(month), float(tai_utc)))
    if not rows or expires is None:
        raise ValueError(f"{path}: no leap-second rows or no 'File expires on' line found")
    table = np.array(rows, dtype=erfa.dt_eraLEAPSECOND)
    return table, expires


def _install_leap_seconds() -> tuple[Path, _dt.date]:
    path = _find_leap_second_file()
    table, expires = _parse_leap_second_file(path)
    arr = table.view(_LeapSecondArray)
    arr.expires = expires.strftime("%d %B %Y")  # the format erfa.leap_seconds parses
    # update() merges with ERFA's built-in table (which also holds the 1960-1971
    # drift rows) and records the expiry, so pyerfa does not consider it stale.
    erfa.leap_seconds.update(arr)
    return path, expires


LEAP_SECOND_FILE, LEAP_SECONDS_EXPIRE = _install_leap_seconds()
"""Leap-second file installed into ERFA, and the expiry date stated in it."""
_LEAP_EXPIRY_MJD = float(
    erfa.cal2jd(LEAP_SECONDS_EXPIRE.year, LEAP_SECONDS_EXPIRE.month, LEAP_SECONDS_EXPIRE.day)[1]
)
_warned_beyond_leap_table = False


@contextlib.contextmanager
def quiet_dubious_year() -> Iterator[None]:
    """Silence ERFA's "dubious year" warning inside UTC conversions.

    ERFA flags UTC dates more than 5 years after its own release year (and before 1960)
    as "dubious" because leap seconds are unpredictable.  longarc installs the IERS
    table itself and handles both cases explicitly (pre-1960 raises, dates past the
    table's expiry log one warning), so ERFA's generic warning is redundant there.
    Only that warning is filtered; every other ERFA warning still shows.
    """
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=r".*dubious year.*", category=erfa.ErfaWarning)
        yield


def _check_utc_mjd(mjd_utc: np.ndarray) -> None:
    """Reject UTC before 1960; log once when UTC lies past the leap-second table expiry."""
    global _warned_beyond_leap_table
    mjd_utc = np.asarray(mjd_utc)
    if mjd_utc.size == 0:
        return
    lo = float(np.min(mjd_utc))
    if lo < _UTC_START_MJD:
        raise ValueError(
            f"UTC is not defined before 1960-01-01 (got MJD {lo:.6f}); use TT or TAI for "
            "earlier epochs"
        )
    if not _warned_beyond_leap_table and float(np.max(mjd_utc)) > _LEAP_EXPIRY_MJD:
        _warned_beyond_leap_table = True
        log.warning(
            "UTC epoch after the leap-second table expiry (%s, file %s): assuming no "
            "further leap seconds (TAI-UTC stays at its last tabulated value)",
            LEAP_SECONDS_EXPIRE.isoformat(),
            LEAP_SECOND_FILE,
        )


# --------------------------------------------------------------------------------------
# Vectorised conversions on two-part Julian dates
# --------------------------------------------------------------------------------------
def _normalize(jd1, jd2):
    """Re-split a two-part JD so jd1 is a midnight (n + 0.5) and 0 <= jd2 < 1.

    ``jd1 - m1`` is exact (Sterbenz), so only the final sum of fractions rounds
    (error <= 1 ulp of a number < 2, i.e. < 2e-11 s).
    """
    jd1 = np.asarray(jd1, dtype=np.float64)
    jd2 = np.asarray(jd2, dtype=np.float64)
    m1 = np.floor(jd1 - 0.5) + 0.5
    f = (jd1 - m1) + jd2
    k = np.floor(f)
    out1 = m1 + k
    out2 = f - k
    wrap = out2 >= 1.0
    out1 = np.where(wrap, out1 + 1.0, out1)
    out2 = np.where(wrap, out2 - 1.0, out2)
    return out1, out2


def jd_add_seconds(jd1, jd2, seconds) -> tuple[np.ndarray, np.ndarray]:
    """Two-part JD (scalars or arrays) + seconds -> normalised (jd1, jd2).

    Whole days are split off first so the day fraction stays exact to ~1e-16 d.
    Uniform scales only (not UTC across a leap second)."""
    seconds = np.asarray(seconds, dtype=np.float64)
    days = np.floor(seconds / SECONDS_PER_DAY)
    rem = seconds - days * SECONDS_PER_DAY  # in [0, 86400) s, rounding <= 1 ulp
    return _normalize(np.asarray(jd1) + days, np.asarray(jd2) + rem / SECONDS_PER_DAY)


def _dtdb(jd1, jd2):
    """TDB - TT [s] at the geocentre (erfa.dtdb with u = v = 0).

    With u = v = 0 the topocentric terms vanish, so the UT argument has no effect;
    the day fraction is passed for form.
    """
    frac = np.mod(np.asarray(jd1) - 0.5, 1.0) + np.asarray(jd2)
    return erfa.dtdb(jd1, jd2, np.mod(frac, 1.0), 0.0, 0.0, 0.0)


def _dut1_at_utc(utc1, utc2, eop_policy: str):
    from propagator import eop  # lazy: eop imports this module

    mjd = (np.asarray(utc1) - MJD_ZERO) + np.asarray(utc2)
    return eop.eop_at(mjd, policy=eop_policy)[2]


def _to_tai(jd1, jd2, scale: str, eop_policy: str):
    if scale == "TAI":
        return jd1, jd2
    if scale == "TT":
        return erfa.tttai(jd1, jd2)
    if scale == "GPS":
        return jd_add_seconds(jd1, jd2, -GPS_MINUS_TAI_S)
    if scale == "TDB":
        # TT = TDB - (TDB-TT); evaluate TDB-TT at TDB first, then once more at the TT
        # estimate (the series changes by < 1e-12 s over 2 ms).
        tt1, tt2 = erfa.tdbtt(jd1, jd2, _dtdb(jd1, jd2))
        tt1, tt2 = erfa.tdbtt(jd1, jd2, _dtdb(tt1, tt2))
        return erfa.tttai(tt1, tt2)
    if scale == "UTC":
        jd1n, jd2n = _normalize(jd1, jd2)
        _check_utc_mjd((jd1n - MJD_ZERO) + jd2n)
        with quiet_dubious_year():
            return erfa.utctai(jd1n, jd2n)
    if scale == "UT1":
        # UT1 -> UTC needs UT1-UTC at the (unknown) UTC: fixed-point iteration; UT1-UTC
        # changes by < 3 ms/day, so each pass shrinks the error by > 3e4.
        jd1n, jd2n = _normalize(jd1, jd2)
        utc1, utc2 = jd1n, jd2n
        for _ in range(3):
            dut1 = _dut1_at_utc(utc1, utc2, eop_policy)
            with quiet_dubious_year():
                utc1, utc2 = _normalize(*erfa.ut1utc(jd1n, jd2n, dut1))
        _check_utc_mjd((utc1 - MJD_ZERO) + utc2)
        with quiet_dubious_year():
            return erfa.utctai(utc1, utc2)
    raise AssertionError(scale)


def _from_tai(jd1, jd2, scale: str, eop_policy: str):
    if scale == "TAI":
        return jd1, jd2
    if scale == "TT":
        return erfa.taitt(jd1, jd2)
    if scale == "GPS":
        return jd_add_seconds(jd1, jd2, GPS_MINUS_TAI_S)
    if scale == "TDB":
        tt1, tt2 = erfa.taitt(jd1, jd2)
        return erfa.tttdb(tt1, tt2, _dtdb(tt1, tt2))
    if scale in ("UTC", "UT1"):
        with quiet_dubious_year():
            utc1, utc2 = _normalize(*erfa.taiutc(jd1, jd2))
        _check_utc_mjd((utc1 - MJD_ZERO) + utc2)
        if scale == "UTC":
            return utc1, utc2
        dut1 = _dut1_at_utc(utc1, utc2, eop_policy)
        with quiet_dubious_year():
            return erfa.utcut1(utc1, utc2, dut1)
    raise AssertionError(scale)


def _check_scale(scale: str) -> str:
    if not isinstance(scale, str) or scale.upper() not in SCALES:
        raise ValueError(f"unknown time scale {scale!r}; expected one of {', '.join(SCALES)}")
    return scale.upper()


def convert_jd(
    jd1, jd2, from_scale: str, to_scale: str, eop_policy: str = "error"
) -> tuple[np.ndarray, np.ndarray]:
    """Convert two-part Julian dates (scalars or arrays) between time scales.

    Routes through TAI (TT <-> TDB directly).  ``eop_policy`` is passed to
    `propagator.eop.eop_at` when UT1 is involved.  Returns normalised (jd1, jd2).
    """
    src = _check_scale(from_scale)
    dst = _check_scale(to_scale)
    jd1 = np.asarray(jd1, dtype=np.float64)
    jd2 = np.asarray(jd2, dtype=np.float64)
    if src == dst:
        return _normalize(jd1, jd2)
    if src == "TT" and dst == "TDB":
        return _normalize(*erfa.tttdb(jd1, jd2, _dtdb(jd1, jd2)))
    if src == "TDB" and dst == "TT":
        tt1, tt2 = erfa.tdbtt(jd1, jd2, _dtdb(jd1, jd2))
        return _normalize(*erfa.tdbtt(jd1, jd2, _dtdb(tt1, tt2)))
    tai1, tai2 = _to_tai(jd1, jd2, src, eop_policy)
    return _normalize(*_from_tai(tai1, tai2, dst, eop_policy))


# --------------------------------------------------------------------------------------
# ISO 8601 parsing
# --------------------------------------------------------------------------------------
_ISO_RE = re.compile(
    r"""^\s*
    (?P<y>\d{4})-(?P<mo>\d{2})-(?P<d>\d{2})
    (?:[T\s](?P<h>\d{2}):(?P<mi>\d{2})(?::(?P<s>\d{2}(?:\.\d*)?))?)?
    (?P<z>Z)?
    (?:\s+(?P<scale>[A-Za-z][A-Za-z0-9]*))?
    \s*$""",
    re.VERBOSE,
)
_ISO_EXPECTED = (
    "expected ISO 8601 'YYYY-MM-DDTHH:MM:SS[.fff] SCALE' (time part optional, "
    f"SCALE one of {', '.join(SCALES)})"
)


def _parse_iso(text: str, scale: str | None):
    if not isinstance(text, str):
        raise ValueError(f"epoch text must be a string, got {text!r}; {_ISO_EXPECTED}")
    m = _ISO_RE.match(text)
    if m is None:
        raise ValueError(f"malformed epoch {text!r}; {_ISO_EXPECTED}")
    word = m.group("scale")
    if m.group("z"):
        if word is not None and word.upper() != "UTC":
            raise ValueError(f"epoch {text!r}: 'Z' means UTC but the scale says {word!r}")
        word = "UTC"
    if word is not None:
        word = _check_scale(word)
    if scale is not None:
        scale = _check_scale(scale)
        if word is not None and word != scale:
            raise ValueError(f"epoch {text!r} names scale {word} but scale={scale!r} was given")
    final = word or scale
    if final is None:
        raise ValueError(f"epoch {text!r} has no time scale; append one of {', '.join(SCALES)} "
                         "or pass scale=")
    y, mo, d = int(m.group("y")), int(m.group("mo")), int(m.group("d"))
    h = int(m.group("h") or 0)
    mi = int(m.group("mi") or 0)
    s = float(m.group("s") or 0.0)
    if not (0 <= h <= 23 and 0 <= mi <= 59 and s < 61.0):
        raise ValueError(f"epoch {text!r}: time of day out of range; {_ISO_EXPECTED}")
    # dtf2d knows the leap-second days (it accepts 23:59:60.x only on them for UTC).
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", erfa.ErfaWarning)
        try:
            jd1, jd2 = erfa.dtf2d(final, y, mo, d, h, mi, s)
        except erfa.ErfaError as exc:  # bad year/month/day
            raise ValueError(
                f"epoch {text!r}: invalid calendar date ({exc}); {_ISO_EXPECTED}"
            ) from None
    for w in caught:
        msg = str(w.message)
        if "dubious year" in msg:  # handled by _check_utc_mjd (see quiet_dubious_year)
            continue
        raise ValueError(f"epoch {text!r}: {msg}; seconds >= 60 are only valid in a UTC "
                         "leap second")
    if final == "UTC":
        try:
            _check_utc_mjd(np.asarray((jd1 - MJD_ZERO) + jd2))
        except ValueError as exc:
            raise ValueError(f"epoch {text!r}: {exc}") from None
    return float(jd1), float(jd2), final


# --------------------------------------------------------------------------------------
# Epoch
# --------------------------------------------------------------------------------------
def _is_real_number(x) -> bool:
    numeric = isinstance(x, (int, float, np.integer, np.floating))
    return numeric and not isinstance(x, (bool, np.bool_))


@dataclass(frozen=True)
class Epoch:
    """An instant as a two-part Julian date ``jd1 + jd2`` [d] in time scale ``scale``.

    Normalised on construction: ``jd1`` is a midnight (integer + 0.5) and
    ``0 <= jd2 < 1``.  Immutable and hashable.
    """

    jd1: float
    jd2: float
    scale: str

    def __post_init__(self) -> None:
        scale = _check_scale(self.scale)
        j1, j2 = float(self.jd1), float(self.jd2)
        if not (math.isfinite(j1) and math.isfinite(j2)):
            raise ValueError(f"Epoch needs finite Julian date parts, got ({j1!r}, {j2!r})")
        n1, n2 = _normalize(j1, j2)
        object.__setattr__(self, "jd1", float(n1))
        object.__setattr__(self, "jd2", float(n2))
        object.__setattr__(self, "scale", scale)

    # --- construction ---------------------------------------------------------------
    @classmethod
    def from_iso(cls, text: str, scale: str | None = None) -> "Epoch":
        """Parse ``'YYYY-MM-DDTHH:MM:SS[.fff] SCALE'`` (``T`` or a space; time optional;
        ``Z`` suffix = UTC).  The scale is the trailing word or the ``scale`` argument."""
        jd1, jd2, sc = _parse_iso(text, scale)
        return cls(jd1, jd2, sc)

    @classmethod
    def from_jd(cls, jd1: float, jd2: float = 0.0, scale: str = "TT") -> "Epoch":
        """Epoch from a two-part Julian date [d] in ``scale``."""
        return cls(jd1, jd2, scale)

    @classmethod
    def from_mjd(cls, mjd: float, scale: str = "TT") -> "Epoch":
        """Epoch from a Modified Julian Date [d] in ``scale``."""
        return cls(MJD_ZERO, mjd, scale)

    # --- views ----------------------------------------------------------------------
    @property
    def jd(self) -> float:
        """Julian date as one float (precision ~40 us; use jd1/jd2 for more)."""
        return self.jd1 + self.jd2

    @property
    def mjd(self) -> float:
        """Modified Julian date as one float (precision ~1 us)."""
        return (self.jd1 - MJD_ZERO) + self.jd2

    def to(self, scale: str, eop_policy: str = "error") -> "Epoch":
        """The same instant in another scale (UT1 uses EOP with ``eop_policy``)."""
        scale = _check_scale(scale)
        if scale == self.scale:
            return self
        if scale != "UT1" and self.scale != "UT1":     # no EOP involved: same answer every time
            return _converted(self, scale)
        j1, j2 = convert_jd(self.jd1, self.jd2, self.scale, scale, eop_policy)
        return Epoch(float(j1), float(j2), scale)

    def iso(self, precision: int = 6) -> str:
        """ISO 8601 text with the scale as a trailing word, e.g.
        ``'2031-03-20T12:00:00.000000 UTC'``; ``precision`` decimals of seconds (0-9)."""
        if not (isinstance(precision, int) and 0 <= precision <= 9):
            raise ValueError(f"precision must be an int in 0..9, got {precision!r}")
        with quiet_dubious_year():
            iy, im, iday, ihmsf = erfa.d2dtf(self.scale, precision, self.jd1, self.jd2)
        h, mi, s, f = (int(ihmsf[k]) for k in ("h", "m", "s", "f"))
        frac = f".{f:0{precision}d}" if precision > 0 else ""
        date = f"{int(iy):04d}-{int(im):02d}-{int(iday):02d}"
        return f"{date}T{h:02d}:{mi:02d}:{s:02d}{frac} {self.scale}"

    def __str__(self) -> str:
        return self.iso()

    # --- arithmetic -----------------------------------------------------------------
    def __add__(self, seconds: float) -> "Epoch":
        """Epoch + seconds of this scale (UTC: done in TAI, so leap seconds count)."""
        if not _is_real_number(seconds):
            return NotImplemented
        seconds = float(seconds)
        if self.scale == "UTC":
            return (self.to("TAI") + seconds).to("UTC")
        j1, j2 = jd_add_seconds(self.jd1, self.jd2, seconds)
        return Epoch(float(j1), float(j2), self.scale)

    __radd__ = __add__

    def __sub__(self, other: "Epoch | float") -> "float | Epoch":
        """Epoch - Epoch -> seconds; Epoch - seconds -> Epoch.

        Same scale: the difference in that scale's seconds (UTC via TAI, so elapsed SI
        seconds including leap seconds).  Different scales: both go to TT first.
        """
        if isinstance(other, Epoch):
            a, b = self, other
            if a.scale != b.scale:
                a, b = a.to("TT"), b.to("TT")
            elif a.scale == "UTC":
                a, b = a.to("TAI"), b.to("TAI")
            return (a.jd1 - b.jd1) * SECONDS_PER_DAY + (a.jd2 - b.jd2) * SECONDS_PER_DAY
        if _is_real_number(other):
            return self + (-float(other))
        return NotImplemented


def tdb_minus_tt_seconds(epoch: Epoch) -> float:
    """TDB - TT [s] at ``epoch`` (geocentre), from ``erfa.dtdb`` (SOFA implementation of
    the Fairhead & Bretagnon 1990 series; |TDB - TT| < 2 ms, IERS Conventions 2010 ch. 10)."""
    tt = epoch.to("TT")
    return float(_dtdb(tt.jd1, tt.jd2))


@lru_cache(maxsize=256)
def _converted(epoch: Epoch, scale: str) -> Epoch:
    """``epoch`` in ``scale`` (neither UT1), memoised: a batch study converts the same few
    epochs for every case (each conversion is ~20-50 us of pyerfa calls)."""
    j1, j2 = convert_jd(epoch.jd1, epoch.jd2, epoch.scale, scale, "error")
    return Epoch(float(j1), float(j2), scale)
