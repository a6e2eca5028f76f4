"""Runge-Kutta tableaus and the compiled stepping loop.

References used below:
* order conditions: Butcher's rooted-tree conditions sum_i b_i Phi_i(t) = 1/gamma(t)
  (Hairer, Norsett & Wanner, Solving ODEs I, 2nd ed. 1993, Sec. II.2, Theorem 2.13);
  continuous extensions: the same with theta^|t|/gamma(t) (HNW I, Sec. II.6);
* DOP853 coefficients: scipy ``scipy/integrate/_ivp/dop853_coefficients.py`` (test-only
  cross-check of the transcription);
* two-body reference: the analytic Kepler solution (Kepler's equation solved by Newton
  iteration to machine precision, here in the test; e.g. Montenbruck & Gill, Satellite
  Orbits, 2000, Sec. 2.2).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
import pytest

from propagator.constants import GM_EARTH
from propagator.integrators.settings import EventSpec, IntegratorSettings, OutputGrid
from propagator.integrators.tableaus import METHODS
from propagator.propagate import propagate

# --------------------------------------------------------------------------------------
# rooted trees and elementary weights (HNW I, Sec. II.2)
# --------------------------------------------------------------------------------------


def _size(t: tuple) -> int:
    return 1 + sum(_size(ch) for ch in t)


@lru_cache(None)
def trees(n: int) -> list[tuple]:
    """All rooted trees with n vertices; a tree is the sorted tuple of its subtrees."""
    if n == 1:
        return [()]
    found = set()

    def forests(m, maxkey):
        if m == 0:
            yield ()
            return
        for k in range(1, m + 1):
            for t in trees(k):
                key = (k, t)
                if maxkey is None or key <= maxkey:
                    for rest in forests(m - k, key):
                        yield (t,) + rest

    for f in forests(n - 1, None):
        found.add(tuple(sorted(f, key=lambda t: (_size(t), t))))
    return sorted(found, key=str)


def gamma(t: tuple) -> int:
    g = _size(t)
    for ch in t:
        g *= gamma(ch)
    return g


def stage_weights(A: np.ndarray, t: tuple, cache: dict) -> np.ndarray:
    """Phi_i(t) for every stage i: product over subtrees of A @ Phi(subtree)."""
    if t not in cache:
        v = np.ones(A.shape[0])
        for ch in t:
            v = v * (A @ stage_weights(A, ch, cache))
        cache[t] = v
    return cache[t]


def order_residual(A: np.ndarray, w: np.ndarray, n: int) -> float:
    """max over trees of order n of |w . Phi(t) - 1/gamma(t)|."""
    cache: dict = {}
    return max(abs(w @ stage_weights(A, t, cache) - 1.0 / gamma(t)) for t in trees(n))


def test_tree_counts():
    # number of rooted trees with n vertices: 1, 1, 2, 4, 9, 20, 48, 115 (HNW I, Table II.2.1)
    assert [len(trees(n)) for n in range(1, 9)] == [1, 1, 2, 4, 9, 20, 48, 115]


@pytest.mark.parametrize("name", sorted(METHODS))
def test_row_sums(name):
    tab = METHODS[name]
    assert np.max(np.abs(tab.A.sum(axis=1) - tab.c)) < 1e-14
    assert np.all(np.triu(tab.A) == 0.0)              # explicit
    np.testing.assert_array_equal(tab.A[tab.n_stages, :tab.n_stages], tab.b)


@pytest.mark.parametrize("name", sorted(METHODS))
def test_order_conditions(name):
    """Solution of order p exactly (all trees <= p), not p+1; embedded solution of its order."""
    tab = METHODS[name]
    s = tab.n_stages
    A = tab.A[:s + 1, :s + 1]
    b = np.append(tab.b, 0.0)
    for n in range(1, tab.order + 1):
        assert order_residual(A, b, n) < 1e-14, (name, n)
    assert order_residual(A, b, tab.order + 1) > 1e-7
    # embedded solution over stages 0..s (s = f(t+h, y_new)).  DOP853: e is its 5th-order
    # estimate; the combination with the 3rd-order one behaves like h^8 (error_order 7).
    embedded = 5 if name == "dop853" else tab.error_order
    bhat = b - tab.e
    for n in range(1, embedded + 1):
        assert order_residual(A, bhat, n) < 1e-14, (name, n)
    assert order_residual(A, bhat, embedded + 1) > 1e-7
    if name == "dop853":                              # the 3rd-order estimator of DOP853
        bhat3 = b - tab.e_aux
        assert max(order_residual(A, bhat3, n) for n in (1, 2, 3)) < 1e-14
        assert order_residual(A, bhat3, 4) > 1e-7


def test_rk87_bushy_conditions():
    """The conditions named in the issue: sum b_i c_i^k = 1/(k+1), k <= 7 (8th-order b)."""
    tab = METHODS["rk87"]
    c = tab.c[:tab.n_stages]
    for k in range(8):
        assert abs(tab.b @ c ** k - 1.0 / (k + 1)) < 1e-15
    # (the quadrature itself is exact for k = 8 too; order 9 fails on other trees,
    # see test_order_conditions)
    assert abs(tab.b.sum() - 1.0) < 1e-15


def test_dop853_matches_scipy():
    """Transcription check against scipy's copy of Hairer's DOP853 coefficients."""
    from scipy.integrate._ivp import dop853_coefficients as ref
    tab = METHODS["dop853"]
    np.testing.assert_array_equal(tab.A, ref.A)
    np.testing.assert_array_equal(tab.c, ref.C)
    np.testing.assert_array_equal(tab.b, ref.B)
    np.testing.assert_array_equal(tab.e, ref.E5)
    np.testing.assert_allclose(tab.e_aux, ref.E3, rtol=0, atol=1e-17)


def dense_weights(P: np.ndarray, theta: float) -> np.ndarray:
    return P @ theta ** np.arange(1, P.shape[1] + 1)


@pytest.mark.parametrize("name", sorted(METHODS))
def test_dense_output_order_and_continuity(name):
    """Continuous order conditions sum b_i(theta) Phi_i(t) = theta^|t|/gamma(t) (HNW I II.6)."""
    tab = METHODS[name]
    s, n = tab.n_stages, tab.n_total
    cache: dict = {}
    worst = 0.0
    worst_next = 0.0
    for theta in np.linspace(0.0, 1.0, 11):
        w = dense_weights(tab.P, theta)
        for k in range(1, tab.dense_order + 1):
            for t in trees(k):
                worst = max(worst, abs(w @ stage_weights(tab.A, t, cache) - theta ** k / gamma(t)))
        for t in trees(tab.dense_order + 1):
            worst_next = max(worst_next, abs(w @ stage_weights(tab.A, t, cache) - theta ** (tab.dense_order + 1) / gamma(t)))
    assert worst < 1e-12, worst
    assert worst_next > 1e-7
    # y(1) = y_{n+1}; y'(0) = f_n; y'(1) = f_{n+1} (C1 across steps)
    bfull = np.zeros(n)
    bfull[:s] = tab.b
    np.testing.assert_allclose(dense_weights(tab.P, 1.0), bfull, rtol=0, atol=1e-12)
    d0 = tab.P[:, 0]
    d1 = tab.P @ np.arange(1, tab.P.shape[1] + 1)
    e0 = np.zeros(n)
    e0[0] = 1.0
    es = np.zeros(n)
    es[s] = 1.0
    np.testing.assert_allclose(d0, e0, rtol=0, atol=1e-12)
    np.testing.assert_allclose(d1, es, rtol=0, atol=1e-9)


def derive_rk87_dense(c_extra: float = 0.65) -> tuple[np.ndarray, np.ndarray]:
    """Derivation of the RK8(7)13M continuous extension stored in ``tableaus.py``.

    Minimum-norm solutions of the linear continuous order conditions (all trees up to
    order 5 for the internal extra stage at theta = c_extra, then up to order 6 with that
    stage added) plus y(1) = y_{n+1}, y'(0) = f_n, y'(1) = f_{n+1}; stages 1-4 (zero in b
    and b_hat) get zero weights.  Returns (row of the extra stage over stages 0..13, P).
    """
    tab = METHODS["rk87"]
    s = tab.n_stages

    def solve(A, bfull, q, active):
        ns = A.shape[0]
        D = q
        nunk = len(active) * (D - 1)
        cache: dict = {}
        rows, rhs = [], []
        for n in range(1, q + 1):
            for t in trees(n):
                phi = stage_weights(A, t, cache)
                for k in range(2, D + 1):
                    r = np.zeros(nunk)
                    for a, i in enumerate(active):
                        r[a * (D - 1) + k - 2] = phi[i]
                    rows.append(r)
                    rhs.append(1.0 / gamma(t) if k == n else 0.0)
        for a, i in enumerate(active):
            r = np.zeros(nunk)
            r[a * (D - 1):(a + 1) * (D - 1)] = 1.0
            rows.append(r)
            rhs.append(bfull[i] - (1.0 if i == 0 else 0.0))
            r = np.zeros(nunk)
            r[a * (D - 1):(a + 1) * (D - 1)] = np.arange(2, D + 1)
            rows.append(r)
            rhs.append((1.0 if i == s else 0.0) - (1.0 if i == 0 else 0.0))
        sol = np.linalg.lstsq(np.array(rows), np.array(rhs), rcond=None)[0]
        P = np.zeros((ns, D))
        P[0, 0] = 1.0
        for a, i in enumerate(active):
            P[i, 1:] = sol[a * (D - 1):(a + 1) * (D - 1)]
        return P

    A14 = tab.A[:s + 1, :s + 1]
    b14 = np.zeros(s + 1)
    b14[:s] = tab.b
    active = [0] + list(range(5, s + 1))
    P5 = solve(A14, b14, 5, active)
    row = dense_weights(P5, c_extra)
    A15 = np.zeros((s + 2, s + 2))
    A15[:s + 1, :s + 1] = A14
    A15[s + 1, :s + 1] = row
    P6 = solve(A15, np.append(b14, 0.0), 6, active + [s + 1])
    return row, P6


def test_rk87_dense_coefficients_reproduced():
    tab = METHODS["rk87"]
    row, P = derive_rk87_dense(tab.c[-1])
    np.testing.assert_allclose(tab.A[-1, :-1], row, rtol=0, atol=1e-9)
    np.testing.assert_allclose(tab.P, P, rtol=0, atol=1e-7)


# --------------------------------------------------------------------------------------
# analytic two-body reference
# --------------------------------------------------------------------------------------

MEO = (26_560e3, 0.01, np.radians(55.0), np.radians(30.0), np.radians(40.0), np.radians(10.0))
"""a [m], e, i, RAAN, argument of perigee, mean anomaly at t = 0 (issue: a = 26,560 km, e = 0.01, i = 55 deg)."""


def kepler_state(el, t, gm=GM_EARTH):
    """Analytic two-body states (n, 6) at times t [s] from elements (a, e, i, RAAN, w, M0)."""
    a, e, inc, raan, argp, m0 = el
    t = np.atleast_1d(np.asarray(t, dtype=float))
    n = np.sqrt(gm / a ** 3)
    M = m0 + n * t
    E = M.copy()
    for _ in range(60):
        E = E - (E - e * np.sin(E) - M) / (1.0 - e * np.cos(E))
    cE, sE = np.cos(E), np.sin(E)
    bsemi = a * np.sqrt(1.0 - e * e)
    edot = n / (1.0 - e * cE)
    x, y = a * (cE - e), bsemi * sE
    vx, vy = -a * sE * edot, bsemi * cE * edot
    co, so, ci, si, cw, sw = np.cos(raan), np.sin(raan), np.cos(inc), np.sin(inc), np.cos(argp), np.sin(argp)
    P = np.array([co * cw - so * sw * ci, so * cw + co * sw * ci, sw * si])
    Q = np.array([-co * sw - so * cw * ci, -so * sw + co * cw * ci, cw * si])
    return np.hstack([np.outer(x, P) + np.outer(y, Q), np.outer(vx, P) + np.outer(vy, Q)])


def mean_anomaly_time(el, M_target, gm=GM_EARTH):
    """t at which the mean anomaly equals M_target (first occurrence after t = 0)."""
    n = np.sqrt(gm / el[0] ** 3)
    dM = (M_target - el[5]) % (2 * np.pi)
    return dM / n


def test_kepler_reference_is_consistent():
    """The reference itself: velocity = d position / dt (4th-order central difference, 1 s;
    truncation ~ n^4 v h^4 / 30 ~ 1e-13 m/s) and the vis-viva energy."""
    st = kepler_state(MEO, [998.0, 999.0, 1000.0, 1001.0, 1002.0])
    deriv = (st[0, :3] - 8 * st[1, :3] + 8 * st[3, :3] - st[4, :3]) / 12.0
    np.testing.assert_allclose(deriv, st[2, 3:], rtol=1e-10)
    r = np.linalg.norm(st[2, :3])
    v2 = np.sum(st[2, 3:] ** 2)
    assert abs(v2 / 2 - GM_EARTH / r + GM_EARTH / (2 * MEO[0])) < 1e-9 * GM_EARTH / r   # vis-viva


def run_twobody(el, duration, output, **settings):
    return propagate(None, kepler_state(el, 0.0)[0], ["central_gravity"], duration=duration,
                     settings=IntegratorSettings(**settings), output=output)


def pos_err(res, el):
    ref = kepler_state(el, res.times)
    return np.linalg.norm(res.states[:, :3] - ref[:, :3], axis=1)


# --------------------------------------------------------------------------------------
# fixed-step convergence
# --------------------------------------------------------------------------------------

ECC = (26_560e3, 0.3, np.radians(55.0), np.radians(30.0), np.radians(40.0), 0.0)


@pytest.mark.parametrize("name, steps_per_rev, expected", [
    ("dop853", (32, 40, 48, 64), 8),
    ("rk87", (32, 40, 48, 64), 8),
    ("rk54", (96, 128, 192, 256), 5),
])
def test_fixed_step_convergence_order(name, steps_per_rev, expected):
    """Order p from the local error of one fixed step, O(h^(p+1)) (HNW I, Sec. II.3).

    RMS over 24 starting points spread over an e = 0.3 orbit (the RMS keeps the sign
    changes of the error at single points from spoiling the fit), error against Kepler.
    The step ranges keep the errors >= 300x above the round-off floor (~1e-8 m).
    Global errors were less suitable: at e = 0.05 RK8(7)13M's global error falls like
    h^9.5 over every step range above round-off (its 8th-order error terms are tiny).
    """
    period = 2 * np.pi * np.sqrt(ECC[0] ** 3 / GM_EARTH)
    starts = np.linspace(0.0, period, 24, endpoint=False)
    y_starts = kepler_state(ECC, starts)
    hs = period / np.array(steps_per_rev, dtype=float)
    rms = []
    for h in hs:
        y_ends = kepler_state(ECC, starts + h)
        errs = []
        for y0, y1 in zip(y_starts, y_ends):
            res = propagate(None, y0, ["central_gravity"], duration=h,
                            settings=IntegratorSettings(method=name, fixed_step_s=h),
                            output=OutputGrid(times_s=np.array([h])))
            assert res.status == 0 and res.stats["accepted_steps"] == 1
            errs.append(np.linalg.norm(res.state_final[:3] - y1[:3]))
        rms.append(np.sqrt(np.mean(np.square(errs))))
    rms = np.array(rms)
    assert rms.min() > 3e-6                                        # far above round-off
    slope = np.polyfit(np.log(hs), np.log(rms), 1)[0]
    assert abs(slope - 1 - expected) < 0.3, (slope, rms)


def test_fixed_step_count_and_landing():
    """Fixed-step mode: N equal steps, last state exactly at t_end, no error control."""
    res = run_twobody(MEO, 3600.0, OutputGrid(every_step=True), method="dop853", fixed_step_s=60.0)
    assert res.stats["accepted_steps"] == 60
    assert res.times[-1] == 3600.0
    np.testing.assert_allclose(np.diff(res.times), 60.0, rtol=0, atol=1e-9)
    assert res.stats["evaluations"] == 1 + 12 * 60


# --------------------------------------------------------------------------------------
# adaptive runs: accuracy, statistics, dense output, direction, summation
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize("name, rtol, bound", [
    ("dop853", 1e-12, 1e-3), ("rk87", 1e-13, 3e-3), ("rk54", 1e-12, 0.1)])
def test_adaptive_two_body_day(name, rtol, bound):
    """One day MEO vs Kepler: errors at the few-tolerance level (bound from the issue's scale)."""
    res = run_twobody(MEO, 86400.0, OutputGrid(step_s=600.0), method=name, rtol=rtol,
                      atol_pos_m=1e-6, atol_vel_m_s=1e-9)
    assert res.status == 0 and res.t_final == 86400.0
    assert res.times[-1] == 86400.0 and res.times.size == 145
    assert pos_err(res, MEO).max() < bound


def test_statistics_accounting():
    """Evaluations = 1 (f0) + 1 (initial step) + s per attempted step + extra dense stages."""
    res = run_twobody(MEO, 86400.0, OutputGrid(times_s=np.array([40000.0])), method="dop853")
    st = res.stats
    tried = st["accepted_steps"] + st["rejected_steps"]
    assert st["evaluations"] == 2 + 12 * tried + 3 * st["dense_output_steps"]
    assert st["dense_output_steps"] == 1
    assert 0 < st["min_step_s"] <= st["max_step_s"]


def test_tolerance_proportionality():
    """Global error shrinks with the tolerance (error-per-step control, HNW I Sec. II.4)."""
    e1 = pos_err(run_twobody(MEO, 86400.0, OutputGrid(step_s=3600.0), rtol=1e-9, atol_pos_m=1e-3,
                             atol_vel_m_s=1e-6), MEO).max()
    e2 = pos_err(run_twobody(MEO, 86400.0, OutputGrid(step_s=3600.0), rtol=1e-11, atol_pos_m=1e-5,
                             atol_vel_m_s=1e-8), MEO).max()
    assert e2 < e1 / 10


@pytest.mark.parametrize("name, units", [("dop853", 0.5), ("rk54", 0.5), ("rk87", 3.0)])
def test_dense_output_equals_stepping_to_the_times(name, units):
    """States from dense output at arbitrary times agree with runs that end at those times.

    Each direct run lands exactly on its end time with a full-order step.  The difference
    is measured in units of the local tolerance rtol |r| + atol_pos (2.7e-5 m here).
    Measured (rtol 1e-12): DOP853 (dense order 7) <= 0.17, RK5(4) (order 4, but so is
    the method's error) <= 0.19, RK8(7)13M with our 6th-order extension up to 1.03 units
    (1.9 at rtol 1e-13): its dense output is less accurate than its steps.
    """
    rng = np.random.default_rng(1)
    times = np.sort(rng.uniform(0.0, 20000.0, 4))
    kw = dict(method=name, rtol=1e-12, atol_pos_m=1e-6, atol_vel_m_s=1e-9)
    dense = run_twobody(MEO, 20000.0, OutputGrid(times_s=times), **kw)
    assert 1 <= dense.stats["dense_output_steps"] <= 4       # two times may share a step
    for k, tk in enumerate(times):
        direct = run_twobody(MEO, tk, OutputGrid(times_s=np.array([tk])), **kw)
        assert direct.t_final == tk
        diff = np.linalg.norm(dense.states[k, :3] - direct.state_final[:3])
        tol = kw["rtol"] * np.linalg.norm(direct.state_final[:3]) + kw["atol_pos_m"]
        assert diff < units * tol, (name, tk, diff / tol)


def test_dense_output_does_not_change_steps():
    """Requesting output times leaves the step sequence (and the final state) unchanged."""
    a = run_twobody(MEO, 86400.0, OutputGrid(every_step=True))
    b = run_twobody(MEO, 86400.0, OutputGrid(step_s=60.0))
    assert a.stats["accepted_steps"] == b.stats["accepted_steps"]
    np.testing.assert_array_equal(a.state_final, b.state_final)
    # every-step output: the grid of the adaptive steps, with the state at each
    assert a.times.size == a.stats["accepted_steps"] + 1


def test_backward_returns_to_start():
    fwd = run_twobody(MEO, 2 * 86400.0, OutputGrid(every_step=True))
    back = propagate(None, fwd.state_final, ["central_gravity"], duration=-2 * 86400.0,
                     output=OutputGrid(step_s=3600.0))
    assert back.status == 0 and back.t_final == -2 * 86400.0
    assert np.all(np.diff(back.times) < 0)
    start = kepler_state(MEO, 0.0)[0]
    assert np.linalg.norm(back.state_final[:3] - start[:3]) < 1e-3
    assert np.linalg.norm(back.state_final[3:] - start[3:]) < 1e-6
    # backward states match the analytic solution shifted by 2 days
    ref = kepler_state(MEO, back.times + 2 * 86400.0)
    assert np.linalg.norm(back.states[:, :3] - ref[:, :3], axis=1).max() < 1e-3


def test_compensated_summation_lowers_round_off():
    """Kahan-compensated accumulation: round-off floor of a 20,000-step fixed-step run.

    At h = 4.3 s the truncation error of DOP853 is ~1e-15 relative, so what remains is
    round-off; compensation must bring it down markedly (measured: 9.5e-8 m with,
    1.9e-5 m without, over one MEO revolution)."""
    period = 2 * np.pi * np.sqrt(MEO[0] ** 3 / GM_EARTH)
    e_on = pos_err(run_twobody(MEO, period, OutputGrid(every_step=True), fixed_step_s=period / 10000,
                               compensated_summation=True), MEO).max()
    e_off = pos_err(run_twobody(MEO, period, OutputGrid(every_step=True), fixed_step_s=period / 10000,
                                compensated_summation=False), MEO).max()
    assert e_on < e_off / 3, (e_on, e_off)


# --------------------------------------------------------------------------------------
# status codes
# --------------------------------------------------------------------------------------


def test_status_max_steps():
    res = run_twobody(MEO, 86400.0, OutputGrid(every_step=True), max_steps=5)
    assert res.status == 1 and "maximum number of steps" in res.message
    assert res.t_final < 86400.0 and res.times[-1] == res.t_final


def test_status_step_too_small():
    res = run_twobody(MEO, 86400.0, OutputGrid(every_step=True), min_step_s=1e4)
    assert res.status == 2 and "step size" in res.message


def test_status_non_finite():
    # r = 0: the point-mass kernel divides by zero (numba raises ZeroDivisionError)
    res = propagate(None, [0.0, 0.0, 0.0, 1.0, 0.0, 0.0], ["central_gravity"], duration=10.0)
    assert res.status == 4 and "non-finite" in res.message


def test_radial_infall_stops_before_the_centre():
    """Free fall from rest reaches r = 0 at t_ff = pi/2 sqrt(r0^3 / (2 GM)) (Kepler, e -> 1):
    the run stops (step too small or non-finite) close to, and not beyond, t_ff."""
    r0 = 7000e3
    t_ff = np.pi / 2 * np.sqrt(r0 ** 3 / (2 * GM_EARTH))
    res = propagate(None, [r0, 0.0, 0.0, 0.0, 0.0, 0.0], ["central_gravity"], duration=2 * t_ff,
                    output=OutputGrid(every_step=True))
    assert res.status in (2, 4), res.message
    if res.times.size:
        assert 0.99 * t_ff < res.times[-1] <= t_ff * (1 + 1e-9)


# --------------------------------------------------------------------------------------
# events
# --------------------------------------------------------------------------------------


def _node_times(el, t_max):
    """Ascending-node times: argument of latitude u = w + nu = 0 (Kepler's equation)."""
    a, e, _, _, argp, _ = el
    nu = -argp
    E = 2 * np.arctan(np.sqrt((1 - e) / (1 + e)) * np.tan(nu / 2))
    M = E - e * np.sin(E)
    t1 = mean_anomaly_time(el, M)
    period = 2 * np.pi * np.sqrt(a ** 3 / GM_EARTH)
    return t1 + period * np.arange(int(t_max / period) + 2)


@pytest.mark.parametrize("name", sorted(METHODS))
def test_node_and_apsis_event_times(name):
    """Located event times vs Kepler's equation: |dt| < 1e-6 s (issue requirement)."""
    evs = [EventSpec("ascending_node"), EventSpec("periapsis"), EventSpec("apoapsis")]
    res = propagate(None, kepler_state(MEO, 0.0)[0], ["central_gravity"], duration=2 * 86400.0,
                    settings=IntegratorSettings(method=name, rtol=1e-13, atol_pos_m=1e-7, atol_vel_m_s=1e-10),
                    output=OutputGrid(times_s=np.array([0.0])), events=evs)
    period = 2 * np.pi * np.sqrt(MEO[0] ** 3 / GM_EARTH)
    node_ref = _node_times(MEO, 2 * 86400.0)
    node_ref = node_ref[node_ref < 2 * 86400.0]
    peri_ref = mean_anomaly_time(MEO, 0.0) + period * np.arange(5)
    apo_ref = mean_anomaly_time(MEO, np.pi) + period * np.arange(5)
    got = {k: np.array([e.t_s for e in res.events if e.name == k]) for k in ("ascending_node", "periapsis", "apoapsis")}
    np.testing.assert_allclose(got["ascending_node"], node_ref, rtol=0, atol=1e-6)
    np.testing.assert_allclose(got["periapsis"], peri_ref[peri_ref < 2 * 86400.0], rtol=0, atol=1e-6)
    np.testing.assert_allclose(got["apoapsis"], apo_ref[apo_ref < 2 * 86400.0], rtol=0, atol=1e-6)
    for e in res.events:
        if e.name == "ascending_node":
            assert abs(e.state[2]) < 1e-3 and e.state[5] > 0 and e.rising
    assert [e.t_s for e in res.events] == sorted(e.t_s for e in res.events)


def test_terminal_radius_event():
    """Descending through a radius threshold stops the run there (status 3)."""
    el = (7000e3, 0.05, np.radians(50.0), 0.0, 0.0, 0.0)          # perigee 6650 km, apogee 7350 km
    r_th = 6700e3
    ev = EventSpec("radius", direction="down", radius_m=r_th, terminal=True)
    res = propagate(None, kepler_state(el, 0.0)[0], ["central_gravity"], duration=86400.0,
                    output=OutputGrid(step_s=60.0), events=[ev],
                    settings=IntegratorSettings(rtol=1e-13, atol_pos_m=1e-7, atol_vel_m_s=1e-10))
    assert res.status == 3 and "terminal event" in res.message
    # analytic: r = a (1 - e cos E) = r_th on the way down, E in (pi, 2 pi)
    E = 2 * np.pi - np.arccos((1 - r_th / el[0]) / el[1])
    t_ref = mean_anomaly_time(el, E - el[1] * np.sin(E))
    assert abs(res.t_final - t_ref) < 1e-6
    assert len(res.events) == 1 and not res.events[0].rising
    assert abs(np.linalg.norm(res.state_final[:3]) - r_th) < 1e-4
    # the grid stops at the last requested time before the event; the stop state is in
    # state_final and in the event record
    np.testing.assert_array_equal(res.times, 60.0 * np.arange(res.times.size))
    assert res.t_final - 60.0 < res.times[-1] <= res.t_final
    np.testing.assert_array_equal(res.events[0].state, res.state_final)


def test_events_in_backward_runs_keep_their_physical_sense():
    """Backward run: 'ascending_node' still means z increasing with time (Kepler times)."""
    res = propagate(None, kepler_state(MEO, 0.0)[0], ["central_gravity"], duration=-86400.0,
                    settings=IntegratorSettings(rtol=1e-13, atol_pos_m=1e-7, atol_vel_m_s=1e-10),
                    events=[EventSpec("ascending_node"), EventSpec("apoapsis")])
    period = 2 * np.pi * np.sqrt(MEO[0] ** 3 / GM_EARTH)
    t_node = _node_times(MEO, period)[0] - period * np.arange(1, 4)
    t_apo = mean_anomaly_time(MEO, np.pi) - period * np.arange(1, 4)
    got_node = [e.t_s for e in res.events if e.name == "ascending_node"]
    got_apo = [e.t_s for e in res.events if e.name == "apoapsis"]
    np.testing.assert_allclose(got_node, t_node[t_node > -86400.0], rtol=0, atol=1e-6)
    np.testing.assert_allclose(got_apo, t_apo[t_apo > -86400.0], rtol=0, atol=1e-6)
    for e in res.events:
        if e.name == "ascending_node":
            assert e.rising and e.state[5] > 0.0
        else:
            assert not e.rising


def test_output_and_event_buffers_grow():
    """Runs with more steps (> 1024) and events (> 16) than the first buffers hold.

    The compiled loop returns to its allocating caller to enlarge the buffers and goes
    on from where it stopped; nothing may be lost or repeated.  Events against Kepler's
    equation (as test_node_and_apsis_event_times), every-step states against a run with
    those step times as an output grid (identical steps, so identical states).
    """
    days = 14.0
    evs = [EventSpec("ascending_node"), EventSpec("periapsis"), EventSpec("apoapsis")]
    st = IntegratorSettings(rtol=1e-13, atol_pos_m=1e-7, atol_vel_m_s=1e-10)
    y0 = kepler_state(MEO, 0.0)[0]
    steps = propagate(None, y0, ["central_gravity"], duration=days * 86400.0, settings=st,
                      output=OutputGrid(every_step=True), events=evs)
    assert steps.status == 0
    n = steps.stats["accepted_steps"]
    assert n > 1024 and steps.times.size == n + 1
    assert np.all(np.diff(steps.times) > 0) and steps.times[-1] == days * 86400.0
    period = 2 * np.pi * np.sqrt(MEO[0] ** 3 / GM_EARTH)
    t_max = days * 86400.0
    node_ref = _node_times(MEO, t_max)
    ref = {"ascending_node": node_ref[node_ref < t_max],
           "periapsis": mean_anomaly_time(MEO, 0.0) + period * np.arange(int(t_max / period) + 2),
           "apoapsis": mean_anomaly_time(MEO, np.pi) + period * np.arange(int(t_max / period) + 2)}
    assert len(steps.events) > 16
    for name, r in ref.items():
        got = np.array([e.t_s for e in steps.events if e.name == name])
        np.testing.assert_allclose(got, r[r < t_max], rtol=0, atol=1e-6)
    grid = propagate(None, y0, ["central_gravity"], duration=days * 86400.0, settings=st,
                     output=OutputGrid(times_s=steps.times), events=evs)
    # grid times = step ends: no extra dense-output stages (events use the same ones)
    assert grid.stats["accepted_steps"] == n
    assert grid.stats["evaluations"] == steps.stats["evaluations"]
    np.testing.assert_array_equal(grid.times, steps.times)
    np.testing.assert_array_equal(grid.states, steps.states)
    assert [(e.t_s, e.name) for e in grid.events] == [(e.t_s, e.name) for e in steps.events]


# --------------------------------------------------------------------------------------
# rounding residuals of the stored coefficients
# --------------------------------------------------------------------------------------

@pytest.mark.parametrize("name", sorted(METHODS))
def test_rounding_residuals_restore_the_second_condition(name):
    """With the residual, sum (b + b_lo) c~ = 1/2 (c~ = row sums of the stored A) holds
    far below double rounding, computed in exact rational arithmetic of the doubles;
    without it DOP853 misses it by 4.6e-16 (its row sums miss c by up to 1.8e-15).
    (sum b = 1 holds by the loop's form k_0 + sum b_j (k_j - k_0).)"""
    from fractions import Fraction as F

    from propagator.integrators.tableaus import rounding_residuals

    tab = METHODS[name]
    s = tab.n_stages
    b_lo = rounding_residuals(tab)
    ct = [sum((F(float(a)) for a in tab.A[j, :j]), F(0)) for j in range(s)]
    before = float(sum((F(float(x)) * y for x, y in zip(tab.b, ct)), F(0)) - F(1, 2))
    after = float(sum(((F(float(x)) + F(float(z))) * y for x, z, y in zip(tab.b, b_lo, ct)), F(0)) - F(1, 2))
    assert abs(after) < 1e-31, (before, after)
    assert np.count_nonzero(b_lo) <= 1 and abs(tab.c[int(np.argmax(np.abs(b_lo)))] - 1.0) < 1e-14
    assert np.max(np.abs(b_lo)) < 1e-14                                     # a correction only


def _along_track_mean_error(steps_s, duration):
    """Mean (over several fixed steps) of the along-track final position error [m] of
    two-body MEO; round-off averages out, a systematic drift does not.  Reference: the
    universal-variable solution with double-double period reduction (its own error
    ~4e-9 m here against an 80-bit Kepler solution)."""
    from propagator.twobody import propagate_twobody

    y0 = kepler_state(MEO, 0.0)[0]
    r, v = propagate_twobody(y0[:3], y0[3:], duration, GM_EARTH)
    u = v / np.linalg.norm(v)
    errs = [float(np.dot(run_twobody(MEO, duration, OutputGrid(times_s=np.array([duration])),
                                     fixed_step_s=duration / round(duration / h)).state_final[:3] - r, u))
            for h in steps_s]
    return float(np.mean(errs)), errs


def test_rounding_residuals_remove_the_step_size_drift(monkeypatch):
    """The coefficient rounding of DOP853 acts the same way in every step: over 7 days of
    two-body MEO with 350-420 s steps (truncation ~1e-6 m) it left a mean along-track
    error of +1.2e-5 m, proportional to the step (80-bit runs of the same tableau: 3.7e-6,
    7.2e-6, 1.06e-5 m at 100, 200, 300 s; 1e-8 m at 200 s with the residuals restored;
    the truncation error at 350-420 s is -0.5 to -2e-6 m along-track).  With the residuals
    the mean is at the truncation level (measured -0.2e-6 m); the same runs without them
    must show the drift (measured +1.4e-5 m), so this test can fail."""
    import propagator.propagate as prop

    steps = np.linspace(350.0, 420.0, 15)
    week = 7 * 86400.0
    mean_on, errs_on = _along_track_mean_error(steps, week)
    monkeypatch.setattr(prop, "rounding_residuals", lambda tab: np.zeros(tab.n_stages))
    monkeypatch.setattr(prop, "_TABLEAU_ARRAYS", {})
    mean_off, errs_off = _along_track_mean_error(steps, week)
    assert abs(mean_on) < 3e-6, (mean_on, errs_on)
    assert abs(mean_off) > 8e-6, (mean_off, errs_off)


@pytest.mark.parametrize("name", sorted(METHODS))
def test_start_up_reaches_the_working_step_quickly(name):
    """From the automatic first step (~1e-3 of the working step here) the step grows to its
    working size within a few steps and without rejections (stepper._RAMP_END_ERR).
    Measured: DOP853 5 steps (0.04, 0.39, 2.8, 28, 283, 578 s, working step 591 s; the
    PI controller alone took 12), RK8(7)13M 7, RK5(4) 4."""
    res = run_twobody(MEO, 86400.0, OutputGrid(every_step=True), method=name)
    h = np.diff(res.times)
    h = h[h > 0.0]
    working = np.median(h)
    first_near = int(np.argmax(h >= 0.8 * working))
    assert h[0] < 0.01 * working                 # a real start-up (this test means something)
    assert first_near <= 7, (name, first_near, h[:12])
    assert res.stats["rejected_steps"] == 0
    assert np.all(h[first_near:-1] <= 1.2 * working)    # no overshoot beyond the working size


def test_fma_gives_the_exact_product_error():
    """p + fma(a, b, -p) = a b exactly (p = fl(a b)), checked in rational arithmetic on
    2000 random pairs over 20 decades; fl(0.1 * 10) - 1 = 2^-54 is the classic case."""
    from fractions import Fraction as F

    from numba import njit

    from propagator.integrators.fma import fma

    @njit
    def product_error(a, b):
        p = a * b
        return p, fma(a, b, -p)

    rng = np.random.default_rng(7)
    for a, b in rng.normal(size=(2000, 2)) * 10.0 ** rng.integers(-10, 10, (2000, 2)):
        p, e = product_error(a, b)
        assert F(p) + F(e) == F(a) * F(b) or e == float(F(a) * F(b) - F(p)), (a, b)
    assert product_error(0.1, 10.0)[1] == 2.0 ** -54
