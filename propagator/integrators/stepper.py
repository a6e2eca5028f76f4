"""The one adaptive explicit Runge-Kutta stepping loop (template of the composed module).

This file is not used as an ordinary module: :mod:`forcemodels.compose` copies its text
into the generated module, where the globals ``accel_total``, ``partials_total``,
``env_fill`` and ``model_accel`` exist (see DEVELOPERS.md, "Compiled code and the numba
cache").  It may be imported normally for its integer constants only.

Method (all from E. Hairer, S. P. Norsett, G. Wanner, *Solving Ordinary Differential
Equations I*, 2nd ed., Springer 1993, "HNW I"):

* embedded explicit Runge-Kutta pairs given as coefficient tables (``tableaus.py``);
* local error ``err = ||h sum e_i k_i / sc||`` with ``sc_i = atol_i + rtol max(|y_i|,
  |y_new_i|)`` (HNW I eq. II.4.10, RMS norm II.4.11, or the max norm), absolute
  tolerances for position [m] and velocity [m/s] separately; variational components
  excluded unless asked; DOP853 combines its 5th- and 3rd-order estimates as in HNW's
  code (Sec. II.10);
* PI step-size control h_new = h fac err_n^(-alpha) err_{n-1}^beta,
  alpha = 1/k - 0.75 beta, k = error order + 1 (HNW II, 2nd ed. 1996, eq. IV.2.43 and
  the recommendation beta ~ 0.04 of HNW I Sec. II.4 / code DOPRI5), safety factor,
  growth/shrink limits, no growth right after a rejection; from the first step until
  the error estimate first comes near the PI controller's steady level, the
  elementary controller (HNW I eq. II.4.13) lets the step grow (``_RAMP_END_ERR``);
* initial step by HNW I Sec. II.4 ("Starting step size", p. 169);
* steps never shortened by output times: dense output (continuous extensions of the
  tableau) gives states at requested times; the last step lands exactly on t_end
  (stretched by up to 1 %, as in HNW's codes);
* compensated arithmetic of y_{n+1} = y_n + h sum b_i k_i (the sum relative to k_0,
  the product h k_0 exact by a fused multiply-add, the update by TwoSum with the low
  parts carried as in Kahan's summation) and Kahan summation of t_{n+1} = t_n + h
  (W. Kahan, "Further remarks on reducing truncation errors", Comm. ACM 8(1), 40,
  1965), plus the rounding residual of the tableau's weights (the first two order
  conditions restored, ``tableaus.rounding_residuals``).  Measured on 7-day two-body
  MEO (validation/bench_integrators.py): round-off floor of fixed-step runs
  5.6e-7 - 6.9e-7 m (two runs) against 9.6e-6 m in plain double; the residual alone
  removes a drift of ~1.2e-5 m proportional to the step (tests/test_integrators.py);
* events located on the dense output with Brent's method (R. P. Brent, *Algorithms
  for Minimization without Derivatives*, Prentice-Hall 1973, ch. 4; the loop follows
  the structure of scipy's ``brentq``), tolerance 1e-10 s; a "restart" event makes the
  integrator discard the step that crossed it, redo it with h landing exactly on the
  event time, and continue from there with fresh stages and controller memory (for
  force models with a kink there, e.g. SRP at shadow boundaries; f itself is continuous,
  so f(t_event) is reused as the first stage).  A step across such a kink usually fails
  the error test; when a rejected step (error estimate < ``_KINK_ERR_MAX``) shows a
  restart event's sign change, the event is located on that step's dense output and
  the next attempt lands there, instead of shrinking the step until one passes (the
  kink, not the step size, caused the error).  Measured on P4 of
  validation/bench_integrators.py: evaluations -15 %, rejections 110 -> 53, the same
  final error against a max-step-30-s reference (2.2 mm vs 3.3 mm at rtol 1e-13),
  located times equal to the accepted-step location within 1e-9 s;
* variational equations Phi' = A Phi, S' = A S + [0; da/dp] with A = [[0, I],
  [da/dr, da/dv]] integrated with the state (Montenbruck & Gill, *Satellite Orbits*,
  2000, Sec. 7.2).

State layout y = [r (3), v (3), Phi (6x6 row-major), S (6 x ns row-major)], SI units,
t in seconds since the case epoch (TT).
"""

import math

import numpy as np
from numba import njit

from forcemodels.environment import ENV_SUN
from forcemodels.shadow import shadow_boundaries_nb
from propagator.integrators.fma import fma


def _hot_options():
    """numba options of the allocation-free hot functions: no NRT reference counting.

    Every array argument otherwise costs an atomic increment/decrement pair per call
    (measured ~8 ns each on the 2-core test machine; 350 -> 127 ns per point-mass
    evaluation in a 30-day run, results bit-identical).  ``_nrt`` is a numba target
    option; where a numba version lacks it, plain ``cache=True`` is used.
    """
    try:
        from numba.core.options import DefaultOptions
    except ImportError:  # pragma: no cover
        return {"cache": True}
    return {"cache": True, "_nrt": False} if hasattr(DefaultOptions, "_nrt") else {"cache": True}


_HOT = _hot_options()
_HOT_INLINE = dict(_HOT, inline="always")

# ---- status codes -----------------------------------------------------------------------
STATUS_OK = 0
STATUS_MAX_STEPS = 1
STATUS_STEP_TOO_SMALL = 2
STATUS_EVENT_STOP = 3
STATUS_NONFINITE = 4
STATUS_MESSAGES = {
    STATUS_OK: "reached the end time",
    STATUS_MAX_STEPS: "stopped: maximum number of steps reached",
    STATUS_STEP_TOO_SMALL: "stopped: step size fell below the minimum",
    STATUS_EVENT_STOP: "stopped by a terminal event",
    STATUS_NONFINITE: "stopped: non-finite state or derivative",
}

# ---- tableau integers (tab) ---------------------------------------------------------------
TAB_STAGES = 0
TAB_TOTAL = 1
TAB_ERR_ORDER = 2
TAB_ERR_KIND = 3
TAB_DENSE_DEG = 4
N_TAB = 5

# ---- float controls (ctl) ------------------------------------------------------------------
CTL_RTOL = 0
CTL_ATOL_POS = 1
CTL_ATOL_VEL = 2
CTL_ATOL_VAR = 3
CTL_SAFETY = 4
CTL_FAC_MIN = 5
CTL_FAC_MAX = 6
CTL_BETA = 7
CTL_H_FIRST = 8
CTL_H_MAX = 9
CTL_H_MIN = 10
CTL_H_FIXED = 11
N_CTL = 12

