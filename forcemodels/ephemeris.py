"""Geocentric Sun and Moon positions for force models: DE421 Chebyshev tables + numba.

Source data: JPL DE421 (Folkner, Williams & Boggs 2009, IPN Progress Report 42-178) as
shipped by the ``de421`` PyPI package: ``.npy`` arrays of Chebyshev coefficients in km,
argument TDB Julian days, one coefficient set per sub-interval (the layout read by
``jplephem.ephem.Ephemeris``):

* ``jpl-sun.npy``       (6852, 3, 11): Sun w.r.t. the solar-system barycentre, 16-day sets
* ``jpl-earthmoon.npy`` (6852, 3, 13): Earth-Moon barycentre (EMB) w.r.t. the SSB, 16 days
* ``jpl-moon.npy``      (27408, 3, 13): Moon w.r.t. the Earth (geocentric), 4-day sets
* ``constants.npy``: EMRAT, AU, jalpha/jomega (first/last JD).  The packaged coefficients
  span JD 2414992.5 .. 2524624.5 (1899-12-04 .. 2200-02-01, TDB), read from the file.

Set i of a body covers [jalpha + i*span, jalpha + (i+1)*span] with span =
(jomega - jalpha)/n_sets; the Chebyshev argument is x = 2*offset/span - 1.

Geocentric positions (DE421 axes are the ICRF; GCRF is the geocentric frame with the
same axes, so no rotation is applied; the BCRS->GCRS relativistic coordinate
transformation changes positions at the (v/c)^2 ~ 1e-8 relative level and is neglected,
common practice for force models).  Positions are geometric (no light time, no
aberration), as a force model needs:

    Earth = EMB - Moon_geo / (1 + EMRAT)
    Sun_geo = Sun_ssb - Earth = Sun_ssb - EMB + Moon_geo / (1 + EMRAT)

Time: the table stores the case epoch (TT, two-part JD) and the evaluator takes
t = seconds since the epoch in TT.  The ephemeris argument is TDB = TT + (TDB - TT).
TDB - TT (< 2 ms) comes from ``erfa.dtdb`` (the Fairhead & Bretagnon 1990 series as
implemented in SOFA/ERFA, geocentre: topocentric terms zero), evaluated at table-build
time on the Chebyshev nodes of each 16-day set and stored as a Chebyshev series of
``TDB_TT_NCOEF`` coefficients with argument TT.  Interpolation error < 1 ns
(tests/test_ephemeris.py), i.e. < 0.03 mm in the geocentric Sun (Earth orbital speed
30 km/s).  (erfa.dtdb's argument is formally TDB; using TT changes the result by
< 1e-12 s.)

Outside DE421's span the table falls back to the low-precision analytic series of
:mod:`forcemodels.analytic_ephemeris`, with a logged warning and ``source`` = analytic in
the header; beyond the analytic series' validity the table builder raises ValueError.

Resampled series.  The force models evaluate Sun and Moon at every right-hand side
evaluation, where the DE421 path above (three bodies, two set lookups, TDB - TT) costs
~140 ns.  :func:`build_sun_moon_table` therefore re-fits the geocentric positions it
produces (TDB - TT and the Sun = Sun - EMB + Moon/(1 + EMRAT) combination included) as
Chebyshev series in TT seconds since the epoch on equal segments of at most
``RESAMPLE_SEGMENT_S`` = 1 day with ``RESAMPLE_NCOEF`` = 9 coefficients per component
(nodes and transform as in Press et al., Numerical Recipes 3rd ed. sec. 5.8), evaluated
by :func:`resampled_sun_moon_nb` in ~29 ns (one lookup, one shared recurrence).
Measured deviation from the source evaluator over 30 days (20,000 random times): Moon
2.8e-6 m, Sun 3.4e-4 m (the round-off of sums of ~1.5e11 m; 1 ulp = 3e-5 m); the build
measures it between the nodes and stores it (H_RS_MAXDEV).  Both are far below DE421's
own accuracy and change third-body accelerations by < 1e-17 m/s^2.

Table layout (flat float64; header slots are the ``H_*`` constants below)::

    [header (HEADER_SIZE)] [Sun sets] [EMB sets] [Moon sets] [TDB-TT sets] [resampled]

the resampled block as (n_seg, 6, n_coef): Sun x, y, z, Moon x, y, z per segment [m];
each body's sets as (n_sets, 3, n_coef) C-order, coefficients in metres; the TDB-TT sets
as (n_sets, n_coef) in seconds, argument TT days.
"""

