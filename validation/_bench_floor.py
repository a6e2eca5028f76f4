"""A hand-fused numba DOP853 two-body loop: the speed floor for ``bench_integrators.py``.

Diagnostic only.  The same algorithm as longarc's stepping loop
(``propagator/integrators/stepper.py``) for the two-body problem, written as one
function with the point-mass acceleration inlined: DOP853 tableau from
``propagator.integrators.tableaus`` (Hairer, Norsett & Wanner, Solving ODEs I, 2nd ed.
1993, Sec. II.10), RMS error norm with the combined 5th/3rd-order estimate (HNW I
eq. II.4.11 and Sec. II.10), starting step of HNW I Sec. II.4 (p. 169), PI controller
h_new = h safety err^-alpha err_prev^beta (HNW II, 2nd ed. 1996, eq. IV.2.43) after a
start-up with the elementary controller aimed at the PI's steady error level, no growth
after a rejection, last step stretched by up to 1 % to land on t_end, compensated state
update (h k_0 exact by a fused multiply-add, h sum b_j (k_j - k_0) plus the weight
residual b_lo, TwoSum, low parts carried as in Kahan's summation) and Kahan-compensated
time (Kahan, Comm. ACM 8(1), 40, 1965).  When it takes the same number of
evaluations as longarc, the wall-time ratio is the cost of longarc's generality
(dispatch, environment, events, output handling), not of the method.

Units: m, m/s, s.  ``@njit(cache=True)``: a standalone function that calls no other
compiled function of the project (DEVELOPERS.md); ``fma`` is an intrinsic (inlined
LLVM instruction), not a compiled function.
"""

from __future__ import annotations

import functools
import math

import numpy as np
from numba import njit

from propagator.integrators.fma import fma