# ---- integer options (opt) -----------------------------------------------------------------
OPT_MAX_STEPS = 0
OPT_FIXED = 1
OPT_NORM = 2          # 0 RMS, 1 max
OPT_KAHAN = 3         # 1 compensated summation
OPT_NSENS = 4         # number of sensitivity parameters (columns of S)
OPT_ERR_VAR = 5       # 1: variational components in the error norm
OPT_OUT_MODE = 6
N_OPT = 7

NORM_RMS = 0
NORM_MAX = 1
OUT_GRID = 0          # states at the given times (dense output)
OUT_STEPS = 1         # states at every accepted step (and t0)
OUT_FINAL = 2         # nothing but the final state (returned separately)

# ---- events --------------------------------------------------------------------------------
EV_NODE = 0           # g = z (GCRF); rising = ascending node
EV_APSIS = 1          # g = r.v; rising = periapsis, falling = apoapsis
EV_RADIUS = 2         # g = |r| - param (geocentric radius threshold [m])
EV_PENUMBRA = 3       # g = shadow_boundaries_nb out[0]: > 0 sunlit; falling = penumbra entry
EV_UMBRA = 4          # g = shadow_boundaries_nb out[1]: < 0 umbra; falling = umbra entry
EVI_KIND = 0
EVI_DIR = 1           # +1 rising only, -1 falling only, 0 both
EVI_TERMINAL = 2
EVI_RESTART = 3
N_EVI = 4

# ---- statistics ----------------------------------------------------------------------------
STAT_NFEV = 0
STAT_ACCEPTED = 1
STAT_REJECTED = 2
STAT_H_MIN = 3
STAT_H_MAX = 4
STAT_DENSE = 5        # steps that needed the dense-output stages
STAT_RESTARTS = 6     # steps discarded to land on a restart event
N_STAT = 7

_EPS = 2.220446049250313e-16


@njit(**_HOT_INLINE)
def rhs(t, y, dy, forces, ns, acc, dadr, dadv, dadp):
    """dy/dt for y = [r, v, Phi, S]: [v, a, A Phi, A S + (0; da/dp)] (SI units).

    The body of ``accel_total`` (env_fill, then every model's acceleration) is written
    out here and inlined into the callers, so a point-mass evaluation is not two nested
    calls passing the 12-array ``forces`` tuple by value.
    """
    r = y[0:3]
    v = y[3:6]
    env_fill(t, forces)
    acc[0] = 0.0
    acc[1] = 0.0
    acc[2] = 0.0
    for m in range(forces[0].shape[0]):
        model_accel(m, t, r, v, forces, acc)
    dy[0] = y[3]
    dy[1] = y[4]
    dy[2] = y[5]
    dy[3] = acc[0]
    dy[4] = acc[1]
    dy[5] = acc[2]
    if y.shape[0] > 6:
        _rhs_variational(t, y, dy, forces, ns, dadr, dadv, dadp)


@njit(**_HOT)
def _rhs_variational(t, y, dy, forces, ns, dadr, dadv, dadp):
    """Phi' = A Phi, S' = A S + (0; da/dp) part of ``rhs`` (Montenbruck & Gill 2000, Sec. 7.2)."""
    r = y[0:3]
    v = y[3:6]
    partials_total(t, r, v, forces, dadr, dadv, dadp)
    # Phi block: rows 0-2 are d r / d y0, rows 3-5 d v / d y0
    for j in range(6):
        for i in range(3):
            dy[6 + i * 6 + j] = y[6 + (i + 3) * 6 + j]
        for i in range(3):
            s = 0.0
            for k in range(3):
                s += dadr[i, k] * y[6 + k * 6 + j] + dadv[i, k] * y[6 + (k + 3) * 6 + j]
            dy[6 + (i + 3) * 6 + j] = s
    base = 42
    for j in range(ns):
        for i in range(3):
            dy[base + i * ns + j] = y[base + (i + 3) * ns + j]
        for i in range(3):
            s = dadp[i, j]
            for k in range(3):
                s += dadr[i, k] * y[base + k * ns + j] + dadv[i, k] * y[base + (k + 3) * ns + j]
            dy[base + (i + 3) * ns + j] = s


@njit(**_HOT_INLINE)
def _all_finite(x):
    for i in range(x.shape[0]):
        if not math.isfinite(x[i]):
            return False
    return True


@njit(**_HOT)
def _scaled_rms(x, y, atol, rtol, n):
    s = 0.0
    for i in range(n):
        q = x[i] / (atol[i] + rtol * abs(y[i]))
        s += q * q
    return math.sqrt(s / n)


@njit(**_HOT)
def _initial_step(t0, y0, f0, direction, span, h_max, err_order, atol, rtol, n_err,
                  forces, ns, ytmp, f1, acc, dadr, dadv, dadp):
    """Starting step size, HNW I Sec. II.4 (p. 169); returns (|h|, evaluations used)."""
    d0 = _scaled_rms(y0, y0, atol, rtol, n_err)
    d1 = _scaled_rms(f0, y0, atol, rtol, n_err)
    if d0 < 1e-5 or d1 < 1e-5:
        h0 = 1e-6
    else:
        h0 = 0.01 * d0 / d1
    h0 = min(h0, span, h_max)
    for i in range(y0.shape[0]):
        ytmp[i] = y0[i] + direction * h0 * f0[i]
    rhs(t0 + direction * h0, ytmp, f1, forces, ns, acc, dadr, dadv, dadp)
    for i in range(y0.shape[0]):
        f1[i] = f1[i] - f0[i]
    d2 = _scaled_rms(f1, y0, atol, rtol, n_err) / h0
    dm = max(d1, d2)
    if dm <= 1e-15:
        h1 = max(1e-6, h0 * 1e-3)
    else:
        h1 = (0.01 / dm) ** (1.0 / (err_order + 1.0))
    return min(100.0 * h0, h1, h_max, span), 1


@njit(**_HOT_INLINE)
def _combine(w, K, coef, nk, n):
    """w[i] = sum_j coef[j] K[j, i], j = 0 .. nk-1 summed in this order, i < n.

    The loop over i is innermost (vectorisable, independent sums); a separate branch for
    the 6-component state lets the compiler unroll it.
    """
    if n == 6:
        w0 = 0.0
        w1 = 0.0
        w2 = 0.0
        w3 = 0.0
        w4 = 0.0
        w5 = 0.0
        for j in range(nk):
            cj = coef[j]
            if cj == 0.0:               # e.g. DOP853 weights of stages 1-4
                continue
            w0 += cj * K[j, 0]
            w1 += cj * K[j, 1]
            w2 += cj * K[j, 2]
            w3 += cj * K[j, 3]
            w4 += cj * K[j, 4]
            w5 += cj * K[j, 5]
        w[0] = w0
        w[1] = w1
        w[2] = w2
        w[3] = w3
        w[4] = w4
        w[5] = w5
    else:
        for i in range(n):
            w[i] = 0.0
        for j in range(nk):
            cj = coef[j]
            for i in range(n):
                w[i] += cj * K[j, i]