from __future__ import annotations

import logging
import math
import os
from functools import lru_cache
from typing import Any

import numpy as np
from numba import njit

from forcemodels.analytic_ephemeris import (ANALYTIC_VALID_CENTURIES, moon_position_analytic_nb,
                                            sun_position_analytic_nb)
from propagator.constants import DAYS_PER_JULIAN_CENTURY, J2000_JD, SECONDS_PER_DAY

log = logging.getLogger(__name__)

# ---- table header layout -----------------------------------------------------------
TABLE_MAGIC = 421.20261202
"""Value of table[H_MAGIC]: identifies a Sun/Moon table (format version in the decimals)."""
H_MAGIC = 0
H_SOURCE = 1          # SOURCE_DE421 or SOURCE_ANALYTIC
H_EPOCH_JD1 = 2       # case epoch, TT Julian date, part 1 [d]
H_EPOCH_JD2 = 3       # part 2 [d]
H_E0_DAYS = 4         # epoch TT JD minus JD of the first stored set [d]
H_T0_CENT = 5         # epoch, Julian centuries TT since J2000.0
H_EARTH_SHARE = 6     # 1 / (1 + EMRAT)
H_T_MIN = 7           # covered span, seconds since epoch (TT)
H_T_MAX = 8
H_START_JD = 9        # TDB JD of the first stored set (information)
H_BODY = 10           # per series b (BODY_SUN, BODY_EMB, BODY_MOON, SERIES_TDB_TT): 4 slots at H_BODY + 4 b
B_NSETS, B_NCOEF, B_SPAN_DAYS, B_OFFSET = 0, 1, 2, 3
H_RS_NSEG = H_BODY + 16   # resampled geocentric series: number of segments (0: none)
H_RS_T0 = H_BODY + 17     # start of the first segment, seconds since epoch (TT)
H_RS_SEG_S = H_BODY + 18  # segment length [s]
H_RS_INV_SEG = H_BODY + 19  # 1 / segment length [1/s]
H_RS_NCOEF = H_BODY + 20  # Chebyshev coefficients per component
H_RS_OFFSET = H_BODY + 21  # index of the first coefficient in the table
H_RS_MAXDEV = H_BODY + 22  # largest deviation from the source evaluator found at build [m]
HEADER_SIZE = H_BODY + 24

SOURCE_DE421 = 0.0
SOURCE_ANALYTIC = 1.0
BODY_SUN, BODY_EMB, BODY_MOON, SERIES_TDB_TT = 0, 1, 2, 3
_BODY_FILES = ("sun", "earthmoon", "moon")
TDB_TT_NCOEF = 10
"""Chebyshev coefficients per 16-day set for TDB - TT (our choice; error < 1 ns)."""

DEFAULT_MARGIN_S = 2.0 * SECONDS_PER_DAY
"""Extra time covered on each side of the requested span [s] (our choice)."""

ANALYTIC_NAME = "analytic (Montenbruck & Gill 2000, sec. 3.3.2)"
DE421_NAME = "DE421"

_SECONDS_PER_CENTURY = SECONDS_PER_DAY * DAYS_PER_JULIAN_CENTURY
_INV_DAY = 1.0 / SECONDS_PER_DAY
"""Multiplication instead of division on the hot path (changes days by <= 1 ulp)."""


# ---- DE421 data access (Python) -----------------------------------------------------
@lru_cache(maxsize=1)
def _de421_dir() -> str:
    import de421

    return os.path.dirname(de421.__file__)


@lru_cache(maxsize=1)
def de421_constants() -> dict[str, float]:
    """The DE421 constants shipped with the ``de421`` package (EMRAT, AU [km], jalpha, ...)."""
    raw = np.load(os.path.join(_de421_dir(), "constants.npy"))
    return {k.decode("ascii"): float(v) for k, v in raw}


@lru_cache(maxsize=3)
def _de421_sets(body: str) -> np.ndarray:
    return np.load(os.path.join(_de421_dir(), f"jpl-{body}.npy"), mmap_mode="r")


def de421_span_jd() -> tuple[float, float]:
    """(first, last) TDB Julian date covered by the packaged DE421 coefficients."""
    c = de421_constants()
    return c["jalpha"], c["jomega"]


