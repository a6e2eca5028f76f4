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

All recursion and acceleration factors are computed once by :func:`field_data` and
stored, with the coefficients and the scratch arrays the kernel writes V_bar/W_bar
into, in one flat float64 array ``d``.  Degrees 0 and 1 are excluded: the central term
comes from the ``central_gravity`` model and a geocentric field has no degree 1.

Range: the recursion is unscaled (no 1e-280 scaling of Holmes & Featherstone sec. 2.2),
which is sound while the sectoral values u^m (u = cos latitude) do not underflow where
the terms still matter; :data:`MAX_DEGREE` = 360 keeps well inside that range (tested to
degree 120, including 1e-4 degree from the pole and the pole itself).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

MAX_DEGREE = 360
"""Highest degree accepted (see module docstring: unscaled recursion)."""


def _layout_py(nmax):
    """Offsets in ``d`` for a field of degree ``nmax``: (oC, oS, oA, oB, oD, oK1, oK2, oK3, oV, oW, size).

    Arrays are stored column by column (order m outer): C, S, K1, K2, K3 as
    [m * (nmax+1) + n], A, B, V, W as [m * (nmax+2) + n], the sectoral factors D as [m].
    """
    nc = (nmax + 1) * (nmax + 1)
    n1 = nmax + 2
    nv = n1 * n1
    o_c = 0
    o_s = o_c + nc
    o_a = o_s + nc
    o_b = o_a + nv
    o_d = o_b + nv
    o_k1 = o_d + n1
    o_k2 = o_k1 + nc
    o_k3 = o_k2 + nc
    o_v = o_k3 + nc
    o_w = o_v + nv
    return o_c, o_s, o_a, o_b, o_d, o_k1, o_k2, o_k3, o_v, o_w, o_w + nv


_layout = njit(_layout_py)