@njit(**_HOT)
def _error_norm(K, e, e_aux, err_kind, h, y, ynew, atol, rtol, n_err, ns1, norm_kind, w5, w3):
    """Scaled local error estimate (<= 1 accepts); HNW I eq. II.4.10/11 and Sec. II.10.

    w5, w3: work arrays (>= n_err).
    """
    s5 = 0.0
    s3 = 0.0
    m5 = 0.0
    m3 = 0.0
    _combine(w5, K, e, ns1, n_err)
    if err_kind == 1:
        _combine(w3, K, e_aux, ns1, n_err)
    for i in range(n_err):
        inv_sc = 1.0 / (atol[i] + rtol * max(abs(y[i]), abs(ynew[i])))
        v5 = w5[i] * inv_sc
        s5 += v5 * v5
        m5 = max(m5, abs(v5))
        if err_kind == 1:
            v3 = w3[i] * inv_sc
            s3 += v3 * v3
            m3 = max(m3, abs(v3))
    ah = abs(h)
    if err_kind == 1:
        if norm_kind == NORM_MAX:
            den = m5 * m5 + 0.01 * m3 * m3
            return 0.0 if den == 0.0 else ah * m5 * m5 / math.sqrt(den)
        den = s5 + 0.01 * s3
        return 0.0 if den == 0.0 else ah * s5 / math.sqrt(den * n_err)
    if norm_kind == NORM_MAX:
        return ah * m5
    return ah * math.sqrt(s5 / n_err)


@njit(**_HOT_INLINE)
def _stage_state(j, h, y, K, A, ytmp, ny):
    """ytmp = y + h sum_{m<j} A[j, m] K[m] (the sum in the order m = 0, 1, ...)."""
    if ny == 6:
        s0 = 0.0
        s1 = 0.0
        s2 = 0.0
        s3 = 0.0
        s4 = 0.0
        s5 = 0.0
        for m in range(j):
            a = A[j, m]
            s0 += a * K[m, 0]
            s1 += a * K[m, 1]
            s2 += a * K[m, 2]
            s3 += a * K[m, 3]
            s4 += a * K[m, 4]
            s5 += a * K[m, 5]
        ytmp[0] = y[0] + h * s0
        ytmp[1] = y[1] + h * s1
        ytmp[2] = y[2] + h * s2
        ytmp[3] = y[3] + h * s3
        ytmp[4] = y[4] + h * s4
        ytmp[5] = y[5] + h * s5
    else:
        for i in range(ny):
            ytmp[i] = 0.0
        for m in range(j):
            a = A[j, m]
            for i in range(ny):
                ytmp[i] += a * K[m, i]
        for i in range(ny):
            ytmp[i] = y[i] + h * ytmp[i]


@njit(**_HOT)
def _dense_prepare(t, h, y, K, A, c, P, s, nt, deg, forces, ns, ytmp, Q, acc, dadr, dadv, dadp):
    """Evaluate the dense-output stages s+1.. and the coefficients Q (deg x ny).

    y(t + theta h) = y + h sum_m Q[m] theta^(m+1).  Returns the evaluations used.
    """
    ny = y.shape[0]
    for j in range(s + 1, nt):
        _stage_state(j, h, y, K, A, ytmp, ny)
        rhs(t + c[j] * h, ytmp, K[j], forces, ns, acc, dadr, dadv, dadp)
    for m in range(deg):
        for i in range(ny):
            q = 0.0
            for j in range(nt):
                q += P[j, m] * K[j, i]
            Q[m, i] = q
    return nt - s - 1


@njit(**_HOT)
def _dense_eval(theta, h, y, Q, deg, n, out):
    """out[:n] = y(t + theta h) from the coefficients of ``_dense_prepare`` (Horner)."""
    for i in range(n):
        p = Q[deg - 1, i]
        for m in range(deg - 2, -1, -1):
            p = Q[m, i] + theta * p
        out[i] = y[i] + h * theta * p


@njit(**_HOT)
def _event_value(kind, t, y, param, forces, sh):
    """Event function g(t, y) of one event kind (see EV_* constants)."""
    if kind >= EV_PENUMBRA:
        env_fill(t, forces)
    return _event_value_env(kind, y, param, forces, sh)


@njit(**_HOT)
def _event_value_env(kind, y, param, forces, sh):
    """``_event_value`` with forces[8] (env) already filled at the event time."""
    if kind == EV_NODE:
        return y[2]
    if kind == EV_APSIS:
        return y[0] * y[3] + y[1] * y[4] + y[2] * y[5]
    if kind == EV_RADIUS:
        return math.sqrt(y[0] * y[0] + y[1] * y[1] + y[2] * y[2]) - param
    env = forces[8]
    shadow_boundaries_nb(y[0:3], env[ENV_SUN:ENV_SUN + 3], sh)
    if kind == EV_PENUMBRA:
        return sh[0]
    return sh[1]


@njit(**_HOT)
def _g_dense(theta, kind, param, t, h, y, Q, deg, forces, ytmp, sh):
    _dense_eval(theta, h, y, Q, deg, min(6, y.shape[0]), ytmp)
    return _event_value(kind, t + theta * h, ytmp, param, forces, sh)


@njit(**_HOT)
def _locate(kind, param, t, h, y, Q, deg, forces, ytmp, sh, g0, g1, xtol):
    """Root theta in [0, 1] of g on the dense output, g(0)=g0, g(1)=g1 of opposite signs.

    Brent (1973) ch. 4, in the form of scipy's ``brentq``; |error| < xtol (in theta).
    """
    xpre = 0.0
    xcur = 1.0
    fpre = g0
    fcur = g1
    if fpre == 0.0:
        return xpre
    if fcur == 0.0:
        return xcur
    xblk = 0.0
    fblk = 0.0
    spre = 0.0
    scur = 0.0
    for _ in range(200):
        if fpre != 0.0 and fcur != 0.0 and ((fpre < 0.0) != (fcur < 0.0)):
            xblk = xpre
            fblk = fpre
            spre = xcur - xpre
            scur = spre
        if abs(fblk) < abs(fcur):
            xpre = xcur
            xcur = xblk
            xblk = xpre
            fpre = fcur
            fcur = fblk
            fblk = fpre
        delta = 0.5 * (xtol + 4.0 * _EPS * abs(xcur))
        sbis = 0.5 * (xblk - xcur)
        if fcur == 0.0 or abs(sbis) < delta:
            return xcur
        if abs(spre) > delta and abs(fcur) < abs(fpre):
            if xpre == xblk:
                stry = -fcur * (xcur - xpre) / (fcur - fpre)
            else:
                dpre = (fpre - fcur) / (xpre - xcur)
                dblk = (fblk - fcur) / (xblk - xcur)
                stry = -fcur * (fblk * dblk - fpre * dpre) / (dblk * dpre * (fblk - fpre))
            if 2.0 * abs(stry) < min(abs(spre), 3.0 * abs(sbis) - delta):
                spre = scur
                scur = stry
            else:
                spre = sbis
                scur = sbis
        else:
            spre = sbis
            scur = sbis
        xpre = xcur
        fpre = fcur
        if abs(scur) > delta:
            xcur += scur
        else:
            xcur += delta if sbis > 0.0 else -delta
        fcur = _g_dense(xcur, kind, param, t, h, y, Q, deg, forces, ytmp, sh)
    return xcur