def epoch_tt_jd(epoch: Any) -> tuple[float, float]:
    """TT two-part Julian date of ``epoch``.

    ``epoch`` is a :class:`propagator.timescales.Epoch` (anything with ``.to("TT")``
    returning an object with ``jd1``/``jd2``) or a tuple ``(jd1, jd2)`` already in TT.
    """
    if hasattr(epoch, "to"):
        e = epoch.to("TT")
        return float(e.jd1), float(e.jd2)
    jd1, jd2 = epoch
    return float(jd1), float(jd2)


def _span_jd(jd1: float, jd2: float, t_start: float, t_end: float, margin_s: float) -> tuple[float, float, float, float]:
    t_lo = min(t_start, t_end) - margin_s
    t_hi = max(t_start, t_end) + margin_s
    return t_lo, t_hi, (jd1 - J2000_JD + jd2) + t_lo / SECONDS_PER_DAY, (jd1 - J2000_JD + jd2) + t_hi / SECONDS_PER_DAY


def ephemeris_source(epoch: Any, t_start: float, t_end: float, margin_s: float = DEFAULT_MARGIN_S) -> str:
    """Name of the Sun/Moon source a table for this span would use (no warning logged).

    Returns ``DE421_NAME`` or ``ANALYTIC_NAME``; raises ValueError beyond the analytic
    series' validity.
    """
    jd1, jd2 = epoch_tt_jd(epoch)
    _, _, d_lo, d_hi = _span_jd(jd1, jd2, t_start, t_end, margin_s)
    return _choose_source(d_lo, d_hi)


def _choose_source(d_lo: float, d_hi: float) -> str:
    """d_lo/d_hi: span as TT days since J2000 (TDB-TT < 2 ms is covered by the margin)."""
    ja, jo = de421_span_jd()
    if d_lo >= ja - J2000_JD and d_hi <= jo - J2000_JD:
        return DE421_NAME
    lim = ANALYTIC_VALID_CENTURIES * DAYS_PER_JULIAN_CENTURY
    if d_lo < -lim or d_hi > lim:
        raise ValueError(
            f"Sun/Moon ephemeris: span JD(TT) {d_lo + J2000_JD:.1f} .. {d_hi + J2000_JD:.1f} is outside "
            f"DE421 (JD {ja:.1f} .. {jo:.1f}, 1899-12-04 .. 2200-02-01) and outside the validity of the "
            f"analytic fallback series (J2000 +/- {ANALYTIC_VALID_CENTURIES:g} centuries, JD "
            f"{J2000_JD - lim:.1f} .. {J2000_JD + lim:.1f}, years 1500 .. 2500)")
    return ANALYTIC_NAME


def build_sun_moon_table(epoch: Any, t_start: float, t_end: float,
                         margin_s: float = DEFAULT_MARGIN_S) -> np.ndarray:
    """Flat float64 Sun/Moon table covering [t_start, t_end] (+/- margin) around ``epoch``.

    The source table (:func:`build_source_table`: DE421 sets or the analytic series)
    followed by the resampled geocentric series that :func:`sun_moon_nb` evaluates
    (:func:`_append_resampled`, module docstring "Resampled series").
    """
    return _append_resampled(build_source_table(epoch, t_start, t_end, margin_s))