def field_data(C: np.ndarray, S: np.ndarray, degree: int, order: int) -> np.ndarray:
    """Pack fully normalised coefficients, recursion factors and scratch space into ``d``.

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
    o_c, o_s, o_a, o_b, o_d, o_k1, o_k2, o_k3, o_v, o_w, size = _layout_py(degree)
    nc1 = degree + 1
    n1 = degree + 2
    d = np.zeros(size)
    for m in range(order + 1):
        for n in range(max(2, m), degree + 1):
            d[o_c + m * nc1 + n] = C[n, m]
            d[o_s + m * nc1 + n] = S[n, m]
    # recursion factors for V_bar/W_bar up to degree+1 (Holmes & Featherstone 2002, eqs. 11-13)
    for m in range(n1):
        for n in range(m + 1, n1):
            d[o_a + m * n1 + n] = math.sqrt((2 * n - 1) * (2 * n + 1) / ((n - m) * (n + m)))
            if n >= m + 2:
                d[o_b + m * n1 + n] = math.sqrt((2 * n + 1) * (n + m - 1) * (n - m - 1)
                                                / ((n - m) * (n + m) * (2 * n - 3)))
    for m in range(1, n1):
        d[o_d + m] = math.sqrt(3.0) if m == 1 else math.sqrt((2 * m + 1) / (2 * m))
    # acceleration factors (module docstring: k1 / h1, h2, k3)
    for n in range(2, degree + 1):
        f = (2 * n + 1) / (2 * n + 3)
        for m in range(n + 1):
            if m == 0:
                k1 = math.sqrt(f * (n + 1) * (n + 2) / 2.0)
                k2 = 0.0
            else:
                k1 = 0.5 * math.sqrt(f * (n + m + 1) * (n + m + 2))
                k2 = 0.5 * math.sqrt(f * (n - m + 1) * (n - m + 2) * (2.0 if m == 1 else 1.0))
            d[o_k1 + m * nc1 + n] = k1
            d[o_k2 + m * nc1 + n] = k2
            d[o_k3 + m * nc1 + n] = math.sqrt(f * (n + m + 1) * (n - m + 1))
    return d


@njit
def _solid_harmonics(x, y, z, radius, nmax, mmax, d, ndeg):
    """Fill V_bar_nm, W_bar_nm [-] in d's scratch for 0 <= m <= mmax, m <= n <= nmax.

    ``ndeg`` is the field degree that fixed the layout (nmax <= ndeg + 1).  Module
    docstring: sectoral and column recursions (M&G eq. 3.30 normalised; H&F eqs. 11-13).
    """
    o_c, o_s, o_a, o_b, o_d, o_k1, o_k2, o_k3, o_v, o_w, size = _layout(ndeg)
    n1 = ndeg + 2
    r2 = x * x + y * y + z * z
    rho = radius / r2
    xs = x * rho
    ys = y * rho
    zs = z * rho
    rr = radius * rho
    v_mm = radius / math.sqrt(r2)
    w_mm = 0.0
    for m in range(mmax + 1):
        if m > 0:
            dm = d[o_d + m]
            v_new = dm * (xs * v_mm - ys * w_mm)
            w_mm = dm * (xs * w_mm + ys * v_mm)
            v_mm = v_new
        col = m * n1
        d[o_v + col + m] = v_mm
        d[o_w + col + m] = w_mm
        if m + 1 <= nmax:
            a = d[o_a + col + m + 1] * zs
            v1 = a * v_mm
            w1 = a * w_mm
            d[o_v + col + m + 1] = v1
            d[o_w + col + m + 1] = w1
            v0 = v_mm
            w0 = w_mm
            for n in range(m + 2, nmax + 1):
                a = d[o_a + col + n] * zs
                b = d[o_b + col + n] * rr
                v2 = a * v1 - b * v0
                w2 = a * w1 - b * w0
                d[o_v + col + n] = v2
                d[o_w + col + n] = w2
                v0 = v1
                w0 = w1
                v1 = v2
                w1 = w2


@njit
def potential_bodyfixed(x, y, z, gm, radius, degree, order, d):
    """Disturbing potential of degrees 2..degree, orders 0..order at body-fixed (x, y, z) [m].

    U = GM/R sum (C_bar V_bar + S_bar W_bar) [m^2/s^2] (M&G 2000 eq. 3.29, normalised).
    ``d`` from :func:`field_data` for this ``degree`` (its scratch part is overwritten).
    """
    _solid_harmonics(x, y, z, radius, degree, order, d, degree)
    o_c, o_s, o_a, o_b, o_d, o_k1, o_k2, o_k3, o_v, o_w, size = _layout(degree)
    nc1 = degree + 1
    n1 = degree + 2
    u = 0.0
    for m in range(order + 1):
        for n in range(max(2, m), degree + 1):
            u += d[o_c + m * nc1 + n] * d[o_v + m * n1 + n] + d[o_s + m * nc1 + n] * d[o_w + m * n1 + n]
    return gm / radius * u


@njit
def accel_bodyfixed(x, y, z, gm, radius, degree, order, d):
    """Acceleration (ax, ay, az) [m/s^2] of degrees 2..degree, orders 0..order at body-fixed (x, y, z) [m].

    Gradient of :func:`potential_bodyfixed` by M&G 2000 eq. 3.33 in normalised form (module
    docstring).  Valid everywhere outside the origin, poles included.  ``d`` from
    :func:`field_data` for this ``degree`` (its scratch part is overwritten).
    """
    _solid_harmonics(x, y, z, radius, degree + 1, order + 1, d, degree)
    o_c, o_s, o_a, o_b, o_d, o_k1, o_k2, o_k3, o_v, o_w, size = _layout(degree)
    nc1 = degree + 1
    n1 = degree + 2
    ax = 0.0
    ay = 0.0
    az = 0.0
    # m = 0 (zonal terms; S_bar_n0 = 0 and W_bar_n0 = 0)
    for n in range(2, degree + 1):
        c = d[o_c + n]
        k1 = d[o_k1 + n]
        ax -= k1 * c * d[o_v + n1 + n + 1]
        ay -= k1 * c * d[o_w + n1 + n + 1]
        az -= d[o_k3 + n] * c * d[o_v + n + 1]
    for m in range(1, order + 1):
        cm = m * nc1
        vm = o_v + m * n1
        wm = o_w + m * n1
        vp = vm + n1
        wp = wm + n1
        vq = vm - n1
        wq = wm - n1
        for n in range(max(2, m), degree + 1):
            c = d[o_c + cm + n]
            s = d[o_s + cm + n]
            h1 = d[o_k1 + cm + n]
            h2 = d[o_k2 + cm + n]
            k3 = d[o_k3 + cm + n]
            v_p = d[vp + n + 1]
            w_p = d[wp + n + 1]
            v_q = d[vq + n + 1]
            w_q = d[wq + n + 1]
            ax += -h1 * (c * v_p + s * w_p) + h2 * (c * v_q + s * w_q)
            ay += -h1 * (c * w_p - s * v_p) - h2 * (c * w_q - s * v_q)
            az -= k3 * (c * d[vm + n + 1] + s * d[wm + n + 1])
    f = gm / (radius * radius)
    return f * ax, f * ay, f * az