@njit(cache=True)
def _grow_f1(a, n_new):
    out = np.empty(n_new)
    for i in range(a.shape[0]):
        out[i] = a[i]
    return out


@njit(cache=True)
def _grow_i1(a, n_new):
    out = np.empty(n_new, dtype=np.int64)
    for i in range(a.shape[0]):
        out[i] = a[i]
    return out


@njit(cache=True)
def _grow_f2(a, n_new):
    out = np.empty((n_new, a.shape[1]))
    for i in range(a.shape[0]):
        for j in range(a.shape[1]):
            out[i, j] = a[i, j]
    return out


@njit(**_HOT_INLINE)
def _set_row(dst, row, src, n):
    for i in range(n):
        dst[row, i] = src[i]


@njit(**_HOT_INLINE)
def _combine_from_first(w, K, b, j_lo, b_lo, s, n):
    """w[i] = sum_{j=1}^{s-1} b[j] (K[j, i] - K[0, i]) + b_lo (K[j_lo, i] - K[0, i]), i < n.

    The step increment ``sum_j b_j k_j`` written as ``k_0 + sum_j b_j (k_j - k_0)``
    (exact when sum b = 1): the differences are ~h/T of the stage values, so the
    rounding of this sum is that much smaller than that of the plain weighted sum.
    ``b_lo`` on stage ``j_lo`` (c = 1) restores sum b c = 1/2 (``tableaus.rounding_residuals``).
    Loop order and unrolling as in :func:`_combine`.
    """
    if n == 6:
        k0 = K[0]
        w0 = 0.0
        w1 = 0.0
        w2 = 0.0
        w3 = 0.0
        w4 = 0.0
        w5 = 0.0
        for j in range(1, s):
            bj = b[j]
            if bj == 0.0:               # DOP853: stages 1-4 carry no weight
                continue
            kj = K[j]
            w0 += bj * (kj[0] - k0[0])
            w1 += bj * (kj[1] - k0[1])
            w2 += bj * (kj[2] - k0[2])
            w3 += bj * (kj[3] - k0[3])
            w4 += bj * (kj[4] - k0[4])
            w5 += bj * (kj[5] - k0[5])
        kl = K[j_lo]
        w[0] = w0 + b_lo * (kl[0] - k0[0])
        w[1] = w1 + b_lo * (kl[1] - k0[1])
        w[2] = w2 + b_lo * (kl[2] - k0[2])
        w[3] = w3 + b_lo * (kl[3] - k0[3])
        w[4] = w4 + b_lo * (kl[4] - k0[4])
        w[5] = w5 + b_lo * (kl[5] - k0[5])
    else:
        for i in range(n):
            w[i] = b_lo * (K[j_lo, i] - K[0, i])
        for j in range(1, s):
            bj = b[j]
            for i in range(n):
                w[i] += bj * (K[j, i] - K[0, i])


@njit(**_HOT)
def _rk_solution(t, h, y, comp, K, A, c, b, j_lo, b_lo, s, kahan, forces, ns, ytmp, ynew, compnew,
                 acc, dadr, dadv, dadp, w):
    """Stages 1..s-1 (stage 0 = K[0] given) and y_new = y + h sum b_j k_j.

    Compensated (``kahan``): the increment is ``h k_0 + h sum_j b_j (k_j - k_0)
    + h b_lo (k_{j_lo} - k_0)``, with the product ``h k_0`` split exactly into a double
    and its rounding error (one fused multiply-add, "2MultFMA": J.-M. Muller et al.,
    *Handbook of Floating-Point Arithmetic*, 2nd ed. 2018, Sec. 4.2), the sum with y by
    Knuth's TwoSum (D. E. Knuth, *The Art of Computer Programming* 2, 3rd ed. 1998,
    Sec. 4.2.2), and the remaining low parts carried in ``comp`` (true state = y - comp)
    as in Kahan's summation (W. Kahan, Comm. ACM 8(1), 40, 1965).

    j_lo, b_lo: the rounding residual of the weights, one weight on stage j_lo
    (``tableaus.rounding_residuals``; 0 to leave it out).  With it the step satisfies
    sum b = 1 (by the form k_0 + ...) and sum b c~ = 1/2 (c~: row sums of the stored A)
    to ~1e-32 instead of ~1e-16; those residuals act the same way in every step, so
    without them the final error carries a drift proportional to the step size
    (~1.2e-5 m over 7 days of two-body MEO at 350-420 s steps, tests/test_integrators.py).
    w: work array (>= ny).

    Plain (not ``kahan``): y + h sum_j b_j k_j in ordinary floating point.
    """
    ny = y.shape[0]
    for j in range(1, s):
        _stage_state(j, h, y, K, A, ytmp, ny)
        rhs(t + c[j] * h, ytmp, K[j], forces, ns, acc, dadr, dadv, dadp)
    if not kahan:
        _combine(ynew, K, b, s, ny)
        for i in range(ny):
            ynew[i] = y[i] + h * ynew[i]
            compnew[i] = 0.0
        return
    _combine_from_first(w, K, b, j_lo, b_lo, s, ny)
    if ny == 6:
        for i in range(6):              # constant trip count: unrolled by the compiler
            _compensated_update(i, h, y, comp, K, w, ynew, compnew)
    else:
        for i in range(ny):
            _compensated_update(i, h, y, comp, K, w, ynew, compnew)


@njit(**_HOT_INLINE)
def _compensated_update(i, h, y, comp, K, w, ynew, compnew):
    """ynew[i] - compnew[i] = (y[i] - comp[i]) + h K[0, i] + h w[i], the product and the
    sum with y exact (FMA product error, TwoSum), the rest carried in compnew."""
    k0 = K[0, i]
    p = h * k0
    e = fma(h, k0, -p)                  # p + e = h k0 exactly
    yi = y[i]
    sm = yi + p                         # sm + e1 = y + p exactly (TwoSum)
    bb = sm - yi
    e1 = (yi - (sm - bb)) + (p - bb)
    lo = (e1 + (e + h * w[i])) - comp[i]
    t2 = sm + lo
    compnew[i] = (t2 - sm) - lo
    ynew[i] = t2