def build_source_table(epoch: Any, t_start: float, t_end: float,
                       margin_s: float = DEFAULT_MARGIN_S) -> np.ndarray:
    """Flat float64 Sun/Moon source table covering [t_start, t_end] (+/- margin).

    Args:
        epoch: case epoch, :class:`propagator.timescales.Epoch` or TT tuple (jd1, jd2).
        t_start, t_end: span in seconds since the epoch (TT), either order.
        margin_s: extra coverage on each side [s].

    Returns:
        The source table (layout in the module docstring, no resampled series: evaluated
        by :func:`source_sun_moon_nb`).  Holds the DE421 Chebyshev sets of Sun, EMB and Moon covering the span, converted to metres;
        if the span leaves DE421 the table selects the analytic series (a warning is
        logged).  Raises ValueError beyond the analytic series' validity.
    """
    jd1, jd2 = epoch_tt_jd(epoch)
    t_lo, t_hi, d_lo, d_hi = _span_jd(jd1, jd2, t_start, t_end, margin_s)
    source = _choose_source(d_lo, d_hi)
    c = de421_constants()
    header = np.zeros(HEADER_SIZE)
    header[H_MAGIC] = TABLE_MAGIC
    header[H_EPOCH_JD1] = jd1
    header[H_EPOCH_JD2] = jd2
    header[H_T0_CENT] = ((jd1 - J2000_JD) + jd2) / DAYS_PER_JULIAN_CENTURY
    header[H_EARTH_SHARE] = 1.0 / (1.0 + c["EMRAT"])
    header[H_T_MIN] = t_lo
    header[H_T_MAX] = t_hi
    if source == ANALYTIC_NAME:
        ja, jo = de421_span_jd()
        log.warning("Sun/Moon ephemeris: span JD(TT) %.1f .. %.1f leaves DE421 (JD %.1f .. %.1f); using the "
                    "low-precision %s series (Sun < 0.02 deg, Moon < 6 arcmin / 600 km)",
                    d_lo + J2000_JD, d_hi + J2000_JD, ja, jo, ANALYTIC_NAME)
        header[H_SOURCE] = SOURCE_ANALYTIC
        return header

    header[H_SOURCE] = SOURCE_DE421
    ja = c["jalpha"]
    coarse = (c["jomega"] - ja) / _de421_sets("sun").shape[0]          # 16 days: Sun and EMB set span
    k0 = int(math.floor((d_lo + J2000_JD - ja) / coarse))
    k1 = int(math.floor((d_hi + J2000_JD - ja) / coarse)) + 1          # exclusive
    n_all = _de421_sets("sun").shape[0]
    k0, k1 = max(k0, 0), min(k1, n_all)
    start_jd = ja + k0 * coarse
    header[H_START_JD] = start_jd
    header[H_E0_DAYS] = (jd1 - start_jd) + jd2
    parts = [header]
    offset = HEADER_SIZE
    for b, name in enumerate(_BODY_FILES):
        sets = _de421_sets(name)
        n_sets, _, n_coef = sets.shape
        span = (c["jomega"] - ja) / n_sets
        ratio = int(round(coarse / span))
        if abs(ratio * span - coarse) > 1e-9:
            raise RuntimeError(f"DE421 {name}: set span {span} d does not divide {coarse} d")
        if name == "earthmoon" and ratio != 1:      # sun_moon_nb shares the Sun's set lookup
            raise RuntimeError(f"DE421 {name}: set span {span} d differs from the Sun's {coarse} d")
        sel = np.array(sets[k0 * ratio:k1 * ratio], dtype=np.float64) * 1000.0     # km -> m
        base = H_BODY + 4 * b
        header[base + B_NSETS] = sel.shape[0]
        header[base + B_NCOEF] = n_coef
        header[base + B_SPAN_DAYS] = span
        header[base + B_OFFSET] = offset
        parts.append(sel.ravel())
        offset += sel.size
    tdb = _tdb_minus_tt_sets(start_jd, coarse, k1 - k0)
    base = H_BODY + 4 * SERIES_TDB_TT
    header[base + B_NSETS] = k1 - k0
    header[base + B_NCOEF] = TDB_TT_NCOEF
    header[base + B_SPAN_DAYS] = coarse
    header[base + B_OFFSET] = offset
    parts.append(tdb.ravel())
    return np.concatenate(parts)


def _tdb_minus_tt_sets(start_jd: float, span: float, n_sets: int) -> np.ndarray:
    """Chebyshev coefficients (n_sets, TDB_TT_NCOEF) of TDB - TT [s] from erfa.dtdb.

    Interpolation at the Chebyshev nodes of each set [start_jd + k span, + span] (TT days).
    """
    import erfa

    n = TDB_TT_NCOEF
    x = np.cos(np.pi * (np.arange(n) + 0.5) / n)               # Chebyshev nodes on [-1, 1]
    k = np.arange(n_sets)[:, None]
    offs = k * span + (x[None, :] + 1.0) * 0.5 * span            # days from start_jd
    vals = erfa.dtdb(start_jd, offs, 0.0, 0.0, 0.0, 0.0)         # geocentre: u = v = 0
    return _chebyshev_fit(vals)


def table_source(table: np.ndarray) -> str:
    """``DE421_NAME`` or ``ANALYTIC_NAME`` according to the table header."""
    if table.size < HEADER_SIZE or table[H_MAGIC] != TABLE_MAGIC:
        raise ValueError("not a Sun/Moon table (bad header)")
    return DE421_NAME if table[H_SOURCE] == SOURCE_DE421 else ANALYTIC_NAME


