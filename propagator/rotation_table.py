"""Per-case GCRF -> ITRF rotation table and its numba evaluator.

A full pyerfa rotation costs ~70 us and cannot run inside numba, so for each case the
slowly varying ingredients of the IERS Conventions 2010 (chapter 5) CIO-based rotation
are tabulated on equally spaced nodes by `build_rotation_table` (through
`propagator.frames.rotation_parts`, i.e. pyerfa + EOP), and `gcrf_to_itrf_nb`
interpolates them and assembles

    R = W^T(xp, yp, s') . R3(ERA) . Q^T(X, Y, s),      r_ITRF = R r_GCRF

in compiled code (IERS Conventions 2010 eqs. 5.1, 5.10, 5.13, 5.15, whose W, Q map
ITRS->TIRS and CIRS->GCRS; the same factorisation as ERFA ``c2tcio``: rpom . R3(era) .
rc2i).

Per node the table stores X, Y (CIP, with dX, dY), s, xp, yp, s' [rad] and UT1-TT [s].
UT1-TT is continuous (no leap-second jumps) and nearly linear; ERA is computed from it
in numba with eq. 5.15, ERA = 2 pi (0.7790572732640 + 1.00273781191135448 Tu),
Tu = JD(UT1) - 2451545.0, with the arithmetic split as in ERFA ``era00`` (whole days
drop out of the fractional part) so that ERA keeps ~1e-14 rad precision.

Interpolation: 6-point Lagrange (degree 5) on the uniform grid, centred on the
interval containing t.  Default node spacing 3600 s, measured against direct pyerfa
(`propagator.frames`) over a 30-day arc in 2024 at 26,600 km radius: max error
0.0015 mm (1 h), 0.0017 mm (2 h), 0.0043 mm (3 h), 0.033 mm (6 h); at <= 2 h the
error is at the float64 floor of the reference itself.  1 h costs ~2 ms of pyerfa per
day of arc to build and 8.8e3 nodes x 7 doubles = 0.5 MB per year; one evaluation
costs ~0.08 us (measured, numba loop on the 2-core machine; ~0.10 us before the
Lagrange weights were formed once and the polar-motion trig replaced by Taylor
polynomials).  (This relies on the EOP interpolant being smooth: see `propagator.eop`
for why it is a cubic spline.)

Table layout (flat float64): a header of `HEADER_LEN` values (indices ``H_*`` below)
followed by ``n_nodes`` rows of ``n_fields`` values (fields ``F_*``), row-major.
Times t are TT seconds since the case epoch.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from propagator.constants import (
    ERA_J2000_TURNS,
    ERA_RATE_EXCESS_TURNS_PER_UT1_DAY,
    ERA_RATE_TURNS_PER_UT1_DAY,
    J2000_JD,
    SECONDS_PER_DAY,
    TWO_PI,
)
from propagator.frames import gcrf_to_itrf_matrices, rotation_parts
from propagator.timescales import Epoch, jd_add_seconds

__all__ = [
    "build_rotation_table",
    "gcrf_to_itrf_nb",
    "earth_rotation_rate_nb",
    "rotation_matrices",
    "rotation_rates",
    "table_time_span",
    "DEFAULT_STEP",
    "build_pole_table",
    "pole_nb",
    "pole_vectors",
    "DEFAULT_POLE_STEP",
]

FORMAT_VERSION = 1.0
DEFAULT_STEP = 3600.0
"""Default node spacing [s]; see the module docstring for the measured error."""
N_POINTS = 6
"""Lagrange stencil size (degree 5)."""
_PAD = N_POINTS // 2  # extra nodes on each side so the ends use centred stencils

# Header indices
H_VERSION = 0  # format version
H_HEADER_LEN = 1  # number of header values
H_T0 = 2  # t of the first node [s, TT since epoch]
H_STEP = 3  # node spacing [s]
H_N_NODES = 4  # number of nodes
H_N_FIELDS = 5  # values per node
H_N_POINTS = 6  # Lagrange stencil size
H_TT_DAYS = 7  # epoch TT jd1 - 2451545.0 [d] (a half-integer, exact)
H_TT_FRAC = 8  # epoch TT jd2 [d], in [0, 1)
H_UT1_MINUS_TT0 = 9  # UT1 - TT at the epoch [s] (information)
H_CIP_OFFSETS = 10  # 1.0 if dX, dY were applied
H_T_START = 11  # requested start [s]
H_T_END = 12  # requested end [s]
H_KIND = 13  # 0.0: rotation table (this module's F_* fields); 1.0: pole table (P_* fields)
H_POLY_OFFSET = 14  # pole tables: index of the per-interval polynomial coefficients (0: none)
HEADER_LEN = 16

# Field indices within a node
F_X = 0
F_Y = 1
F_S = 2
F_XP = 3
F_YP = 4
F_SP = 5
F_UT1_TT = 6
N_FIELDS = 7

# Field indices within a node of a pole table (`build_pole_table`)
P_X = 0
P_Y = 1
P_Z = 2
N_POLE_FIELDS = 3
KIND_ROTATION = 0.0
KIND_POLE = 1.0
DEFAULT_POLE_STEP = 1800.0
"""Default node spacing of the pole table [s]: 6-point Lagrange interpolation of the pole
measured at 4.6e-14 rad max error against the full pyerfa rotation over 30 days in 2024
(3600 s: 2.9e-12 rad, dominated by the diurnal polar-motion/nutation terms)."""

_ERA_FRAC_RATE = ERA_RATE_EXCESS_TURNS_PER_UT1_DAY
_INV_DAY = 1.0 / SECONDS_PER_DAY  # multiplication instead of division (rounding-level change)


def _node_grid(epoch: Epoch, t_start: float, t_end: float, step: float, eop_policy: str):
    """Checked span and the padded node grid shared by the table builders: nodes run from
    ``t_start - 3 step`` to beyond ``t_end + 2 step`` (a centred 6-point stencil for every
    t in the span).  Returns (epoch in TT, first node t0, node count, node TT dates)."""
    if not (math.isfinite(t_start) and math.isfinite(t_end) and t_end >= t_start):
        raise ValueError(f"need finite t_start <= t_end, got {t_start!r}, {t_end!r}")
    if not (math.isfinite(step) and step > 0.0):
        raise ValueError(f"step must be a positive number of seconds, got {step!r}")
    tt = epoch.to("TT", eop_policy=eop_policy)
    n_span = int(math.ceil((t_end - t_start) / step))
    n_nodes = n_span + 1 + 2 * _PAD
    t0 = t_start - _PAD * step
    t_nodes = t0 + step * np.arange(n_nodes, dtype=np.float64)
    jd1, jd2 = jd_add_seconds(np.full(n_nodes, tt.jd1), np.full(n_nodes, tt.jd2), t_nodes)
    return tt, t0, n_nodes, jd1, jd2


def _new_table(tt: Epoch, t0: float, step: float, n_nodes: int, n_fields: int,
               t_start: float, t_end: float) -> np.ndarray:
    """Zeroed flat table with the common header filled (layout in the module docstring)."""
    table = np.zeros(HEADER_LEN + n_nodes * n_fields, dtype=np.float64)
    table[H_VERSION] = FORMAT_VERSION
    table[H_HEADER_LEN] = HEADER_LEN
    table[H_T0] = t0
    table[H_STEP] = step
    table[H_N_NODES] = n_nodes
    table[H_N_FIELDS] = n_fields
    table[H_N_POINTS] = N_POINTS
    table[H_TT_DAYS] = tt.jd1 - J2000_JD
    table[H_TT_FRAC] = tt.jd2
    table[H_T_START] = t_start
    table[H_T_END] = t_end
    return table


def build_rotation_table(
    epoch: Epoch,
    t_start: float,
    t_end: float,
    step: float = DEFAULT_STEP,
    eop_policy: str = "error",
    cip_offsets: bool = True,
) -> np.ndarray:
    """Tabulate the GCRF -> ITRF rotation ingredients for t in [t_start, t_end].

    ``t`` are TT seconds since ``epoch`` (any scale; converted to TT).  Nodes run
    from ``t_start - 3 step`` to beyond ``t_end + 2 step`` so every t in the requested
    span has a centred 6-point stencil.  ``eop_policy`` as in `propagator.eop.eop_at`.
    Returns the flat float64 table described in the module docstring.
    """
    tt, t0, n_nodes, jd1, jd2 = _node_grid(epoch, float(t_start), float(t_end), float(step), eop_policy)
    p = rotation_parts(jd1, jd2, eop_policy=eop_policy, cip_offsets=cip_offsets)
    p0 = rotation_parts(tt.jd1, tt.jd2, eop_policy=eop_policy, cip_offsets=cip_offsets)

    table = _new_table(tt, t0, step, n_nodes, N_FIELDS, t_start, t_end)
    table[H_UT1_MINUS_TT0] = p0["ut1_minus_tt"][0]
    table[H_CIP_OFFSETS] = 1.0 if cip_offsets else 0.0
    rows = table[HEADER_LEN:].reshape(n_nodes, N_FIELDS)
    rows[:, F_X] = p["x"]
    rows[:, F_Y] = p["y"]
    rows[:, F_S] = p["s"]
    rows[:, F_XP] = p["xp"]
    rows[:, F_YP] = p["yp"]
    rows[:, F_SP] = p["sp"]
    rows[:, F_UT1_TT] = p["ut1_minus_tt"]
    return table


def build_pole_table(
    epoch: Epoch,
    t_start: float,
    t_end: float,
    step: float = DEFAULT_POLE_STEP,
    eop_policy: str = "error",
) -> np.ndarray:
    """Tabulate the Earth's pole (ITRF z axis in GCRF, the third row of the GCRF -> ITRF
    matrix R) for t in [t_start, t_end] [s TT since ``epoch``].

    Each node holds R[2, :] from `propagator.frames.gcrf_to_itrf_matrices` (pyerfa, IERS
    Conventions 2010 chapter 5, CIP offsets dX, dY applied), i.e. the same path as the
    rotation table.  Same flat layout and padding as `build_rotation_table`
    (``H_N_FIELDS`` = 3, ``H_KIND`` = 1); evaluated by `pole_nb`.  Cheap to interpolate:
    a force model that needs only the pole (zonal J2) avoids assembling the full matrix.
    """
    tt, t0, n_nodes, jd1, jd2 = _node_grid(epoch, float(t_start), float(t_end), float(step), eop_policy)
    R, _ = gcrf_to_itrf_matrices(jd1, jd2, eop_policy=eop_policy, cip_offsets=True)

    table = _new_table(tt, t0, step, n_nodes, N_POLE_FIELDS, t_start, t_end)
    table[H_CIP_OFFSETS] = 1.0
    table[H_KIND] = KIND_POLE
    rows = table[HEADER_LEN:].reshape(n_nodes, N_POLE_FIELDS)
    rows[:, P_X] = R[:, 2, 0]
    rows[:, P_Y] = R[:, 2, 1]
    rows[:, P_Z] = R[:, 2, 2]
    return refit_pole_polynomials(table)


def _lagrange6_shifted(s: int) -> np.ndarray:
    """M (6 x 6) with L_m(v + s) = sum_k M[m, k] v^k: the 6-point Lagrange basis on the
    nodes 0..5 as polynomials in v = u - s (exact polynomial algebra, numpy.polynomial)."""
    P = np.polynomial.Polynomial
    M = np.zeros((N_POINTS, N_POINTS))
    shift = P([float(s), 1.0])
    for m in range(N_POINTS):
        basis = P([1.0])
        for q in range(N_POINTS):
            if q != m:
                basis = basis * P([-float(q), 1.0]) / float(m - q)
        M[m, :] = basis(shift).coef[:N_POINTS]
    return M


def refit_pole_polynomials(table: np.ndarray) -> np.ndarray:
    """A pole table (header + node rows, with or without an old coefficient block) with
    the coefficient block `pole_nb` reads recomputed from its node rows: call it after
    editing the rows.

    For every node interval [i, i+1] the 6-point Lagrange interpolant that `_stencil`
    uses there is rewritten as a quintic in v = x - i (x in node steps): the same
    polynomial, evaluated by `pole_nb` with Horner's rule instead of forming the six
    weights (~33 ns -> ~12 ns per call).  The node values enter relative to the
    interval's first node (the basis sums to 1, so that value passes through exactly),
    which keeps the cancellation in the monomial coefficients at the level of the ~1e-6
    variation, not of the unit vector: equal to the Lagrange form within ~2.5 ulp
    (5.6e-16; 3e-14 without the reference; tests/test_rotation_table.py).  Layout: (n_nodes - 1, 3, 6) coefficients of
    v^0..v^5 after the node rows."""
    n = int(table[H_N_NODES])
    base = table[:HEADER_LEN + n * N_POLE_FIELDS].copy()
    nodes = base[HEADER_LEN:].reshape(n, N_POLE_FIELDS)
    coef = np.zeros((n - 1, N_POLE_FIELDS, N_POINTS))
    shifted: dict[int, np.ndarray] = {}
    for i in range(n - 1):
        j0 = min(max(i - (_PAD - 1), 0), n - N_POINTS)
        s = i - j0
        if s not in shifted:
            shifted[s] = _lagrange6_shifted(s)
        ref = nodes[i]
        coef[i] = (shifted[s].T @ (nodes[j0:j0 + N_POINTS] - ref)).T       # (3, 6)
        coef[i, :, 0] += ref
    out = np.concatenate([base, coef.ravel()])
    out[H_POLY_OFFSET] = base.size
    return out


def table_time_span(table: np.ndarray) -> tuple[float, float]:
    """(first, last) t [s] at which the table can be evaluated (the padded node range
    minus the stencil margin on each side)."""
    t0 = table[H_T0]
    step = table[H_STEP]
    n = int(table[H_N_NODES])
    return float(t0 + (_PAD - 1) * step), float(t0 + (n - _PAD) * step)


# --------------------------------------------------------------------------------------
# numba evaluators (plain @njit: compiled into the composed module, see DEVELOPERS.md)
# --------------------------------------------------------------------------------------
@njit
def _stencil(t, table):
    """First node index of the 6-point stencil and the position u of t in steps from it.

    Raises if t lies outside the evaluable span (no silent extrapolation)."""
    hdr = int(table[H_HEADER_LEN])
    t0 = table[H_T0]
    step = table[H_STEP]
    n = int(table[H_N_NODES])
    x = (t - t0) * (1.0 / step)  # the reciprocal is off the t-dependent path (<= 1 ulp change)
    if not (x >= _PAD - 1.0 and x <= n - _PAD):  # also rejects NaN
        raise ValueError("rotation table: t outside the tabulated span")
    j0 = min(int(math.floor(x)) - (_PAD - 1), n - N_POINTS)
    return hdr, j0, x - j0


@njit
def _weights(u, k):
    """Lagrange basis polynomial k of the nodes 0..N_POINTS-1 at u, and its derivative."""
    num = 1.0
    den = 1.0
    dnum = 0.0
    for m in range(N_POINTS):
        if m != k:
            dnum = dnum * (u - m) + num
            num *= u - m
            den *= k - m
    return num / den, dnum / den


@njit
def _interp(t, table):
    """Interpolated (X, Y, s, xp, yp, s', UT1-TT, d(UT1-TT)/dt) at t."""
    hdr, j0, u = _stencil(t, table)
    nf = int(table[H_N_FIELDS])
    step = table[H_STEP]
    x = 0.0
    y = 0.0
    s = 0.0
    xp = 0.0
    yp = 0.0
    sp = 0.0
    dut = 0.0
    ddut = 0.0
    for k in range(N_POINTS):
        w, dw = _weights(u, k)
        b = hdr + (j0 + k) * nf
        x += w * table[b + F_X]
        y += w * table[b + F_Y]
        s += w * table[b + F_S]
        xp += w * table[b + F_XP]
        yp += w * table[b + F_YP]
        sp += w * table[b + F_SP]
        dut += w * table[b + F_UT1_TT]
        ddut += dw * table[b + F_UT1_TT]
    return x, y, s, xp, yp, sp, dut, ddut / step


@njit
def _era(t, table, ut1_minus_tt):
    """Earth rotation angle [rad] at t (IERS Conventions 2010 eq. 5.15), split as in
    ERFA era00: ERA = 2 pi (frac(d1) + frac(d2) + 0.7790572732640 + 0.00273781191135448 Tu)."""
    k = math.floor(t * _INV_DAY)
    rem = t - k * SECONDS_PER_DAY  # exact (rem may leave [0, 86400) by rounding: harmless)
    d1 = table[H_TT_DAYS] + k  # half-integer days from J2000 (exact)
    d2 = table[H_TT_FRAC] + (rem + ut1_minus_tt) * _INV_DAY
    tu = d1 + d2
    f = (d1 - math.floor(d1)) + (d2 - math.floor(d2))
    turns = f + ERA_J2000_TURNS + _ERA_FRAC_RATE * tu
    era = TWO_PI * (turns - math.floor(turns))
    return era


# 1 / prod_{m != k} (k - m) for the 6 nodes 0..5 (Lagrange denominators, exact integers)
_INV_DEN0 = -1.0 / 120.0
_INV_DEN1 = 1.0 / 24.0
_INV_DEN2 = -1.0 / 12.0
_INV_DEN3 = 1.0 / 12.0
_INV_DEN4 = -1.0 / 24.0
_INV_DEN5 = 1.0 / 120.0
_SMALL_ANGLE = 1e-3
"""Below this |angle| [rad] cos/sin come from their Taylor polynomials (see `_cos_sin`)."""


@njit
def _cos_sin(a):
    """(cos a, sin a); for |a| < 1e-3 rad (polar motion, s': < 1e-5 rad) the Taylor
    polynomials cos = 1 - a^2/2 + a^4/24, sin = a - a^3/6 + a^5/120, whose truncation
    errors (a^6/720 < 1.4e-21 and a^7/5040 < 2e-22 |a|) are far below the float64
    rounding of the results (common practice; checked against libm in the tests)."""
    if abs(a) < _SMALL_ANGLE:
        a2 = a * a
        return 1.0 + a2 * (-0.5 + a2 * (1.0 / 24.0)), a * (1.0 + a2 * (-1.0 / 6.0 + a2 * (1.0 / 120.0)))
    return math.cos(a), math.sin(a)


@njit(inline="always")
def _lagrange6_weights(u):
    """The six 6-point Lagrange basis weights at u (nodes 0..5), formed from prefix and
    suffix products of (u - m) and the constant denominators (no divisions)."""
    d0 = u
    d1 = u - 1.0
    d2 = u - 2.0
    d3 = u - 3.0
    d4 = u - 4.0
    d5 = u - 5.0
    p2 = d0 * d1
    p3 = p2 * d2
    p4 = p3 * d3
    s3 = d4 * d5
    s2 = d3 * s3
    s1 = d2 * s2
    return ((d1 * s1) * _INV_DEN0, (d0 * s1) * _INV_DEN1, (p2 * s2) * _INV_DEN2,
            (p3 * s3) * _INV_DEN3, (p4 * d5) * _INV_DEN4, (p4 * d4) * _INV_DEN5)


@njit
def _interp_fields(t, table):
    """Interpolated (X, Y, s, xp, yp, s', UT1-TT) at t: the same 6-point Lagrange
    interpolant as `_interp`, with the six basis weights formed once
    (`_lagrange6_weights`)."""
    hdr, j0, u = _stencil(t, table)
    nf = int(table[H_N_FIELDS])
    w0, w1, w2, w3, w4, w5 = _lagrange6_weights(u)
    b0 = hdr + j0 * nf
    b1 = b0 + nf
    b2 = b1 + nf
    b3 = b2 + nf
    b4 = b3 + nf
    b5 = b4 + nf
    x = (w0 * table[b0 + F_X] + w1 * table[b1 + F_X] + w2 * table[b2 + F_X]
         + w3 * table[b3 + F_X] + w4 * table[b4 + F_X] + w5 * table[b5 + F_X])
    y = (w0 * table[b0 + F_Y] + w1 * table[b1 + F_Y] + w2 * table[b2 + F_Y]
         + w3 * table[b3 + F_Y] + w4 * table[b4 + F_Y] + w5 * table[b5 + F_Y])
    s = (w0 * table[b0 + F_S] + w1 * table[b1 + F_S] + w2 * table[b2 + F_S]
         + w3 * table[b3 + F_S] + w4 * table[b4 + F_S] + w5 * table[b5 + F_S])
    xp = (w0 * table[b0 + F_XP] + w1 * table[b1 + F_XP] + w2 * table[b2 + F_XP]
          + w3 * table[b3 + F_XP] + w4 * table[b4 + F_XP] + w5 * table[b5 + F_XP])
    yp = (w0 * table[b0 + F_YP] + w1 * table[b1 + F_YP] + w2 * table[b2 + F_YP]
          + w3 * table[b3 + F_YP] + w4 * table[b4 + F_YP] + w5 * table[b5 + F_YP])
    sp = (w0 * table[b0 + F_SP] + w1 * table[b1 + F_SP] + w2 * table[b2 + F_SP]
          + w3 * table[b3 + F_SP] + w4 * table[b4 + F_SP] + w5 * table[b5 + F_SP])
    dut = (w0 * table[b0 + F_UT1_TT] + w1 * table[b1 + F_UT1_TT] + w2 * table[b2 + F_UT1_TT]
           + w3 * table[b3 + F_UT1_TT] + w4 * table[b4 + F_UT1_TT] + w5 * table[b5 + F_UT1_TT])
    return x, y, s, xp, yp, sp, dut


@njit
def gcrf_to_itrf_nb(t, table, R_out):
    """Write R (row-major, 9 values) with r_ITRF = R r_GCRF at t [s TT since epoch].

    ``R_out``: float64 array of length >= 9 (e.g. ``env[ENV_ROT:ENV_ROT+9]``); element
    3*i + j is R[i, j].  Method: module docstring.  Raises ValueError outside the span.
    """
    x, y, s, xp, yp, sp, dut = _interp_fields(t, table)
    era = _era(t, table, dut)
    # M^T = [[1-aX^2, -aXY, -X], [-aXY, 1-aY^2, -Y], [X, Y, 1-a(X^2+Y^2)]]
    # with a = 1/(1 + sqrt(1 - X^2 - Y^2)); Q = M . R3(s)  (IERS Conventions 2010 eq. 5.10)
    r2 = x * x + y * y
    a = 1.0 / (1.0 + math.sqrt(1.0 - r2))
    m00 = 1.0 - a * x * x
    m01 = -a * x * y
    m02 = -x
    m10 = -a * x * y
    m11 = 1.0 - a * y * y
    m12 = -y
    m20 = x
    m21 = y
    m22 = 1.0 - a * r2
    # R^T(t) Q^T(t) = R3(ERA) . R3(-s) . M^T = R3(ERA - s) . M^T, with
    # R3(angle) = [[c, sin, 0], [-sin, c, 0], [0, 0, 1]]  (eqs. 5.1, 5.10)
    th = era - s
    c = math.cos(th)
    sn = math.sin(th)
    # T = R3(th) . M
    t00 = c * m00 + sn * m10
    t01 = c * m01 + sn * m11
    t02 = c * m02 + sn * m12
    t10 = -sn * m00 + c * m10
    t11 = -sn * m01 + c * m11
    t12 = -sn * m02 + c * m12
    t20 = m20
    t21 = m21
    t22 = m22
    # W^T = R1(-yp) . R2(-xp) . R3(s')   (ERFA pom00)
    cx, sx = _cos_sin(xp)
    cy, sy = _cos_sin(yp)
    cs, ss = _cos_sin(sp)
    # R2(-xp) . R3(s') = [[cx, 0, sx], [0, 1, 0], [-sx, 0, cx]]
    #                  . [[cs, ss, 0], [-ss, cs, 0], [0, 0, 1]]
    p00 = cx * cs
    p01 = cx * ss
    p02 = sx
    p10 = -ss
    p11 = cs
    p12 = 0.0
    p20 = -sx * cs
    p21 = -sx * ss
    p22 = cx
    # R1(-yp) = [[1, 0, 0], [0, cy, -sy], [0, sy, cy]]
    w00 = p00
    w01 = p01
    w02 = p02
    w10 = cy * p10 - sy * p20
    w11 = cy * p11 - sy * p21
    w12 = cy * p12 - sy * p22
    w20 = sy * p10 + cy * p20
    w21 = sy * p11 + cy * p21
    w22 = sy * p12 + cy * p22
    R_out[0] = w00 * t00 + w01 * t10 + w02 * t20
    R_out[1] = w00 * t01 + w01 * t11 + w02 * t21
    R_out[2] = w00 * t02 + w01 * t12 + w02 * t22
    R_out[3] = w10 * t00 + w11 * t10 + w12 * t20
    R_out[4] = w10 * t01 + w11 * t11 + w12 * t21
    R_out[5] = w10 * t02 + w11 * t12 + w12 * t22
    R_out[6] = w20 * t00 + w21 * t10 + w22 * t20
    R_out[7] = w20 * t01 + w21 * t11 + w22 * t21
    R_out[8] = w20 * t02 + w21 * t12 + w22 * t22


@njit
def pole_nb(t, table, out):
    """Write the pole (ITRF z axis in GCRF, unit vector) at t [s TT since epoch] to
    out[0:3], from a `build_pole_table` table: the 6-point Lagrange interpolant of
    `_interp_fields` (nodes and stencil of `_stencil`), stored per node interval as a
    quintic in the position within the interval and evaluated by Horner's rule
    (`_append_pole_polynomials`).  Raises ValueError outside the span; no allocation."""
    t0 = table[H_T0]
    n = int(table[H_N_NODES])
    x = (t - t0) * (1.0 / table[H_STEP])
    if not (x >= _PAD - 1.0 and x <= n - _PAD):  # also rejects NaN
        raise ValueError("rotation table: t outside the tabulated span")
    i = int(x)
    if i > n - 2:
        i = n - 2
    v = x - i
    c = int(table[H_POLY_OFFSET]) + i * (N_POLE_FIELDS * N_POINTS)
    for k in range(N_POLE_FIELDS):
        b = c + k * N_POINTS
        out[k] = table[b] + v * (table[b + 1] + v * (table[b + 2] + v * (table[b + 3]
                                                                       + v * (table[b + 4] + v * table[b + 5]))))


@njit
def _pole_vectors_nb(table, ts, out):
    for i in range(ts.shape[0]):
        pole_nb(ts[i], table, out[i])


def pole_vectors(table: np.ndarray, t_array) -> np.ndarray:
    """Pole unit vectors (n, 3) in GCRF at each t [s TT since the table's epoch] from a
    `build_pole_table` table (see `pole_nb`)."""
    table = np.ascontiguousarray(table, dtype=np.float64)
    if table[H_KIND] != KIND_POLE:
        raise ValueError("pole_vectors needs a pole table (build_pole_table)")
    ts = np.ascontiguousarray(np.atleast_1d(np.asarray(t_array, dtype=np.float64)))
    out = np.empty((ts.shape[0], 3), dtype=np.float64)
    _pole_vectors_nb(table, ts, out)
    return out


@njit
def earth_rotation_rate_nb(t, table):
    """dERA/dt [rad per TT second] at t: 2 pi 1.00273781191135448 / 86400 x
    (1 + d(UT1-TT)/dt), the derivative of IERS Conventions 2010 eq. 5.15 with
    d(UT1-TT)/dt from the interpolant (equals -LOD/86400 s).

    The Earth rotation vector in ITRF is this rate times the third column of W,
    i.e. within ~1e-6 rad of the ITRF z axis; v_ITRF = R v_GCRF - omega x r_ITRF."""
    x, y, s, xp, yp, sp, dut, ddut = _interp(t, table)
    return TWO_PI * ERA_RATE_TURNS_PER_UT1_DAY / SECONDS_PER_DAY * (1.0 + ddut)


@njit
def _rotation_matrices_nb(table, ts, out):
    for i in range(ts.shape[0]):
        gcrf_to_itrf_nb(ts[i], table, out[i])


@njit
def _rotation_rates_nb(table, ts, out):
    for i in range(ts.shape[0]):
        out[i] = earth_rotation_rate_nb(ts[i], table)


def rotation_matrices(table: np.ndarray, t_array) -> np.ndarray:
    """R (n, 3, 3) with r_ITRF = R r_GCRF at each t [s TT since the table's epoch]."""
    ts = np.ascontiguousarray(np.atleast_1d(np.asarray(t_array, dtype=np.float64)))
    out = np.empty((ts.shape[0], 9), dtype=np.float64)
    _rotation_matrices_nb(np.ascontiguousarray(table, dtype=np.float64), ts, out)
    return out.reshape(-1, 3, 3)


def rotation_rates(table: np.ndarray, t_array) -> np.ndarray:
    """Earth rotation rate dERA/dt [rad/s] at each t (see `earth_rotation_rate_nb`)."""
    ts = np.ascontiguousarray(np.atleast_1d(np.asarray(t_array, dtype=np.float64)))
    out = np.empty(ts.shape[0], dtype=np.float64)
    _rotation_rates_nb(np.ascontiguousarray(table, dtype=np.float64), ts, out)
    return out