_RAMP_END_ERR = 0.1
"""Start-up phase of the step-size controller: from the first step until the scaled
error estimate first reaches this fraction of the PI controller's steady level
``err_s = safety^(1/(alpha - beta))`` (0.15 for DOP853 with beta = 0.04), or a step is
rejected, the step grows by the elementary controller ``(err_s / err)^(1/k)`` (HNW I eq.
II.4.13 with its target set to err_s; up to ``max_factor`` per step), which lands on
err_s in one step where the error behaves as h^k; PI control follows.  The PI
controller damps growth (exponent 1/k - 1.75 beta instead of 1/k, and the factor
err_prev^beta), which is what it is for once the step is near its working size, but
from a starting step 1e3-1e4 times too small it took ~12 steps to get there instead of
~5 (our choice; measured in tests/test_integrators.py)."""


_KINK_ERR_MAX = 1e4
"""Largest error estimate of a rejected step still used to locate a kink inside it: its
dense output is then within ~1e4 tolerances, i.e. the event time within ~1e-7 s at GNSS
radius and tight tolerances (our choice; measured in tests/test_integrators.py)."""


@njit(**_HOT_INLINE)
def _wanted_crossing(g0, g1, h, want):
    """A sign change of g over a step of signed length h in a requested sense (want: +1
    rising, -1 falling, 0 both; in physical time), as in :func:`_find_events`."""
    up = g0 < 0.0 and g1 >= 0.0
    down = g0 > 0.0 and g1 <= 0.0
    rising = up if h > 0.0 else down
    falling = down if h > 0.0 else up
    return (rising and want >= 0) or (falling and want <= 0)


@njit(**_HOT)
def _restart_crossed(ynew, h, ev_int, ev_par, forces, sh, g_old, g_new, skip_k):
    """True if a restart (non-terminal) event function changes sign over a rejected step
    (env already filled at its end); fills g_new[k] of the restart events."""
    found = False
    for k in range(ev_int.shape[0]):
        if k == skip_k or ev_int[k, EVI_RESTART] == 0 or ev_int[k, EVI_TERMINAL] != 0:
            continue
        g_new[k] = _event_value_env(ev_int[k, EVI_KIND], ynew, ev_par[k], forces, sh)
        if _wanted_crossing(g_old[k], g_new[k], h, ev_int[k, EVI_DIR]):
            found = True
    return found


@njit(**_HOT)
def _find_events(t, h, t_new, y, ynew, K, A, c, P, s, nt, deg, forces, ns, ytmp, Q,
                 acc, dadr, dadv, dadp, ev_int, ev_par, g_old, g_new, skip_k, sh,
                 f_t, f_k, f_d, f_th, stats):
    """Sign changes of the event functions over (t, t_new], located and sorted by time.

    The crossing sense (f_d = +1 rising, -1 falling) refers to physical time, so an
    ascending node is ascending in backward runs too.  Returns (number found, dense
    output prepared).  Call right after the evaluation of f(t_new, ynew): the event
    functions at t_new reuse the environment (forces[8]) it filled.
    """
    dense_ready = False
    n_found = 0
    for k in range(ev_int.shape[0]):
        g_new[k] = _event_value_env(ev_int[k, EVI_KIND], ynew, ev_par[k], forces, sh)
    for k in range(ev_int.shape[0]):
        if k == skip_k:
            continue
        if not _wanted_crossing(g_old[k], g_new[k], h, ev_int[k, EVI_DIR]):
            continue
        rising = (g_old[k] < 0.0) == (h > 0.0)      # crossing sense in physical time
        if not dense_ready:
            stats[STAT_NFEV] += _dense_prepare(t, h, y, K, A, c, P, s, nt, deg, forces, ns,
                                               ytmp, Q, acc, dadr, dadv, dadp)
            stats[STAT_DENSE] += 1
            dense_ready = True
        th = _locate(ev_int[k, EVI_KIND], ev_par[k], t, h, y, Q, deg, forces, ytmp, sh,
                     g_old[k], g_new[k], 1e-10 / abs(h))
        p = n_found
        while p > 0 and f_th[p - 1] > th:
            f_th[p] = f_th[p - 1]
            f_k[p] = f_k[p - 1]
            f_d[p] = f_d[p - 1]
            f_t[p] = f_t[p - 1]
            p -= 1
        f_th[p] = th
        f_k[p] = k
        f_d[p] = 1 if rising else -1
        f_t[p] = t_new if th >= 1.0 else t + th * h
        n_found += 1
    return n_found, dense_ready


# ---- loop state kept between re-entries of _steps (lsf: float64, lsi: int64) ------------
LSF_T = 0             # current time [s]
LSF_TC = 1            # Kahan compensation of t
LSF_H_ABS = 2         # proposed |h| [s]
LSF_ERR_PREV = 3      # previous accepted error (PI controller)
LSF_T_STOP = 4        # time of the pending restart event
LSF_STOP_G = 5        # its event function beyond the crossing
LSF_DIR = 6           # +1 forward, -1 backward
N_LSF = 7
LSI_STATUS = 0
LSI_STEPS = 1         # steps attempted
LSI_NONFINITE = 2     # consecutive non-finite attempts
LSI_REJECTED = 3      # 1: last attempt rejected
LSI_STOP_K = 4        # pending restart event index, -1 none
LSI_STOP_D = 5        # its crossing sense
LSI_IO = 6            # next output time index (OUT_GRID)
LSI_NOUT = 7          # outputs written
LSI_NEVT = 8          # events recorded
LSI_RAMP = 9          # 1: start-up phase (elementary controller, see _RAMP_END_ERR)
N_LSI = 10

RUN_DONE = 0          # _steps finished (end time, terminal event or failure)
RUN_GROW_OUT = 1      # _steps needs a larger output buffer
RUN_GROW_EV = 2       # _steps needs a larger event buffer