# ---- compiled evaluator -------------------------------------------------------------
@njit
def _chebyshev_scalar(table, off, k, n_coef, x):
    """sum_j c_j T_j(x) for the set k of a scalar series stored at table[off:]."""
    c0 = off + k * n_coef
    t_prev = 1.0
    t_cur = x
    acc = table[c0] + table[c0 + 1] * x
    two_x = 2.0 * x
    for j in range(2, n_coef):
        t_next = two_x * t_cur - t_prev
        acc += table[c0 + j] * t_next
        t_prev = t_cur
        t_cur = t_next
    return acc


@njit
def _set_and_arg(table, b, days):
    """(set index, Chebyshev argument x) of series b at ``days`` after the first stored set."""
    base = H_BODY + 4 * b
    n_sets = int(table[base + B_NSETS])
    span = table[base + B_SPAN_DAYS]
    inv = 1.0 / span  # DE421 spans are 16 and 4 days: 1/span and the products below are exact
    k = int(math.floor(days * inv))
    if k < 0:
        k = 0
    elif k >= n_sets:
        k = n_sets - 1
    return k, 2.0 * (days - k * span) * inv - 1.0


@njit
def tdb_minus_tt_nb(t, table):
    """TDB - TT [s] at t [s since epoch, TT] from a DE421 table (erfa.dtdb, tabulated)."""
    tt_days = table[H_E0_DAYS] + t * _INV_DAY
    k, x = _set_and_arg(table, SERIES_TDB_TT, tt_days)
    base = H_BODY + 4 * SERIES_TDB_TT
    return _chebyshev_scalar(table, int(table[base + B_OFFSET]), k, int(table[base + B_NCOEF]), x)


@njit
def _chebyshev_body(table, b, days, out, sign):
    """out += sign * position of body b at ``days`` after the first stored set [m]."""
    base = H_BODY + 4 * b
    n_coef = int(table[base + B_NCOEF])
    off = int(table[base + B_OFFSET])
    k, x = _set_and_arg(table, b, days)
    two_x = 2.0 * x
    start = off + k * 3 * n_coef
    for axis in range(3):
        c0 = start + axis * n_coef
        t_prev = 1.0
        t_cur = x
        acc = table[c0] + table[c0 + 1] * x
        for j in range(2, n_coef):
            t_next = two_x * t_cur - t_prev
            acc += table[c0 + j] * t_next
            t_prev = t_cur
            t_cur = t_next
        out[axis] += sign * acc


@njit(inline="always")
def _chebyshev_xyz(table, c0, n_coef, x):
    """(x, y, z) sums sum_j c_j T_j(x) of one set (3 axes x n_coef, from table[c0]);
    forward recurrence T_j = 2x T_(j-1) - T_(j-2) shared by the three axes."""
    two_x = 2.0 * x
    a0 = table[c0] + table[c0 + 1] * x
    a1 = table[c0 + n_coef] + table[c0 + n_coef + 1] * x
    a2 = table[c0 + 2 * n_coef] + table[c0 + 2 * n_coef + 1] * x
    t_prev = 1.0
    t_cur = x
    for j in range(2, n_coef):
        t_next = two_x * t_cur - t_prev
        t_prev = t_cur
        t_cur = t_next
        a0 += table[c0 + j] * t_next
        a1 += table[c0 + n_coef + j] * t_next
        a2 += table[c0 + 2 * n_coef + j] * t_next
    return a0, a1, a2


@njit
def _sun_moon_de421(table, days, sun_out, moon_out):
    """Geocentric Sun and Moon [m] at ``days`` (TDB) after the first stored set.

    The same Chebyshev sums, in the same order, as `_chebyshev_body` (so the same
    results), with the recurrence shared by the three axes and one set lookup for the
    Sun and the EMB (they share the 16-day sets, checked by the table builder):
    Sun_geo = (Sun - EMB) + Moon/(1 + EMRAT)."""
    bs = H_BODY + 4 * BODY_SUN
    be = H_BODY + 4 * BODY_EMB
    bm = H_BODY + 4 * BODY_MOON
    ns = int(table[bs + B_NCOEF])
    ne = int(table[be + B_NCOEF])
    nm = int(table[bm + B_NCOEF])
    k, x = _set_and_arg(table, BODY_SUN, days)
    km, xm = _set_and_arg(table, BODY_MOON, days)
    m0, m1, m2 = _chebyshev_xyz(table, int(table[bm + B_OFFSET]) + km * 3 * nm, nm, xm)
    s0, s1, s2 = _chebyshev_xyz(table, int(table[bs + B_OFFSET]) + k * 3 * ns, ns, x)
    e0, e1, e2 = _chebyshev_xyz(table, int(table[be + B_OFFSET]) + k * 3 * ne, ne, x)
    es = table[H_EARTH_SHARE]
    moon_out[0] = m0
    moon_out[1] = m1
    moon_out[2] = m2
    sun_out[0] = (s0 - e0) + es * m0
    sun_out[1] = (s1 - e1) + es * m1
    sun_out[2] = (s2 - e2) + es * m2


