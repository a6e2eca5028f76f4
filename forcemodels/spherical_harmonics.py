"""Spherical-harmonic gravity: potential and acceleration in the body-fixed frame (numba).

Method: Cunningham's solid-harmonic recursion (L. Cunningham, "On the computation of the
spherical harmonic terms needed during the numerical integration of the orbital motion
of an artificial satellite", Celestial Mechanics 2, 207-216, 1970), in the form of
Montenbruck & Gill, Satellite Orbits, Springer 2000, sec. 3.2.4-3.2.5, eqs. 3.27-3.33,
rewritten here for **fully normalised** quantities.  With

    V_nm = (R/r)^(n+1) P_nm(sin phi) cos(m lambda),   W_nm = (R/r)^(n+1) P_nm(sin phi) sin(m lambda)

(P_nm without Condon-Shortley phase) and V_bar = N_nm V, W_bar = N_nm W,
N_nm = sqrt((2 - delta_0m)(2n+1)(n-m)!/(n+m)!), the recursions are purely Cartesian
(x, y, z, r^2 only: no latitude or longitude, hence **no singularity at the poles**):

* sectoral  (M&G eq. 3.30, first pair):
  V_bar_mm = d_m (x R/r^2 V_bar_m-1,m-1 - y R/r^2 W_bar_m-1,m-1),
  W_bar_mm = d_m (x R/r^2 W_bar_m-1,m-1 + y R/r^2 V_bar_m-1,m-1),
  d_1 = sqrt(3), d_m = sqrt((2m+1)/(2m)) for m > 1, V_bar_00 = R/r, W_bar_00 = 0;
* columns (M&G eq. 3.30, second pair = the forward column recursion of Holmes &
  Featherstone, J. Geodesy 76:279-299, 2002, eqs. 11-13):
  V_bar_nm = a_nm z R/r^2 V_bar_n-1,m - b_nm R^2/r^2 V_bar_n-2,m (same for W_bar),
  a_nm = sqrt((2n-1)(2n+1)/((n-m)(n+m))),
  b_nm = sqrt((2n+1)(n+m-1)(n-m-1)/((n-m)(n+m)(2n-3))).

Potential (M&G eq. 3.29): U = GM/R sum_{n>=2} sum_m (C_bar V_bar_nm + S_bar W_bar_nm) [m^2/s^2].

Acceleration (M&G eq. 3.33 with C = N_nm C_bar, V = V_bar / N): for m = 0

    a_x = -GM/R^2 k1 C_bar V_bar_n+1,1,  a_y = -GM/R^2 k1 C_bar W_bar_n+1,1,
    k1 = N_n0/N_n+1,1 = sqrt((2n+1)(n+1)(n+2) / (2 (2n+3))),

for m > 0

    a_x = GM/R^2 [ -h1 (C_bar V_bar_n+1,m+1 + S_bar W_bar_n+1,m+1)
                   + h2 (C_bar V_bar_n+1,m-1 + S_bar W_bar_n+1,m-1) ],
    a_y = GM/R^2 [ -h1 (C_bar W_bar_n+1,m+1 - S_bar V_bar_n+1,m+1)
                   - h2 (C_bar W_bar_n+1,m-1 - S_bar V_bar_n+1,m-1) ],
    h1 = N_nm/(2 N_n+1,m+1) = 1/2 sqrt((2n+1)(n+m+1)(n+m+2)/(2n+3)),
    h2 = (n-m+2)(n-m+1) N_nm/(2 N_n+1,m-1) = 1/2 sqrt((2n+1)(n-m+1)(n-m+2) c/(2n+3)),
    c = 2 if m == 1 else 1,

and for all m: a_z = -GM/R^2 k3 (C_bar V_bar_n+1,m + S_bar W_bar_n+1,m),
k3 = (n-m+1) N_nm/N_n+1,m = sqrt((2n+1)(n+m+1)(n-m+1)/(2n+3)).  Units: m/s^2.
(k1 is stored as h1 of order 0, with h2 = 0 there.)

Evaluation order (an exact regrouping of the sums above; results differ from a literal
term-by-term evaluation by rounding only):

1. The column recursion is linear with real factors, so V_bar_nm + i W_bar_nm =
   q_nm (V_bar_mm + i W_bar_mm) with the real column values q_mm = 1,
   q_nm = a_nm z R/r^2 q_n-1,m - b_nm R^2/r^2 q_n-2,m, i.e. q_nm = (R/r)^(n-m) P_nm/P_mm
   (P_mm carries the factor u^m that the modified forward column method of Holmes &
   Featherstone 2002 also divides out).  One real recursion per column replaces the two
   (V and W) of the literal form.
2. Collecting the acceleration sums by the column j of V/W they use, the three
   components need, per column, six real sums over degree, with factors fixed at
   preparation (G_nj below, e.g. X_c = h2_n,j+1 C_bar_n,j+1 - h1_n,j-1 C_bar_n,j-1):

       a_x += V_jj sum_n q_n+1,j X_c + W_jj sum_n q_n+1,j X_s,
       a_y += V_jj sum_n q_n+1,j Y_s - W_jj sum_n q_n+1,j Y_c,
       a_z -= V_jj sum_n q_n+1,j Z_c + W_jj sum_n q_n+1,j Z_s,
       X_s = h2 S_bar_n,j+1 - h1 S_bar_n,j-1,  Y_c = h1 C_bar_n,j-1 + h2 C_bar_n,j+1,
       Y_s = h1 S_bar_n,j-1 + h2 S_bar_n,j+1,  Z_c = k3 C_bar_nj,  Z_s = k3 S_bar_nj,

   (h1, h2 at degree n and the order named by their coefficient; terms with an order
   outside 0..min(n, order) are zero).  Two columns are run together so that their
   (independent) recursions overlap in the processor.

Speed (measured, 2-core Xeon VM, numba 0.68): degree and order 12 ~0.2 us per
acceleration, about 3x faster than the literal evaluation (two recursions V, W into
scratch, then term-by-term sums) used before; no fused multiply-add, no fastmath.  The
kernels index ``d`` with unsigned integers, which spares numba's negative-index
handling in the inner loops (same addresses, same results).

All factors (a_nm, b_nm, the sectoral d_m, the G and the coefficients for the
potential) are computed once by :func:`field_data` and stored in one flat float64 array
``d``, column by column (order outer) in packed triangular form (rows n = m..degree+1 of
column m), the six G factors of one (n, m) side by side.  The kernels only read ``d``.
Degrees 0 and 1 are excluded: the central term comes from the ``central_gravity`` model
and a geocentric field has no degree 1.

Range: the recursion is unscaled (no 1e-280 scaling of Holmes & Featherstone sec. 2.2).
The sectoral values V_bar_mm carry u^m (u = cos latitude) and may underflow near the
poles for high m, where those terms no longer matter; the column values q_nm stay
bounded (polynomials in sin latitude; largest 7.9e74, computed at degree 360, r = R).  :data:`MAX_DEGREE`
= 360 keeps well inside that range (tested to degree 120, including 1e-4 degree from the
pole and the pole itself).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

MAX_DEGREE = 360
"""Highest degree accepted (see module docstring: unscaled recursion)."""

_NG = 6
"""Acceleration factors per (n, m) entry: X_c, X_s, Y_c, Y_s, Z_c, Z_s (module docstring)."""


def _layout_py(nmax):
    """Offsets in ``d`` for a field of degree ``nmax``: (oA, oB, oG, oP, oD, size).

    Columns m = 0..nmax+1 each hold rows n = m..nmax+1 (packed, column after column):
    entry (n, m) has index k = m (nmax+2) - m (m-1)/2 + n - m.  A[k], B[k] are the column
    recursion factors a_nm, b_nm; G[6k .. 6k+5] the acceleration factors of q_nm
    (degree n-1 coefficients); P[2k], P[2k+1] = C_bar_nm, S_bar_nm (potential); D[m] the
    sectoral factors d_m.
    """
    n1 = nmax + 2
    npk = n1 * (n1 + 1) // 2
    o_a = 0
    o_b = o_a + npk
    o_g = o_b + npk
    o_p = o_g + _NG * npk
    o_d = o_p + 2 * npk
    return o_a, o_b, o_g, o_p, o_d, o_d + n1


_layout = njit(_layout_py)


def _column_start(m: int, n1: int) -> int:
    """Packed index of entry (m, m) (see ``_layout_py``; n1 = degree + 2)."""
    return m * n1 - m * (m - 1) // 2


def field_data(C: np.ndarray, S: np.ndarray, degree: int, order: int) -> np.ndarray:
    """Pack recursion factors and coefficient combinations into ``d`` (module docstring).

    Args:
        C, S: fully normalised coefficients ``C[n, m]`` (at least (degree+1) square).
        degree: highest degree used (2 <= degree <= MAX_DEGREE).
        order: highest order used (0 <= order <= degree).

    Returns:
        float64 array laid out as described by ``_layout_py``; terms with n < 2 or
        m > order are zero.
    """
    if not (2 <= degree <= MAX_DEGREE):
        raise ValueError(f"spherical-harmonic degree {degree} outside 2..{MAX_DEGREE}")
    if not (0 <= order <= degree):
        raise ValueError(f"spherical-harmonic order {order} outside 0..degree ({degree})")
    C = np.asarray(C, dtype=np.float64)
    S = np.asarray(S, dtype=np.float64)
    if C.shape[0] <= degree or C.shape[1] <= degree or S.shape != C.shape:
        raise ValueError(f"coefficient arrays {C.shape}/{S.shape} too small for degree {degree}")
    o_a, o_b, o_g, o_p, o_d, size = _layout_py(degree)
    n1 = degree + 2
    d = np.zeros(size)

    def cs(n: int, m: int) -> tuple[float, float]:
        """Coefficients used (zero outside 2 <= n <= degree, 0 <= m <= min(n, order))."""
        if n < 2 or n > degree or m < 0 or m > n or m > order:
            return 0.0, 0.0
        return float(C[n, m]), float(S[n, m])

    def h1(n: int, m: int) -> float:  # k1 for m = 0 (module docstring)
        f = (2 * n + 1) / (2 * n + 3)
        if m == 0:
            return math.sqrt(f * (n + 1) * (n + 2) / 2.0)
        return 0.5 * math.sqrt(f * (n + m + 1) * (n + m + 2))

    def h2(n: int, m: int) -> float:  # m >= 1
        f = (2 * n + 1) / (2 * n + 3)
        return 0.5 * math.sqrt(f * (n - m + 1) * (n - m + 2) * (2.0 if m == 1 else 1.0))

    def k3(n: int, m: int) -> float:
        f = (2 * n + 1) / (2 * n + 3)
        return math.sqrt(f * (n + m + 1) * (n - m + 1))

    for m in range(n1):
        k = _column_start(m, n1)
        for n in range(m, n1):
            # column recursion factors (Holmes & Featherstone 2002, eqs. 11-13)
            if n >= m + 1:
                d[o_a + k] = math.sqrt((2 * n - 1) * (2 * n + 1) / ((n - m) * (n + m)))
            if n >= m + 2:
                d[o_b + k] = math.sqrt((2 * n + 1) * (n + m - 1) * (n - m - 1)
                                       / ((n - m) * (n + m) * (2 * n - 3)))
            d[o_p + 2 * k], d[o_p + 2 * k + 1] = cs(n, m)
            # acceleration factors of q_nm: degree nc = n - 1, orders m - 1, m, m + 1
            nc = n - 1
            if 2 <= nc <= degree:
                c_lo, s_lo = cs(nc, m - 1)
                c_hi, s_hi = cs(nc, m + 1)
                c_0, s_0 = cs(nc, m)
                f1 = h1(nc, m - 1) if 1 <= m <= nc + 1 else 0.0
                f2 = h2(nc, m + 1) if m + 1 <= nc else 0.0
                f3 = k3(nc, m) if m <= nc else 0.0
                g = o_g + _NG * k
                d[g + 0] = f2 * c_hi - f1 * c_lo
                d[g + 1] = f2 * s_hi - f1 * s_lo
                d[g + 2] = f1 * c_lo + f2 * c_hi
                d[g + 3] = f1 * s_lo + f2 * s_hi
                d[g + 4] = f3 * c_0
                d[g + 5] = f3 * s_0
            k += 1
    for m in range(1, n1):
        d[o_d + m] = math.sqrt(3.0) if m == 1 else math.sqrt((2 * m + 1) / (2 * m))
    return d


@njit
def potential_bodyfixed(x, y, z, gm, radius, degree, order, d):
    """Disturbing potential of degrees 2..degree, orders 0..order at body-fixed (x, y, z) [m].

    U = GM/R sum_m (V_bar_mm sum_n q_nm C_bar_nm + W_bar_mm sum_n q_nm S_bar_nm) [m^2/s^2]
    (M&G 2000 eq. 3.29, normalised, regrouped as in the module docstring).  ``d`` from
    :func:`field_data` for this ``degree``.
    """
    o_a, o_b, o_g, o_p, o_d, size = _layout(degree)
    n1 = degree + 2
    r2 = x * x + y * y + z * z
    rho = radius / r2
    xs = x * rho
    ys = y * rho
    zs = z * rho
    rr = radius * rho
    vs = radius / math.sqrt(r2)
    ws = 0.0
    u = 0.0
    k = 0
    for m in range(order + 1):
        if m > 0:  # sectoral step (M&G eq. 3.30, first pair)
            dm = d[np.uint64(o_d + m)]
            v_new = dm * (xs * vs - ys * ws)
            ws = dm * (xs * ws + ys * vs)
            vs = v_new
        sc = d[np.uint64(o_p + 2 * k)]
        ss = d[np.uint64(o_p + 2 * k + 1)]
        q0 = 0.0
        q1 = 1.0
        kn = k
        for n in range(m + 1, n1):
            kn += 1
            q2 = d[np.uint64(o_a + kn)] * zs * q1 - d[np.uint64(o_b + kn)] * rr * q0
            sc += d[np.uint64(o_p + 2 * kn)] * q2
            ss += d[np.uint64(o_p + 2 * kn + 1)] * q2
            q0 = q1
            q1 = q2
        u += vs * sc + ws * ss
        k += n1 - m
    return gm / radius * u


@njit
def accel_bodyfixed(x, y, z, gm, radius, degree, order, d):
    """Acceleration (ax, ay, az) [m/s^2] of degrees 2..degree, orders 0..order at body-fixed (x, y, z) [m].

    Gradient of :func:`potential_bodyfixed` by M&G 2000 eq. 3.33 in normalised form,
    evaluated column by column (module docstring, "Evaluation order").  Valid everywhere
    outside the origin, poles included.  ``d`` from :func:`field_data` for this
    ``degree``; read only.  Allocates nothing.
    """
    o_a, o_b, o_g, o_p, o_d, size = _layout(degree)
    n1 = degree + 2
    r2 = x * x + y * y + z * z
    rho = radius / r2
    xs = x * rho
    ys = y * rho
    zs = z * rho
    rr = radius * rho
    vs = radius / math.sqrt(r2)  # V_bar_00 (then V_bar_jj of the current column j)
    ws = 0.0
    ax = 0.0
    ay = 0.0
    az = 0.0
    ncol = order + 2  # columns 0..order+1 of V/W enter the acceleration
    ka = 0  # packed index of (j, j)
    j = 0
    while j + 1 < ncol:
        # ---- columns j and j+1 together: two independent recursions ----
        dm = d[np.uint64(o_d + j + 1)]
        vt = dm * (xs * vs - ys * ws)  # V_bar, W_bar of (j+1, j+1)
        wt = dm * (xs * ws + ys * vs)
        kb = ka + n1 - j  # packed index of (j+1, j+1)
        # column j, rows j (q = 1) and j+1 (q = a z R/r^2)
        qa0 = 1.0
        qa1 = d[np.uint64(o_a + ka + 1)] * zs
        g0 = o_g + _NG * ka
        g1 = g0 + _NG
        a0 = d[np.uint64(g0)] + d[np.uint64(g1)] * qa1
        a1 = d[np.uint64(g0 + 1)] + d[np.uint64(g1 + 1)] * qa1
        a2 = d[np.uint64(g0 + 2)] + d[np.uint64(g1 + 2)] * qa1
        a3 = d[np.uint64(g0 + 3)] + d[np.uint64(g1 + 3)] * qa1
        a4 = d[np.uint64(g0 + 4)] + d[np.uint64(g1 + 4)] * qa1
        a5 = d[np.uint64(g0 + 5)] + d[np.uint64(g1 + 5)] * qa1
        # column j+1, row j+1 (q = 1)
        g0 = o_g + _NG * kb
        b0 = d[np.uint64(g0)]
        b1 = d[np.uint64(g0 + 1)]
        b2 = d[np.uint64(g0 + 2)]
        b3 = d[np.uint64(g0 + 3)]
        b4 = d[np.uint64(g0 + 4)]
        b5 = d[np.uint64(g0 + 5)]
        qb0 = 0.0
        qb1 = 1.0
        ka += 1
        for n in range(j + 2, n1):  # row n of both columns
            ka += 1
            kb += 1
            qa2 = d[np.uint64(o_a + ka)] * zs * qa1 - d[np.uint64(o_b + ka)] * rr * qa0
            qb2 = d[np.uint64(o_a + kb)] * zs * qb1 - d[np.uint64(o_b + kb)] * rr * qb0
            g0 = o_g + _NG * ka
            a0 += d[np.uint64(g0)] * qa2
            a1 += d[np.uint64(g0 + 1)] * qa2
            a2 += d[np.uint64(g0 + 2)] * qa2
            a3 += d[np.uint64(g0 + 3)] * qa2
            a4 += d[np.uint64(g0 + 4)] * qa2
            a5 += d[np.uint64(g0 + 5)] * qa2
            g1 = o_g + _NG * kb
            b0 += d[np.uint64(g1)] * qb2
            b1 += d[np.uint64(g1 + 1)] * qb2
            b2 += d[np.uint64(g1 + 2)] * qb2
            b3 += d[np.uint64(g1 + 3)] * qb2
            b4 += d[np.uint64(g1 + 4)] * qb2
            b5 += d[np.uint64(g1 + 5)] * qb2
            qa0 = qa1
            qa1 = qa2
            qb0 = qb1
            qb1 = qb2
        ax += vs * a0 + ws * a1
        ay += vs * a3 - ws * a2
        az -= vs * a4 + ws * a5
        ax += vt * b0 + wt * b1
        ay += vt * b3 - wt * b2
        az -= vt * b4 + wt * b5
        ka = kb + 1  # (j+2, j+2)
        j += 2
        if j < ncol:
            dm = d[np.uint64(o_d + j)]
            vs = dm * (xs * vt - ys * wt)
            ws = dm * (xs * wt + ys * vt)
    if j < ncol:
        # ---- last column alone (odd column count) ----
        g0 = o_g + _NG * ka
        a0 = d[np.uint64(g0)]
        a1 = d[np.uint64(g0 + 1)]
        a2 = d[np.uint64(g0 + 2)]
        a3 = d[np.uint64(g0 + 3)]
        a4 = d[np.uint64(g0 + 4)]
        a5 = d[np.uint64(g0 + 5)]
        qa0 = 0.0
        qa1 = 1.0
        for n in range(j + 1, n1):
            ka += 1
            qa2 = d[np.uint64(o_a + ka)] * zs * qa1 - d[np.uint64(o_b + ka)] * rr * qa0
            g0 = o_g + _NG * ka
            a0 += d[np.uint64(g0)] * qa2
            a1 += d[np.uint64(g0 + 1)] * qa2
            a2 += d[np.uint64(g0 + 2)] * qa2
            a3 += d[np.uint64(g0 + 3)] * qa2
            a4 += d[np.uint64(g0 + 4)] * qa2
            a5 += d[np.uint64(g0 + 5)] * qa2
            qa0 = qa1
            qa1 = qa2
        ax += vs * a0 + ws * a1
        ay += vs * a3 - ws * a2
        az -= vs * a4 + ws * a5
    f = gm / (radius * radius)
    return f * ax, f * ay, f * az