@njit(cache=True)
def integrate(t0, y0, t_end, forces, A, c, b, b_lo, e, e_aux, P, tab, ctl, opt, out_times, ev_int, ev_par):
    """Integrate y' = rhs(t, y) from t0 to t_end (either direction).

    Arguments (SI units, t in s since the case epoch):
        y0: float64[ny], ny = 6, or 6 + 36 + 6 ns with variational equations.
        forces: tuple from ``forcemodels.compose.build_forces``.
        A, c, b, e, e_aux, P: arrays of a ``tableaus.Tableau``; b_lo: the rounding
            residual of its weights (``tableaus.rounding_residuals``, zeros to leave it
            out); tab: int64[N_TAB].
        ctl: float64[N_CTL] (tolerances, controller, step limits); opt: int64[N_OPT].
        out_times: sorted output times (OUT_GRID mode), in the direction of integration.
        ev_int: int64[n_ev, N_EVI] (kind, direction, terminal, restart); ev_par: float64[n_ev].

    Returns (status, t_final, y_final, out_t, out_y, n_out, ev_t, ev_index, ev_dir, ev_y,
    n_events, stats).

    This function allocates the work and output arrays, makes the first evaluation and
    the starting step; the steps themselves run in :func:`_steps`, compiled without
    reference counting (module docstring of ``forcemodels.compose``, "Speed"), which
    returns here only when an output or event buffer must grow.
    """
    s = tab[TAB_STAGES]
    nt = tab[TAB_TOTAL]
    err_order = tab[TAB_ERR_ORDER]
    deg = tab[TAB_DENSE_DEG]
    ny = y0.shape[0]
    ns = opt[OPT_NSENS]
    rtol = ctl[CTL_RTOL]
    h_max = ctl[CTL_H_MAX]
    out_mode = opt[OPT_OUT_MODE]
    n_err = ny if opt[OPT_ERR_VAR] != 0 else 6
    direction = 1.0 if t_end >= t0 else -1.0
    n_ev = ev_int.shape[0]
    n_grid = out_times.shape[0]

    atol = np.empty(ny)
    for i in range(ny):
        atol[i] = ctl[CTL_ATOL_VAR]
    for i in range(3):
        atol[i] = ctl[CTL_ATOL_POS]
        atol[3 + i] = ctl[CTL_ATOL_VEL]

    K = np.zeros((nt, ny))
    y = y0.copy()
    ynew = np.empty(ny)
    comp = np.zeros(ny)
    compnew = np.zeros(ny)
    ytmp = np.empty(ny)
    ydense = np.empty(ny)
    w5 = np.empty(ny)
    w3 = np.empty(ny)
    Q = np.zeros((deg, ny))
    acc = np.zeros(3)
    dadr = np.zeros((3, 3))
    dadv = np.zeros((3, 3))
    dadp = np.zeros((3, max(ns, 1)))
    sh = np.zeros(2)
    stats = np.zeros(N_STAT)
    stats[STAT_H_MIN] = np.inf

    cap = n_grid if out_mode == OUT_GRID else (1024 if out_mode == OUT_STEPS else 0)
    out_t = np.empty(cap)
    out_y = np.empty((cap, ny))
    n_out = 0
    io = 0
    ev_cap = 16
    ev_t = np.empty(ev_cap)
    ev_k = np.empty(ev_cap, dtype=np.int64)
    ev_d = np.empty(ev_cap, dtype=np.int64)
    ev_y = np.empty((ev_cap, 6))
    g_old = np.zeros(n_ev)
    g_new = np.zeros(n_ev)
    f_t = np.empty(max(n_ev, 1))
    f_k = np.empty(max(n_ev, 1), dtype=np.int64)
    f_d = np.empty(max(n_ev, 1), dtype=np.int64)
    f_th = np.empty(max(n_ev, 1))

    t = t0
    status = STATUS_OK
    _rhs_call(t, y, K[0], forces, ns, acc, dadr, dadv, dadp)
    stats[STAT_NFEV] += 1
    for k in range(n_ev):
        g_old[k] = _event_value(ev_int[k, EVI_KIND], t, y, ev_par[k], forces, sh)
    if out_mode == OUT_GRID:
        while io < n_grid and direction * (out_times[io] - t0) <= 0.0:
            out_t[n_out] = out_times[io]
            _set_row(out_y, n_out, y, ny)
            n_out += 1
            io += 1
    elif out_mode == OUT_STEPS:
        out_t[n_out] = t0
        _set_row(out_y, n_out, y, ny)
        n_out += 1

    if not (_all_finite(K[0]) and _all_finite(y)):
        status = STATUS_NONFINITE
        span = 0.0
    else:
        span = abs(t_end - t0)
    h_abs = 0.0
    if span > 0.0:
        if opt[OPT_FIXED] != 0:
            h_abs = ctl[CTL_H_FIXED]
        elif ctl[CTL_H_FIRST] > 0.0:
            h_abs = min(ctl[CTL_H_FIRST], h_max)
        else:
            h_abs, nf = _initial_step(t0, y, K[0], direction, span, h_max, err_order, atol, rtol, n_err,
                                      forces, ns, ytmp, ydense, acc, dadr, dadv, dadp)
            stats[STAT_NFEV] += nf

    lsf = np.zeros(N_LSF)
    lsi = np.zeros(N_LSI, dtype=np.int64)
    lsf[LSF_T] = t
    lsf[LSF_H_ABS] = h_abs
    lsf[LSF_ERR_PREV] = 1.0
    lsf[LSF_DIR] = direction
    lsi[LSI_STATUS] = status
    lsi[LSI_STOP_K] = -1
    lsi[LSI_IO] = io
    lsi[LSI_NOUT] = n_out
    lsi[LSI_RAMP] = 1
    if span > 0.0:
        while True:
            code = _steps(t_end, forces, A, c, b, b_lo, e, e_aux, P, tab, ctl, opt, out_times, ev_int, ev_par,
                          atol, K, y, ynew, comp, compnew, ytmp, ydense, w5, w3, Q, acc, dadr, dadv, dadp,
                          sh, stats, out_t, out_y, ev_t, ev_k, ev_d, ev_y, g_old, g_new, f_t, f_k, f_d,
                          f_th, lsf, lsi)
            if code == RUN_GROW_OUT:
                cap = 2 * out_t.shape[0]
                out_t = _grow_f1(out_t, cap)
                out_y = _grow_f2(out_y, cap)
            elif code == RUN_GROW_EV:
                ev_cap = 2 * (lsi[LSI_NEVT] + n_ev + 1)
                ev_t = _grow_f1(ev_t, ev_cap)
                ev_k = _grow_i1(ev_k, ev_cap)
                ev_d = _grow_i1(ev_d, ev_cap)
                ev_y = _grow_f2(ev_y, ev_cap)
            else:
                break
    return (lsi[LSI_STATUS], lsf[LSF_T], y, out_t, out_y, lsi[LSI_NOUT], ev_t, ev_k, ev_d, ev_y,
            lsi[LSI_NEVT], stats)


@njit(**_HOT)
def _rhs_call(t, y, dy, forces, ns, acc, dadr, dadv, dadp):
    """``rhs`` as a real call (for the reference-counted ``integrate``)."""
    rhs(t, y, dy, forces, ns, acc, dadr, dadv, dadp)