@njit
def source_sun_moon_nb(t, table, sun_out, moon_out):
    """Geocentric GCRF Sun and Moon [m] at t [s since epoch, TT] from the source series.

    DE421 tables: Chebyshev evaluation (argument TDB; TDB - TT tabulated from erfa.dtdb,
    evaluated once), Sun_geo = Sun - EMB + Moon_geo/(1 + EMRAT) (`_sun_moon_de421`).
    Analytic tables: Montenbruck & Gill (2000) sec. 3.3.2 (may allocate).  No span check.
    """
    if table[H_SOURCE] != SOURCE_DE421:
        T = table[H_T0_CENT] + t / _SECONDS_PER_CENTURY
        sun_position_analytic_nb(T, sun_out)
        moon_position_analytic_nb(T, moon_out)
        return
    days = table[H_E0_DAYS] + (t + tdb_minus_tt_nb(t, table)) * _INV_DAY
    _sun_moon_de421(table, days, sun_out, moon_out)


@njit(inline="always")
def resampled_sun_moon_nb(t, table, sun_out, moon_out):
    """Geocentric GCRF Sun and Moon [m] at t [s since epoch, TT] from the resampled series.

    One segment lookup and one Chebyshev argument for both bodies; the six sums share
    the recurrence T_j = 2x T_(j-1) - T_(j-2) (module docstring "Resampled series").
    Needs table[H_RS_NSEG] > 0; does not allocate.  Raises ValueError outside the span.
    """
    if t < table[H_T_MIN] or t > table[H_T_MAX]:
        raise ValueError("sun_moon_nb: time outside the span of the Sun/Moon table")
    n_seg = int(table[H_RS_NSEG])
    n = int(table[H_RS_NCOEF])
    u = (t - table[H_RS_T0]) * table[H_RS_INV_SEG]
    k = int(u)
    if k < 0:
        k = 0
    elif k >= n_seg:
        k = n_seg - 1
    x = 2.0 * (u - k) - 1.0
    c0 = int(table[H_RS_OFFSET]) + k * 6 * n
    two_x = 2.0 * x
    a0 = table[c0] + table[c0 + 1] * x
    a1 = table[c0 + n] + table[c0 + n + 1] * x
    a2 = table[c0 + 2 * n] + table[c0 + 2 * n + 1] * x
    a3 = table[c0 + 3 * n] + table[c0 + 3 * n + 1] * x
    a4 = table[c0 + 4 * n] + table[c0 + 4 * n + 1] * x
    a5 = table[c0 + 5 * n] + table[c0 + 5 * n + 1] * x
    t_prev = 1.0
    t_cur = x
    for j in range(2, n):
        t_next = two_x * t_cur - t_prev
        t_prev = t_cur
        t_cur = t_next
        a0 += table[c0 + j] * t_next
        a1 += table[c0 + n + j] * t_next
        a2 += table[c0 + 2 * n + j] * t_next
        a3 += table[c0 + 3 * n + j] * t_next
        a4 += table[c0 + 4 * n + j] * t_next
        a5 += table[c0 + 5 * n + j] * t_next
    sun_out[0] = a0
    sun_out[1] = a1
    sun_out[2] = a2
    moon_out[0] = a3
    moon_out[1] = a4
    moon_out[2] = a5


