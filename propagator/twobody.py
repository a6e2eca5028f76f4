"""Analytic two-body (Keplerian) propagation with universal variables.

Method: the universal-variable formulation of Kepler's problem with Stumpff functions
c2, c3 and Lagrange f and g coefficients (Vallado, Fundamentals of Astrodynamics and
Applications, 4th ed. 2013, Algorithm 8 "KEPLER", section 2.3; Battin, An Introduction
to the Mathematics and Methods of Astrodynamics, rev. ed. 1999, chapter 4).  Valid for
elliptic, parabolic and hyperbolic motion.  Units: m, m/s, s, m^3/s^2.

With sigma0 = r0.v0/sqrt(gm), alpha = 2/r0 - v0^2/gm (= 1/a) and psi = alpha chi^2, the
universal anomaly chi [sqrt(m)] solves

    sqrt(gm) dt = chi^3 c3(psi) + sigma0 chi^2 c2(psi) + r0 chi (1 - psi c3(psi)),

whose derivative with respect to chi is r(chi) > 0, so the left side is monotonic in chi.
It is solved by Newton's method inside a bracket (bisection when a step leaves it), which
converges for every orbit type and time span.  Then

    f = 1 - chi^2 c2/r0,  g = dt - chi^3 c3/sqrt(gm),
    fdot = sqrt(gm) chi (psi c3 - 1)/(r r0),  gdot = 1 - chi^2 c2/r,
    r = f r0 + g v0,  v = fdot r0 + gdot v0.

Long arcs: for an ellipse dt is first reduced modulo the period T to |dt'| <= T/2.  The
period and the reduction dt - k T are evaluated in double-double arithmetic (Dekker,
"A floating-point technique for extending the available precision", Numer. Math. 18,
224-242, 1971; Hida, Li & Bailey, "Algorithms for quad-double precision floating point
arithmetic", ARITH-15, 2001), starting from the exact double-precision input state, so
the phase after many revolutions is not degraded by the rounding of alpha and T (with
plain doubles, a relative error of 1e-16 in a shifts the position along track by
3 pi N a 1e-16, i.e. ~25 micrometres after N = 1000 revolutions at GNSS altitude).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit
from numpy.typing import ArrayLike

from propagator.constants import GM_EARTH

__all__ = ["propagate_twobody", "twobody_nb", "stumpff_c2c3_nb"]

# 2 pi as an unevaluated sum hi + lo.  pi - fl(pi) = sin(fl(pi)) to within
# (pi - fl(pi))^3/6 ~ 3e-49 (Taylor series of sin about pi), and math.sin is accurate to
# < 1 ulp there, so lo is correct to ~1e-32 relative to 2 pi (checked in the tests
# against a 60-digit Machin-formula value of pi).
_TWO_PI_HI = 2.0 * math.pi
_TWO_PI_LO = 2.0 * math.sin(math.pi)


# ---- double-double arithmetic (Dekker 1971; Hida, Li & Bailey 2001) ---------------


@njit(cache=True)
def _two_sum(a, b):
    s = a + b
    bb = s - a
    err = (a - (s - bb)) + (b - bb)
    return s, err


@njit(cache=True)
def _quick_two_sum(a, b):
    s = a + b
    return s, b - (s - a)


@njit(cache=True)
def _split(a):
    c = 134217729.0 * a  # 2^27 + 1
    hi = c - (c - a)
    return hi, a - hi


@njit(cache=True)
def _two_prod(a, b):
    p = a * b
    ah, al = _split(a)
    bh, bl = _split(b)
    err = ((ah * bh - p) + ah * bl + al * bh) + al * bl
    return p, err


@njit(cache=True)
def _dd_add(ah, al, bh, bl):
    s, e = _two_sum(ah, bh)
    t, f = _two_sum(al, bl)
    e += t
    s, e = _quick_two_sum(s, e)
    e += f
    return _quick_two_sum(s, e)


@njit(cache=True)
def _dd_mul(ah, al, bh, bl):
    p, e = _two_prod(ah, bh)
    e += ah * bl + al * bh
    return _quick_two_sum(p, e)


@njit(cache=True)
def _dd_div(ah, al, bh, bl):
    q1 = ah / bh
    ph, pl = _dd_mul(q1, 0.0, bh, bl)
    rh, rl = _dd_add(ah, al, -ph, -pl)
    q2 = rh / bh
    ph, pl = _dd_mul(q2, 0.0, bh, bl)
    rh, rl = _dd_add(rh, rl, -ph, -pl)
    q3 = rh / bh
    q1, q2 = _quick_two_sum(q1, q2)
    return _dd_add(q1, q2, q3, 0.0)


@njit(cache=True)
def _dd_sqrt(ah, al):
    if ah <= 0.0:
        return 0.0, 0.0
    x = math.sqrt(ah)
    ph, pl = _two_prod(x, x)
    rh, rl = _dd_add(ah, al, -ph, -pl)
    return _quick_two_sum(x, rh / (2.0 * x))


@njit(cache=True)
def _dd_dot3(a, b):
    sh, sl = _two_prod(a[0], b[0])
    for j in range(1, 3):
        ph, pl = _two_prod(a[j], b[j])
        sh, sl = _dd_add(sh, sl, ph, pl)
    return sh, sl


@njit(cache=True)
def _reduce_dt(r0, v0, dt, gm):
    """dt reduced modulo the orbital period to |dt'| <= T/2 (ellipse), else dt unchanged.

    alpha = 2/|r0| - |v0|^2/gm, T = 2 pi / sqrt(gm alpha^3) and dt - k T, k = round(dt/T),
    are evaluated in double-double arithmetic.  Returns (dt', alpha) with alpha rounded
    to double.
    """
    r2h, r2l = _dd_dot3(r0, r0)
    rh, rl = _dd_sqrt(r2h, r2l)
    v2h, v2l = _dd_dot3(v0, v0)
    t1h, t1l = _dd_div(2.0, 0.0, rh, rl)
    t2h, t2l = _dd_div(v2h, v2l, gm, 0.0)
    ah, al = _dd_add(t1h, t1l, -t2h, -t2l)  # alpha = 1/a [1/m]
    if not ah > 0.0:
        return dt, ah
    a3h, a3l = _dd_mul(ah, al, ah, al)
    a3h, a3l = _dd_mul(a3h, a3l, ah, al)
    nh, nl = _dd_mul(a3h, a3l, gm, 0.0)
    nh, nl = _dd_sqrt(nh, nl)  # mean motion [rad/s]
    th, tl = _dd_div(_TWO_PI_HI, _TWO_PI_LO, nh, nl)  # period [s]
    k = math.floor(dt / th + 0.5)
    if k == 0.0:
        return dt, ah
    kth, ktl = _dd_mul(k, 0.0, th, tl)
    dh, dl = _dd_add(dt, 0.0, -kth, -ktl)
    return dh + dl, ah


# ---- Stumpff functions and the universal Kepler equation ---------------------------

_N_SERIES = 16
_C2_SERIES = np.array([1.0 / math.factorial(2 * k + 2) for k in range(_N_SERIES)])
_C3_SERIES = np.array([1.0 / math.factorial(2 * k + 3) for k in range(_N_SERIES)])


@njit(cache=True)
def stumpff_c2c3_nb(psi):
    """Stumpff functions c2(psi) = (1 - cos sqrt(psi))/psi, c3 = (sqrt(psi) - sin sqrt(psi))/sqrt(psi)^3.

    Vallado 2013, Algorithm 1 (with the hyperbolic forms for psi < 0).  For |psi| < 4
    the power series c2 = sum (-psi)^k/(2k+2)!, c3 = sum (-psi)^k/(2k+3)! (16 terms,
    truncation < 1e-25) avoids the cancellation of the closed forms; otherwise
    c2 = 2 sin^2(x/2)/psi (x = sqrt(psi)) resp. 2 sinh^2(x/2)/(-psi) (x = sqrt(-psi)).
    """
    if abs(psi) < 4.0:
        # Horner evaluation of both series, highest order first
        c2 = 0.0
        c3 = 0.0
        for k in range(_N_SERIES - 1, -1, -1):
            c2 = c2 * (-psi) + _C2_SERIES[k]
            c3 = c3 * (-psi) + _C3_SERIES[k]
        return c2, c3
    if psi > 0.0:
        x = math.sqrt(psi)
        s = math.sin(0.5 * x)
        return 2.0 * s * s / psi, (x - math.sin(x)) / (psi * x)
    x = math.sqrt(-psi)
    s = math.sinh(0.5 * x)
    return 2.0 * s * s / (-psi), (math.sinh(x) - x) / (-psi * x)


@njit(cache=True)
def _universal_time(chi, alpha, r0, sigma0):
    """(sqrt(gm) t(chi), r(chi)) of the universal Kepler equation (Vallado 2013, section 2.3)."""
    chi2 = chi * chi
    psi = alpha * chi2
    c2, c3 = stumpff_c2c3_nb(psi)
    t = chi2 * chi * c3 + sigma0 * chi2 * c2 + r0 * chi * (1.0 - psi * c3)
    r = chi2 * c2 + sigma0 * chi * (1.0 - psi * c3) + r0 * (1.0 - psi * c2)
    return t, r


@njit(cache=True)
def _starter(target, dt, alpha, r0, sigma0, gm):
    """Initial universal anomaly (Vallado 2013, Algorithm 8); same sign as dt, non-zero."""
    chi = 0.0
    if alpha > 1.0e-14 / r0:  # ellipse: chi ~ sqrt(gm) dt alpha
        chi = target * alpha
    elif alpha < -1.0e-14 / r0:  # hyperbola
        a = 1.0 / alpha
        sdt = 1.0 if dt > 0.0 else -1.0
        den = sigma0 * math.sqrt(gm) + sdt * math.sqrt(-gm * a) * (1.0 - r0 * alpha)
        arg = -2.0 * gm * alpha * dt / den
        if arg > 0.0 and arg < math.inf:
            chi = sdt * math.sqrt(-a) * math.log(arg)
    if not (chi * target > 0.0 and abs(chi) < math.inf):
        chi = target / r0
    return chi


@njit(cache=True)
def twobody_nb(r0v, v0v, dt, gm, r_out, v_out):
    """Two-body state at t0 + dt from (r0 [m], v0 [m/s]) at t0; writes r_out, v_out.

    Universal variables (module docstring); dt [s] may be negative; elliptic dt is
    reduced modulo the period in double-double arithmetic first.
    """
    if dt == 0.0:
        for j in range(3):
            r_out[j] = r0v[j]
            v_out[j] = v0v[j]
        return
    dtr, alpha = _reduce_dt(r0v, v0v, dt, gm)
    sqmu = math.sqrt(gm)
    r0 = math.sqrt(r0v[0] * r0v[0] + r0v[1] * r0v[1] + r0v[2] * r0v[2])
    sigma0 = (r0v[0] * v0v[0] + r0v[1] * v0v[1] + r0v[2] * v0v[2]) / sqmu
    target = sqmu * dtr
    chi = _starter(target, dtr, alpha, r0, sigma0, gm)
    # bracket [lo, hi] with t(lo) <= target <= t(hi); t(0) = 0 and t is increasing
    t0, _r = _universal_time(chi, alpha, r0, sigma0)
    if target > 0.0:
        if t0 >= target or not (t0 == t0):
            lo, hi = 0.0, chi
        else:
            lo, hi = chi, 2.0 * chi
            for _ in range(2000):
                th, _r = _universal_time(hi, alpha, r0, sigma0)
                if th >= target or not (th == th):
                    break
                lo = hi
                hi *= 2.0
    else:
        if t0 <= target or not (t0 == t0):
            lo, hi = chi, 0.0
        else:
            lo, hi = 2.0 * chi, chi
            for _ in range(2000):
                tl, _r = _universal_time(lo, alpha, r0, sigma0)
                if tl <= target or not (tl == tl):
                    break
                hi = lo
                lo *= 2.0
    chi = 0.5 * (lo + hi)
    # safeguarded Newton (Press et al., Numerical Recipes, 3rd ed. 2007, section 9.4,
    # "rtsafe"): bisect when the Newton step leaves the bracket or does not halve the
    # previous step, so the bracket at least halves every two iterations
    dxold = hi - lo
    dx = dxold
    for _ in range(300):
        t, rr = _universal_time(chi, alpha, r0, sigma0)
        f = t - target
        if f == 0.0:
            break
        if f > 0.0:
            hi = chi
        else:
            lo = chi
        if (not (((chi - hi) * rr - f) * ((chi - lo) * rr - f) < 0.0)) or abs(2.0 * f) > abs(dxold * rr):
            dxold = dx
            dx = 0.5 * (hi - lo)
            chi = lo + dx
        else:
            dxold = dx
            dx = f / rr
            chi = chi - dx
        if abs(dx) <= 1.0e-15 * abs(chi) or hi - lo <= 4.0e-16 * abs(chi):
            break
    t, rr = _universal_time(chi, alpha, r0, sigma0)
    chi2 = chi * chi
    psi = alpha * chi2
    c2, c3 = stumpff_c2c3_nb(psi)
    f = 1.0 - chi2 * c2 / r0
    g = dtr - chi2 * chi * c3 / sqmu
    gdot = 1.0 - chi2 * c2 / rr
    fdot = sqmu * chi * (psi * c3 - 1.0) / (rr * r0)
    for j in range(3):
        r_out[j] = f * r0v[j] + g * v0v[j]
        v_out[j] = fdot * r0v[j] + gdot * v0v[j]


@njit(cache=True)
def _twobody_loop(r0v, v0v, dts, gm, rs, vs):
    for j in range(dts.size):
        twobody_nb(r0v, v0v, dts[j], gm, rs[j], vs[j])


def propagate_twobody(
    r0: ArrayLike, v0: ArrayLike, dt: ArrayLike, gm: float = GM_EARTH
) -> tuple[np.ndarray, np.ndarray]:
    """Two-body position [m] and velocity [m/s] at t0 + dt from r0, v0 at t0.

    ``r0``, ``v0``: shape (3,); ``dt`` [s]: scalar or array of any shape.  Returns
    ``(r, v)`` of shape ``np.shape(dt) + (3,)``.  Elliptic, parabolic and hyperbolic
    orbits; universal variables with Stumpff functions (Vallado 2013, Algorithm 8;
    Battin 1999, chapter 4), period reduction in double-double arithmetic (see module
    docstring).  Raises ValueError for non-finite input, |r0| = 0 or gm <= 0.
    """
    gm = float(gm)
    if not (math.isfinite(gm) and gm > 0.0):
        raise ValueError(f"gm={gm!r} m^3/s^2: expected a finite positive gravitational parameter")
    r0a = np.ascontiguousarray(r0, dtype=np.float64)
    v0a = np.ascontiguousarray(v0, dtype=np.float64)
    for name, arr in (("r0", r0a), ("v0", v0a)):
        if arr.shape != (3,):
            raise ValueError(f"{name}: expected shape (3,), got {arr.shape}")
        if not np.all(np.isfinite(arr)):
            raise ValueError(f"{name}={arr.tolist()}: expected finite values")
    if not np.any(r0a):
        raise ValueError(f"r0={r0a.tolist()} m is zero: expected |r0| > 0")
    dta = np.asarray(dt, dtype=np.float64)
    if not np.all(np.isfinite(dta)):
        raise ValueError(f"dt={float(dta[~np.isfinite(dta)].flat[0])!r} s: expected finite time offsets")
    flat = np.ascontiguousarray(dta).ravel()
    rs = np.empty((flat.size, 3))
    vs = np.empty((flat.size, 3))
    _twobody_loop(r0a, v0a, flat, gm, rs, vs)
    shape = dta.shape + (3,)
    return rs.reshape(shape), vs.reshape(shape)