@njit(cache=True)
def _dop853_twobody(y0, t_end, gm, A, b, b_lo, j_lo, e5, e3, rtol, atol_pos, atol_vel, safety, fac_min,
                    fac_max, beta, ramp_end):
    s = 12
    n = 6
    atol = np.empty(n)
    for i in range(3):
        atol[i] = atol_pos
        atol[3 + i] = atol_vel
    K = np.zeros((s + 1, n))
    y = y0.copy()
    yn = np.empty(n)
    yt = np.empty(n)
    comp = np.zeros(n)
    compn = np.zeros(n)

    r2 = y[0] * y[0] + y[1] * y[1] + y[2] * y[2]
    q = -gm / (r2 * math.sqrt(r2))
    K[0, 0] = y[3]
    K[0, 1] = y[4]
    K[0, 2] = y[5]
    K[0, 3] = q * y[0]
    K[0, 4] = q * y[1]
    K[0, 5] = q * y[2]
    nfev = 1

    # starting step (HNW I p. 169)
    d0 = 0.0
    d1 = 0.0
    for i in range(n):
        sc = atol[i] + rtol * abs(y[i])
        d0 += (y[i] / sc) ** 2
        d1 += (K[0, i] / sc) ** 2
    d0 = math.sqrt(d0 / n)
    d1 = math.sqrt(d1 / n)
    h0 = 1e-6 if (d0 < 1e-5 or d1 < 1e-5) else 0.01 * d0 / d1
    h0 = min(h0, t_end)
    for i in range(n):
        yt[i] = y[i] + h0 * K[0, i]
    r2 = yt[0] * yt[0] + yt[1] * yt[1] + yt[2] * yt[2]
    q = -gm / (r2 * math.sqrt(r2))
    f1 = np.empty(n)
    f1[0] = yt[3]
    f1[1] = yt[4]
    f1[2] = yt[5]
    f1[3] = q * yt[0]
    f1[4] = q * yt[1]
    f1[5] = q * yt[2]
    nfev += 1
    d2 = 0.0
    for i in range(n):
        sc = atol[i] + rtol * abs(y[i])
        d2 += ((f1[i] - K[0, i]) / sc) ** 2
    d2 = math.sqrt(d2 / n) / h0
    dm = max(d1, d2)
    h1 = max(1e-6, h0 * 1e-3) if dm <= 1e-15 else (0.01 / dm) ** (1.0 / 8.0)
    h = min(100.0 * h0, h1, t_end)

    alpha = 1.0 / 8.0 - 0.75 * beta
    err_steady = safety ** (1.0 / (alpha - beta)) if alpha - beta > 0.02 else safety ** 8.0
    ramp = True
    err_prev = 1.0
    rejected = False
    t = 0.0
    tc = 0.0
    steps = 0
    while True:
        clamped = t + 1.01 * h - t_end >= 0.0
        if clamped:
            h = t_end - t + tc
        for j in range(1, s):
            for i in range(n):
                acc = 0.0
                for m in range(j):
                    acc += A[j, m] * K[m, i]
                yt[i] = y[i] + h * acc
            r2 = yt[0] * yt[0] + yt[1] * yt[1] + yt[2] * yt[2]
            q = -gm / (r2 * math.sqrt(r2))
            K[j, 0] = yt[3]
            K[j, 1] = yt[4]
            K[j, 2] = yt[5]
            K[j, 3] = q * yt[0]
            K[j, 4] = q * yt[1]
            K[j, 5] = q * yt[2]
        for i in range(n):
            k0 = K[0, i]
            acc = 0.0
            for j in range(1, s):
                if b[j] != 0.0:
                    acc += b[j] * (K[j, i] - k0)
            acc = acc + b_lo * (K[j_lo, i] - k0)
            p = h * k0
            e = fma(h, k0, -p)
            sm = y[i] + p
            bb = sm - y[i]
            e1 = (y[i] - (sm - bb)) + (p - bb)
            lo = (e1 + (e + h * acc)) - comp[i]
            ts = sm + lo
            compn[i] = (ts - sm) - lo
            yn[i] = ts
        r2 = yn[0] * yn[0] + yn[1] * yn[1] + yn[2] * yn[2]
        q = -gm / (r2 * math.sqrt(r2))
        K[s, 0] = yn[3]
        K[s, 1] = yn[4]
        K[s, 2] = yn[5]
        K[s, 3] = q * yn[0]
        K[s, 4] = q * yn[1]
        K[s, 5] = q * yn[2]
        nfev += s
        s5 = 0.0
        s3 = 0.0
        for i in range(n):
            inv_sc = 1.0 / (atol[i] + rtol * max(abs(y[i]), abs(yn[i])))
            v5 = 0.0
            v3 = 0.0
            for j in range(s + 1):
                v5 += e5[j] * K[j, i]
                v3 += e3[j] * K[j, i]
            s5 += (v5 * inv_sc) ** 2
            s3 += (v3 * inv_sc) ** 2
        den = s5 + 0.01 * s3
        err = 0.0 if den == 0.0 else abs(h) * s5 / math.sqrt(den * n)
        if err > 1.0:
            h = h * max(fac_min, safety * err ** (-1.0 / 8.0))
            rejected = True
            ramp = False
            continue
        steps += 1
        if clamped:
            t = t_end
        else:
            hk = h - tc
            tn = t + hk
            tc = (tn - t) - hk
            t = tn
        for i in range(n):
            y[i] = yn[i]
            comp[i] = compn[i]
            K[0, i] = K[s, i]
        if clamped:
            break
        if ramp:
            fac = (err_steady / max(err, 1e-10)) ** (1.0 / 8.0)
            ramp = err < ramp_end * err_steady
        else:
            fac = safety * max(err, 1e-10) ** (-alpha) * err_prev ** beta
        fac = min(fac_max, max(fac_min, fac))
        if rejected:
            fac = min(fac, 1.0)
        h = h * fac
        err_prev = max(err, 1e-4)
        rejected = False
    return y, nfev, steps


@functools.lru_cache(maxsize=1)
def _constants():
    """Tableau arrays, weight residual, default settings and start-up constant (once)."""
    from propagator.integrators.settings import IntegratorSettings
    from propagator.integrators.stepper import _RAMP_END_ERR
    from propagator.integrators.tableaus import get_tableau, rounding_residuals
    tab = get_tableau("dop853")
    b_lo = rounding_residuals(tab)
    j_lo = int(np.argmax(np.abs(b_lo)))
    f = np.ascontiguousarray
    return (f(tab.A), f(tab.b), float(b_lo[j_lo]), j_lo, f(tab.e), f(tab.e_aux), IntegratorSettings(),
            _RAMP_END_ERR)


def dop853_twobody(y0: np.ndarray, t_end: float, gm: float, rtol: float, atol_pos: float,
                   atol_vel: float) -> tuple[np.ndarray, int, int]:
    """Final state [m, m/s], evaluations and accepted steps of the hand-fused loop,
    controller constants as ``IntegratorSettings`` defaults (0.9, 0.2, 10, beta 0.04)."""
    A, b, b_lo, j_lo, e5, e3, st, ramp_end = _constants()
    y, nfev, steps = _dop853_twobody(np.ascontiguousarray(y0, dtype=np.float64), float(t_end), float(gm),
                                     A, b, b_lo, j_lo, e5, e3, rtol, atol_pos, atol_vel, st.safety,
                                     st.min_factor, st.max_factor, st.pi_beta, ramp_end)
    return y, int(nfev), int(steps)