@njit
def sun_moon_nb(t, table, sun_out, moon_out):
    """Geocentric GCRF positions of the Sun and Moon [m] at t [s since epoch, TT].

    Tables from :func:`build_sun_moon_table` carry the resampled series
    (:func:`resampled_sun_moon_nb`); source-only tables are evaluated directly
    (:func:`source_sun_moon_nb`).  Raises ValueError if t is outside the table's span.
    """
    if t < table[H_T_MIN] or t > table[H_T_MAX]:
        raise ValueError("sun_moon_nb: time outside the span of the Sun/Moon table")
    if table[H_RS_NSEG] > 0.0:
        resampled_sun_moon_nb(t, table, sun_out, moon_out)
    else:
        source_sun_moon_nb(t, table, sun_out, moon_out)


@njit
def _source_sun_moon_many(ts, table, sun, moon):
    for i in range(ts.shape[0]):
        source_sun_moon_nb(ts[i], table, sun[i], moon[i])


def _chebyshev_sum_np(coef: np.ndarray, x: np.ndarray) -> np.ndarray:
    """sum_j coef[..., j] T_j(x) for per-sample coefficient rows coef (n, ..., m) and
    arguments x (n,), by the recurrence T_j = 2x T_(j-1) - T_(j-2)."""
    m = coef.shape[-1]
    shape = (x.size,) + (1,) * (coef.ndim - 2)
    xr = x.reshape(shape)
    t_prev = np.ones_like(xr)
    t_cur = xr
    acc = coef[..., 0] * t_prev + coef[..., 1] * t_cur
    for j in range(2, m):
        t_prev, t_cur = t_cur, 2.0 * xr * t_cur - t_prev
        acc = acc + coef[..., j] * t_cur
    return acc


def _series_np(table: np.ndarray, b: int, days: np.ndarray, n_axes: int) -> np.ndarray:
    """Series b of a source table at ``days`` after its first set, (n, n_axes) or (n,)."""
    base = H_BODY + 4 * b
    n_sets, n_coef = int(table[base + B_NSETS]), int(table[base + B_NCOEF])
    span, off = table[base + B_SPAN_DAYS], int(table[base + B_OFFSET])
    k = np.clip(np.floor(days / span).astype(np.int64), 0, n_sets - 1)
    x = 2.0 * (days - k * span) / span - 1.0
    sets = table[off:off + n_sets * n_axes * n_coef].reshape(n_sets, n_axes, n_coef)
    out = _chebyshev_sum_np(sets[k], x)
    return out if n_axes > 1 else out[:, 0]