@njit(**_HOT)
def _steps(t_end, forces, A, c, b, b_lo, e, e_aux, P, tab, ctl, opt, out_times, ev_int, ev_par,
           atol, K, y, ynew, comp, compnew, ytmp, ydense, w5, w3, Q, acc, dadr, dadv, dadp,
           sh, stats, out_t, out_y, ev_t, ev_k, ev_d, ev_y, g_old, g_new, f_t, f_k, f_d,
           f_th, lsf, lsi):
    """The stepping loop of :func:`integrate` (allocation-free, no reference counting).

    Runs from the state in (lsf, lsi, y, K[0], comp, g_old) until the end time, a
    terminal event or a failure (returns RUN_DONE), or until the output (RUN_GROW_OUT) or
    event buffer (RUN_GROW_EV) might overflow in the next step; the loop state is saved
    in (lsf, lsi) so that the caller can grow the buffer and call again.
    """
    s = tab[TAB_STAGES]
    nt = tab[TAB_TOTAL]
    err_order = tab[TAB_ERR_ORDER]
    err_kind = tab[TAB_ERR_KIND]
    deg = tab[TAB_DENSE_DEG]
    ny = y.shape[0]
    ns = opt[OPT_NSENS]
    rtol = ctl[CTL_RTOL]
    safety = ctl[CTL_SAFETY]
    fac_min = ctl[CTL_FAC_MIN]
    fac_max = ctl[CTL_FAC_MAX]
    beta = ctl[CTL_BETA]
    h_max = ctl[CTL_H_MAX]
    h_min = ctl[CTL_H_MIN]
    fixed = opt[OPT_FIXED] != 0
    kahan = opt[OPT_KAHAN] != 0
    norm_kind = opt[OPT_NORM]
    out_mode = opt[OPT_OUT_MODE]
    max_steps = opt[OPT_MAX_STEPS]
    n_err = ny if opt[OPT_ERR_VAR] != 0 else 6
    alpha = 1.0 / (err_order + 1.0) - 0.75 * beta
    # error level at which the PI controller keeps the step constant:
    # safety err^(beta - alpha) = 1 (with no such level: that of the elementary controller)
    if alpha - beta > 0.02:
        err_steady = safety ** (1.0 / (alpha - beta))
    else:
        err_steady = safety ** (err_order + 1.0)
    n_ev = ev_int.shape[0]
    n_grid = out_times.shape[0]
    n6 = min(ny, 6)         # position + velocity (not a literal: one compiled version of callees)
    j_lo = 1                # the one stage carrying a weight residual (see _combine_from_first)
    for j in range(1, s):
        if abs(b_lo[j]) > abs(b_lo[j_lo]):
            j_lo = j
    b_lo_val = b_lo[j_lo]

    t = lsf[LSF_T]
    tc = lsf[LSF_TC]
    h_abs = lsf[LSF_H_ABS]
    err_prev = lsf[LSF_ERR_PREV]
    t_stop = lsf[LSF_T_STOP]
    stop_g = lsf[LSF_STOP_G]
    direction = lsf[LSF_DIR]
    status = lsi[LSI_STATUS]
    n_steps = lsi[LSI_STEPS]
    nonfinite_streak = lsi[LSI_NONFINITE]
    rejected_last = lsi[LSI_REJECTED] != 0
    ramp = lsi[LSI_RAMP] != 0
    stop_k = lsi[LSI_STOP_K]
    stop_d = lsi[LSI_STOP_D]
    io = lsi[LSI_IO]
    n_out = lsi[LSI_NOUT]
    n_evt = lsi[LSI_NEVT]
    code = RUN_DONE

    while True:
        if out_mode == OUT_STEPS and n_out >= out_t.shape[0]:
            code = RUN_GROW_OUT
            break
        if n_ev > 0 and n_evt + n_ev + 1 > ev_t.shape[0]:
            code = RUN_GROW_EV
            break
        if n_steps >= max_steps:
            status = STATUS_MAX_STEPS
            break
        if h_abs < max(h_min, 10.0 * _EPS * abs(t)):
            status = STATUS_NONFINITE if nonfinite_streak > 0 else STATUS_STEP_TOO_SMALL
            break
        # a pending restart event: land exactly on t_stop first
        target = t_stop if stop_k >= 0 else t_end
        h = direction * h_abs
        clamped = direction * (t + 1.01 * h - target) >= 0.0
        if clamped:
            h = target - t
            if kahan:
                h += tc                     # the compensated time is t - tc: land on target exactly

        _rk_solution(t, h, y, comp, K, A, c, b, j_lo, b_lo_val, s, kahan, forces, ns, ytmp, ynew, compnew,
                     acc, dadr, dadv, dadp, w3)
        skip_kink = stop_k if (clamped and stop_k >= 0) else n_ev
        if clamped:
            t_new = target
            tc_new = 0.0
        elif kahan:
            hk = h - tc
            t_new = t + hk
            tc_new = (t_new - t) - hk
        else:
            t_new = t + h
            tc_new = 0.0
        rhs(t_new, ynew, K[s], forces, ns, acc, dadr, dadv, dadp)
        stats[STAT_NFEV] += s
        n_steps += 1

        err = 0.0
        if not fixed:
            err = _error_norm(K, e, e_aux, err_kind, h, y, ynew, atol, rtol, n_err, s + 1, norm_kind, w5, w3)
        if not (_all_finite(ynew) and _all_finite(K[s]) and math.isfinite(err)):
            nonfinite_streak += 1
            stats[STAT_REJECTED] += 1
            if fixed or nonfinite_streak > 20:
                status = STATUS_NONFINITE
                break
            h_abs = abs(h) * fac_min
            rejected_last = True
            continue
        nonfinite_streak = 0
        if err > 1.0:
            if n_ev > 0 and err < _KINK_ERR_MAX and _restart_crossed(ynew, h, ev_int, ev_par, forces, sh,
                                                                   g_old, g_new, skip_kink):
                # A restart event (a kink of f) lies inside this rejected step: the error
                # is the kink's, not the step size's.  Locate the earliest such event on
                # the dense output of this step and land there (module docstring).
                stats[STAT_NFEV] += _dense_prepare(t, h, y, K, A, c, P, s, nt, deg, forces, ns,
                                                   ytmp, Q, acc, dadr, dadv, dadp)
                stats[STAT_DENSE] += 1
                k_kink = -1
                th_kink = 2.0
                for k in range(n_ev):
                    if (k == skip_kink or ev_int[k, EVI_RESTART] == 0 or ev_int[k, EVI_TERMINAL] != 0
                            or not _wanted_crossing(g_old[k], g_new[k], h, ev_int[k, EVI_DIR])):
                        continue
                    th = _locate(ev_int[k, EVI_KIND], ev_par[k], t, h, y, Q, deg, forces, ytmp,
                                 sh, g_old[k], g_new[k], 1e-10 / abs(h))
                    if th < th_kink:
                        th_kink = th
                        k_kink = k
                stats[STAT_REJECTED] += 1
                stats[STAT_RESTARTS] += 1
                stop_k = k_kink
                t_stop = t + th_kink * h
                stop_g = g_new[k_kink]
                stop_d = 1 if (g_old[k_kink] < 0.0) == (h > 0.0) else -1     # as in _find_events
                h_abs = abs(h)              # after landing: this step size (then controlled)
                rejected_last = True
                continue
            stats[STAT_REJECTED] += 1
            h_abs = abs(h) * max(fac_min, safety * err ** (-1.0 / (err_order + 1.0)))
            rejected_last = True
            ramp = False
            continue

        # ---- events in (t, t_new]
        landing = clamped and stop_k >= 0
        n_found = 0
        dense_ready = False
        skip_k = stop_k if landing else n_ev
        if n_ev > 0:
            n_found, dense_ready = _find_events(t, h, t_new, y, ynew, K, A, c, P, s, nt, deg, forces, ns,
                                                ytmp, Q, acc, dadr, dadv, dadp, ev_int, ev_par, g_old,
                                                g_new, skip_k, sh, f_t, f_k, f_d, f_th,
                                                stats)
        cut = -1
        for p in range(n_found):
            if ev_int[f_k[p], EVI_TERMINAL] != 0 or ev_int[f_k[p], EVI_RESTART] != 0:
                cut = p
                break
        terminal = cut >= 0 and ev_int[f_k[cut], EVI_TERMINAL] != 0
        if cut >= 0 and not terminal and f_th[cut] < 1.0:
            # restart event inside the step: discard it, land on the event, then fresh stages
            stop_k = f_k[cut]
            t_stop = f_t[cut]
            stop_g = g_new[stop_k]
            stop_d = f_d[cut]
            stats[STAT_RESTARTS] += 1
            h_abs = abs(h)
            continue
        n_rec = cut + 1 if terminal else n_found
        th_last = f_th[cut] if terminal else 1.0
        t_last = f_t[cut] if terminal else t_new

        # ---- accepted step
        stats[STAT_ACCEPTED] += 1
        if not clamped:
            stats[STAT_H_MIN] = min(stats[STAT_H_MIN], abs(h))
        stats[STAT_H_MAX] = max(stats[STAT_H_MAX], abs(h))
        n_add = n_rec + (1 if landing and not terminal else 0)
        for p in range(n_add):          # capacity checked at the top of the loop
            if p < n_rec:
                ev_t[n_evt] = f_t[p]
                ev_k[n_evt] = f_k[p]
                ev_d[n_evt] = f_d[p]
                if f_th[p] >= 1.0:
                    _set_row(ev_y, n_evt, ynew, n6)
                else:
                    _dense_eval(f_th[p], h, y, Q, deg, n6, ydense)
                    _set_row(ev_y, n_evt, ydense, n6)
            else:
                ev_t[n_evt] = t_new
                ev_k[n_evt] = stop_k
                ev_d[n_evt] = stop_d
                _set_row(ev_y, n_evt, ynew, n6)
            n_evt += 1

        # ---- outputs in (t, t_last]
        if out_mode == OUT_GRID:
            while io < n_grid and direction * (out_times[io] - t_last) <= 0.0:
                out_t[n_out] = out_times[io]
                if out_times[io] == t_new:
                    _set_row(out_y, n_out, ynew, ny)
                else:
                    if not dense_ready:
                        stats[STAT_NFEV] += _dense_prepare(t, h, y, K, A, c, P, s, nt, deg, forces, ns,
                                                           ytmp, Q, acc, dadr, dadv, dadp)
                        stats[STAT_DENSE] += 1
                        dense_ready = True
                    _dense_eval((out_times[io] - t) / h, h, y, Q, deg, ny, ydense)
                    _set_row(out_y, n_out, ydense, ny)
                n_out += 1
                io += 1
        if th_last < 1.0:
            _dense_eval(th_last, h, y, Q, deg, ny, ynew)     # terminal event inside the step
        if out_mode == OUT_STEPS:                             # capacity checked at the top
            out_t[n_out] = t_last
            _set_row(out_y, n_out, ynew, ny)
            n_out += 1

        # ---- advance
        t = t_last
        tc = tc_new
        for i in range(ny):
            y[i] = ynew[i]
            comp[i] = compnew[i]
            K[0, i] = K[s, i]
        if terminal:
            status = STATUS_EVENT_STOP
            break
        for k in range(n_ev):
            g_old[k] = g_new[k]
        if landing:
            g_old[stop_k] = stop_g          # the sign beyond the crossing
            stop_k = -1
            err_prev = 1.0
            rejected_last = False
            continue                        # keep the step size proposed before landing
        if clamped:
            status = STATUS_OK              # landed on t_end
            break
        if fixed:
            h_abs = ctl[CTL_H_FIXED]
        else:
            if ramp:
                # start-up: elementary controller aimed at the PI controller's steady
                # error level (see _RAMP_END_ERR), then PI control
                fac = (err_steady / max(err, 1e-10)) ** (1.0 / (err_order + 1.0))
                ramp = err < _RAMP_END_ERR * err_steady
            else:
                fac = safety * max(err, 1e-10) ** (-alpha) * err_prev ** beta
            fac = min(fac_max, max(fac_min, fac))
            if rejected_last:
                fac = min(fac, 1.0)
            h_abs = min(abs(h) * fac, h_max)
            err_prev = max(err, 1e-4)
        rejected_last = False

    lsf[LSF_T] = t
    lsf[LSF_TC] = tc
    lsf[LSF_H_ABS] = h_abs
    lsf[LSF_ERR_PREV] = err_prev
    lsf[LSF_T_STOP] = t_stop
    lsf[LSF_STOP_G] = stop_g
    lsi[LSI_STATUS] = status
    lsi[LSI_STEPS] = n_steps
    lsi[LSI_NONFINITE] = nonfinite_streak
    lsi[LSI_REJECTED] = 1 if rejected_last else 0
    lsi[LSI_RAMP] = 1 if ramp else 0
    lsi[LSI_STOP_K] = stop_k
    lsi[LSI_STOP_D] = stop_d
    lsi[LSI_IO] = io
    lsi[LSI_NOUT] = n_out
    lsi[LSI_NEVT] = n_evt
    return code


@njit(cache=True)
def model_accelerations(times, states, forces, out):
    """out[i, m, :] = acceleration [m/s^2] of model m at (times[i], states[i, :6])."""
    n_models = forces[0].shape[0]
    acc = np.zeros(3)
    r = np.empty(3)
    v = np.empty(3)
    for i in range(times.shape[0]):
        env_fill(times[i], forces)
        for j in range(3):
            r[j] = states[i, j]
            v[j] = states[i, 3 + j]
        for m in range(n_models):
            acc[0] = 0.0
            acc[1] = 0.0
            acc[2] = 0.0
            model_accel(m, times[i], r, v, forces, acc)
            out[i, m, 0] = acc[0]
            out[i, m, 1] = acc[1]
            out[i, m, 2] = acc[2]