def _source_positions_np(table: np.ndarray, ts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Geocentric Sun and Moon [m], (n, 3) each, at ts [s since epoch, TT] from the source
    series of ``table``: the computation of :func:`source_sun_moon_nb` in numpy (the same
    formulas; sums in another order, so equal to round-off)."""
    ts = np.asarray(ts, dtype=np.float64)
    if table[H_SOURCE] != SOURCE_DE421:
        from forcemodels.analytic_ephemeris import (moon_position_analytic_nb as _mo,
                                                    sun_position_analytic_nb as _su)
        sun, moon = np.empty((ts.size, 3)), np.empty((ts.size, 3))
        for i, t in enumerate(ts):         # the plain-Python form: nothing to compile
            T = table[H_T0_CENT] + t / _SECONDS_PER_CENTURY
            _su.py_func(T, sun[i])
            _mo.py_func(T, moon[i])
        return sun, moon
    tt_days = table[H_E0_DAYS] + ts * _INV_DAY
    days = table[H_E0_DAYS] + (ts + _series_np(table, SERIES_TDB_TT, tt_days, 1)) * _INV_DAY
    moon = _series_np(table, BODY_MOON, days, 3)
    sun = (_series_np(table, BODY_SUN, days, 3) - _series_np(table, BODY_EMB, days, 3)
           + table[H_EARTH_SHARE] * moon)
    return sun, moon


def _resampled_positions_np(table: np.ndarray, ts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """:func:`resampled_sun_moon_nb` in numpy (build-time checks)."""
    n_seg, n = int(table[H_RS_NSEG]), int(table[H_RS_NCOEF])
    u = (np.asarray(ts, dtype=np.float64) - table[H_RS_T0]) * table[H_RS_INV_SEG]
    k = np.clip(u.astype(np.int64), 0, n_seg - 1)
    off = int(table[H_RS_OFFSET])
    coef = table[off:off + n_seg * 6 * n].reshape(n_seg, 6, n)
    out = _chebyshev_sum_np(coef[k], 2.0 * (u - k) - 1.0)
    return out[:, :3], out[:, 3:]


RESAMPLE_SEGMENT_S = SECONDS_PER_DAY
"""Longest segment of the resampled series [s] (our choice; errors in the module docstring)."""
RESAMPLE_NCOEF = 9
"""Chebyshev coefficients per component and segment of the resampled series (our choice)."""


def _chebyshev_fit(values: np.ndarray) -> np.ndarray:
    """Coefficients c_j from values at the n Chebyshev nodes x_i = cos(pi (i + 1/2) / n)
    (discrete Chebyshev transform, e.g. Press et al., Numerical Recipes 3rd ed. sec. 5.8):
    c_j = (2 - [j == 0]) / n sum_i f(x_i) T_j(x_i).  values: (..., n)."""
    n = values.shape[-1]
    Tj = np.cos(np.outer(np.arange(n), np.pi * (np.arange(n) + 0.5) / n))
    coef = values @ Tj.T * (2.0 / n)
    coef[..., 0] *= 0.5
    return coef


def _append_resampled(source: np.ndarray, segment_s: float = RESAMPLE_SEGMENT_S,
                      n_coef: int = RESAMPLE_NCOEF) -> np.ndarray:
    """``source`` + geocentric Sun and Moon re-fitted as Chebyshev series in TT seconds.

    The span [H_T_MIN, H_T_MAX] is cut into equal segments of at most ``segment_s``; on
    each, both bodies are evaluated from the source series (in numpy,
    :func:`_source_positions_np`: the build compiles nothing) at the n_coef
    Chebyshev nodes and transformed (:func:`_chebyshev_fit`).  The deviation from the
    source is measured at the segment mid-points and quarter points (between the nodes)
    and stored in the header (H_RS_MAXDEV, metres)."""
    table = source.copy()
    t_lo, t_hi = float(table[H_T_MIN]), float(table[H_T_MAX])
    n_seg = max(1, int(math.ceil((t_hi - t_lo) / segment_s - 1e-9)))
    seg = (t_hi - t_lo) / n_seg
    x = np.cos(np.pi * (np.arange(n_coef) + 0.5) / n_coef)
    ts = t_lo + seg * (np.arange(n_seg)[:, None] + 0.5 * (x[None, :] + 1.0))
    ts = np.clip(ts, t_lo, t_hi).ravel()
    sun, moon = _source_positions_np(table, ts)
    vals = np.concatenate([sun.reshape(n_seg, n_coef, 3), moon.reshape(n_seg, n_coef, 3)], axis=2)
    coef = _chebyshev_fit(np.ascontiguousarray(vals.transpose(0, 2, 1)))     # (n_seg, 6, n_coef)
    table[H_RS_NSEG] = n_seg
    table[H_RS_T0] = t_lo
    table[H_RS_SEG_S] = seg
    table[H_RS_INV_SEG] = 1.0 / seg
    table[H_RS_NCOEF] = n_coef
    table[H_RS_OFFSET] = table.size
    table = np.concatenate([table, coef.ravel()])
    # deviation from the source between the nodes
    tc = t_lo + seg * (np.arange(n_seg)[:, None] + np.array([0.25, 0.5, 0.75])[None, :])
    tc = tc.ravel()
    s_src, m_src = _source_positions_np(table, tc)
    s_rs, m_rs = _resampled_positions_np(table, tc)
    table[H_RS_MAXDEV] = max(float(np.max(np.linalg.norm(s_src - s_rs, axis=1))),
                             float(np.max(np.linalg.norm(m_src - m_rs, axis=1))))
    return table


@njit
def _sun_moon_many(ts, table, sun, moon):
    for i in range(ts.shape[0]):
        sun_moon_nb(ts[i], table, sun[i], moon[i])


def sun_moon_positions(epoch: Any, t: np.ndarray | float) -> tuple[np.ndarray, np.ndarray]:
    """Geocentric GCRF Sun and Moon positions [m], shape (n, 3) each, at t [s since epoch, TT].

    Convenience wrapper: builds a table over the span of ``t`` and calls :func:`sun_moon_nb`.
    """
    ts = np.atleast_1d(np.asarray(t, dtype=np.float64))
    table = build_sun_moon_table(epoch, float(ts.min()), float(ts.max()))
    sun = np.empty((ts.size, 3))
    moon = np.empty((ts.size, 3))
    _sun_moon_many(ts, table, sun, moon)
    return sun, moon
