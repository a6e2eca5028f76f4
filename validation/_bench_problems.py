"""Benchmark problems of ``bench_integrators.py`` and their scipy twin (numpy right-hand side).

Problems (SI units; states GCRF; t = TT seconds since the epoch 2024-03-20 00:00 TT):

* P1  MEO two-body (a = 26,560 km, e = 0.01, i = 55 deg), 7 days;
* P2  the same orbit, point mass + J2 (true pole), 7 days;
* P3  LEO (a = 7,000 km, e = 0.001, i = 98 deg), point mass + J2, 1 day;
* P4  MEO, point mass + J2 + DE421 Sun and Moon + cannonball SRP with the conical
  Earth shadow, 7 days.  RAAN = 10 deg at the March equinox puts the Sun ~8 deg from
  the orbital plane, below the MEO eclipse limit asin(R/r) = 13.9 deg: two penumbra
  and umbra crossings per revolution, i.e. kinks in the SRP acceleration.

The scipy side (``scipy.integrate.solve_ivp(method='DOP853')``, P. Virtanen et al.,
"SciPy 1.0", Nature Methods 17, 261-272, 2020) integrates the same physics written as
a numpy function (:func:`make_numpy_rhs`):

* point mass a = -GM r/|r|^3 and J2 a = -3/2 J2 GM R^2/r^5 [(1 - 5 z^2/r^2) r + 2 z k]
  with the same constants (``propagator.constants``) as ``forcemodels.models``;
* the J2 pole k (the ITRF z axis in GCRF, third row of the GCRF->ITRF matrix) is
  tabulated once per problem from the *same* pole table longarc uses
  (``propagator.rotation_table.build_pole_table`` / ``pole_vectors``; no problem here
  needs the full rotation) on a 30-s grid and interpolated
  linearly in numpy (the tabulation is done before timing; its interpolation cost
  counts against scipy).  The diurnal polar-motion term (amplitude ~1.5e-6 rad) gives
  the largest curvature; linear interpolation errs by ~A (w dt)^2/8 ~ 1e-12 rad,
  measured in :func:`pole_interpolation_error`;
* Sun and Moon from the jitted DE421 evaluator ``forcemodels.ephemeris.sun_moon_nb``
  called from Python on the same table (no interpolation error at all);
* third bodies in the textbook direct-minus-indirect form
  a = GM ((s - r)/|s - r|^3 - s/|s|^3) (Montenbruck & Gill, Satellite Orbits, 2000,
  eq. 3.37; longarc uses Battin's cancellation-free f(q) form of the same expression,
  which differs by round-off ~1e-19 m/s^2);
* SRP cannonball a = -nu P(1 au) (AU/|d|)^2 Cr A/m d/|d|, d = s - r (M&G 2000 sec. 3.4)
  with the same illumination function ``forcemodels.shadow.illumination_nb`` (jitted,
  called from Python).

Shadow kinks: longarc stops and restarts its step at every penumbra/umbra boundary
(``IntegratorSettings.restart_at_shadow``).  To give scipy the same treatment, its run
is split into ``solve_ivp`` segments between the boundary times, which it gets for free
from a longarc event run made before timing (see :func:`shadow_boundaries`).
"""

from __future__ import annotations

import math
import time
import warnings
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
from scipy.integrate import solve_ivp

from forcemodels.ephemeris import build_sun_moon_table, sun_moon_nb
from forcemodels.shadow import illumination_nb
from propagator.constants import (AU, GM_EARTH, GM_MOON, GM_SUN, J2_EARTH, R_EARTH_EQ,
                                  SOLAR_PRESSURE_1AU)
from propagator.elements import kep_to_cart
from propagator.integrators.settings import EventSpec, IntegratorSettings, OutputGrid
from propagator.propagate import PropagationResult, propagate
from propagator.rotation_table import build_pole_table, pole_vectors
from propagator.timescales import Epoch

DEG = math.pi / 180.0
DAY = 86400.0
EPOCH_ISO = "2024-03-20T00:00:00 TT"
MEO = (26_560e3, 0.01, 55.0 * DEG, 10.0 * DEG, 40.0 * DEG, 10.0 * DEG)
"""a [m], e, i, RAAN, argument of perigee, true anomaly (the issue's MEO: 26,560 km, e 0.01, i 55 deg)."""
LEO = (7_000e3, 0.001, 98.0 * DEG, 10.0 * DEG, 40.0 * DEG, 10.0 * DEG)
"""The issue's LEO: a = 7,000 km, i = 98 deg (e = 0.001 chosen here)."""
SRP = {"cr": 1.3, "area_m2": 20.0, "mass_kg": 1000.0}
"""GNSS-like cannonball: A/m = 0.02 m^2/kg (common practice for a ~1 t GNSS satellite)."""
POLE_GRID_S = 30.0
"""Spacing of the tabulated J2 pole for the numpy right-hand side [s]."""
SCIPY_MIN_RTOL = 100.0 * np.finfo(float).eps
"""solve_ivp raises rtol to 100 eps (with a warning) below this value (scipy docs of solve_ivp)."""


@dataclass(frozen=True)
class Problem:
    """One benchmark problem: orbit, arc, force models (longarc spec) and what they need."""

    key: str
    title: str
    elements: tuple[float, ...]
    duration_s: float
    j2: bool = False
    third_bodies: bool = False
    srp: bool = False

    @property
    def forces(self) -> list[Any]:
        f: list[Any] = ["central_gravity"]
        if self.j2:
            f.append("zonal_j2")
        if self.third_bodies:
            f += ["sun_gravity", "moon_gravity"]
        if self.srp:
            f.append(("solar_radiation", dict(SRP)))
        return f

    @property
    def y0(self) -> np.ndarray:
        return kep_to_cart(np.array(self.elements))


def problems(quick: bool) -> dict[str, Problem]:
    """P1..P4 of the issue; ``quick`` shortens the 7-day arcs to 1 day."""
    week = DAY if quick else 7 * DAY
    return {
        "P1": Problem("P1", "MEO two-body", MEO, week),
        "P2": Problem("P2", "MEO point mass + J2", MEO, week, j2=True),
        "P3": Problem("P3", "LEO i=98 point mass + J2", LEO, DAY, j2=True),
        "P4": Problem("P4", "MEO pm + J2 + Sun + Moon + SRP", MEO, week, j2=True, third_bodies=True, srp=True),
    }


@dataclass
class Environment:
    """Tables shared by both codes (built once, outside every timing)."""

    epoch: Epoch
    rot_table: np.ndarray | None
    eph_table: np.ndarray | None
    pole_table: np.ndarray | None = None
    pole_t0: float = 0.0
    pole_step: float = POLE_GRID_S
    pole: np.ndarray = field(default_factory=lambda: np.zeros((0, 3)))
    pole_diff: np.ndarray = field(default_factory=lambda: np.zeros((0, 3)))
    pole_grid: np.ndarray = field(default_factory=lambda: np.zeros(0))


def environment(problem: Problem) -> Environment:
    """Pole/ephemeris tables for ``problem`` and the tabulated pole (for numpy).

    No problem needs the full rotation (zonal_j2 reads only the pole), so ``rot_table`` is
    None and longarc gets the pole table, as ``propagate`` would build it by itself."""
    epoch = Epoch.from_iso(EPOCH_ISO)
    T = problem.duration_s
    pole_tab = build_pole_table(epoch, 0.0, T) if problem.j2 else None
    eph = build_sun_moon_table(epoch, 0.0, T) if (problem.third_bodies or problem.srp) else None
    env = Environment(epoch, None, eph, pole_table=pole_tab)
    if pole_tab is not None:
        n = int(math.ceil(T / POLE_GRID_S))
        grid = POLE_GRID_S * np.arange(n + 1, dtype=np.float64)
        grid[-1] = T                         # the pole table spans [0, T]
        env.pole = np.ascontiguousarray(pole_vectors(pole_tab, grid))
        env.pole_diff = np.ascontiguousarray(np.diff(env.pole, axis=0) / np.diff(grid)[:, None])
        env.pole_grid = grid
    return env


def _pole_at(env: Environment, t: float) -> np.ndarray:
    i = min(int(t / env.pole_step), env.pole.shape[0] - 2)
    i = max(i, 0)
    return env.pole[i] + (t - env.pole_grid[i]) * env.pole_diff[i]


def pole_interpolation_error(env: Environment, duration_s: float, n: int = 2000) -> float:
    """Largest angle [rad] between the linearly interpolated pole and longarc's (the pole
    table, itself within 5e-14 rad of pyerfa's full rotation: tests/test_propagate.py)."""
    ts = np.random.default_rng(7).uniform(0.0, duration_s, n)
    exact = pole_vectors(env.pole_table, ts)
    approx = np.array([_pole_at(env, t) for t in ts])
    c = np.cross(exact, approx)
    return float(np.max(np.linalg.norm(c, axis=1) / np.linalg.norm(approx, axis=1)))


def make_numpy_rhs(problem: Problem, env: Environment) -> Callable[[float, np.ndarray], np.ndarray]:
    """dy/dt = [v, a(t, r)] in numpy, same physics as longarc's models (module docstring)."""
    gm = GM_EARTH
    cj2 = -1.5 * J2_EARTH * GM_EARTH * R_EARTH_EQ ** 2
    cr_am = SRP["cr"] * SRP["area_m2"] / SRP["mass_kg"]
    srp_k = SOLAR_PRESSURE_1AU * AU * AU * cr_am
    sun = np.zeros(3)
    moon = np.zeros(3)
    eph = env.eph_table
    pole = env.pole
    pole_diff = env.pole_diff
    pole_grid = env.pole_grid
    inv_step = 1.0 / env.pole_step
    i_max = pole.shape[0] - 2
    j2, third, srp = problem.j2, problem.third_bodies, problem.srp
    need_sun = third or srp

    def rhs(t: float, y: np.ndarray) -> np.ndarray:
        r = y[:3]
        r2 = r @ r
        rn = math.sqrt(r2)
        a = (-gm / (r2 * rn)) * r
        if j2:
            i = min(max(int(t * inv_step), 0), i_max)
            k = pole[i] + (t - pole_grid[i]) * pole_diff[i]
            z = k @ r
            f = cj2 / (r2 * r2 * rn)
            a += (f * (1.0 - 5.0 * z * z / r2)) * r + (2.0 * f * z) * k
        if need_sun:
            sun_moon_nb(t, eph, sun, moon)
        if third:
            for s, gmb in ((sun, GM_SUN), (moon, GM_MOON)):
                d = s - r
                dd = d @ d
                ss = s @ s
                a += (gmb / (dd * math.sqrt(dd))) * d - (gmb / (ss * math.sqrt(ss))) * s
        if srp:
            nu = illumination_nb(r, sun)
            if nu > 0.0:
                d = sun - r
                dd = d @ d
                a -= (nu * srp_k / (dd * math.sqrt(dd))) * d
        return np.concatenate((y[3:], a))

    return rhs


# ---------------------------------------------------------------------------------------
# runs
# ---------------------------------------------------------------------------------------

def tolerances(rtol: float) -> tuple[float, float]:
    """atol (position [m], velocity [m/s]) paired with rtol: the default ratio of
    ``IntegratorSettings`` (atol = rtol x 1e7 m and rtol x 1e4 m/s)."""
    return rtol * 1e7, rtol * 1e4


@dataclass
class Run:
    """Outcome of one run: final state, evaluations, steps, wall time [s] (best of n)."""

    code: str
    method: str
    rtol: float
    state: np.ndarray
    nfev: int
    steps: int
    time_s: float
    extra: dict[str, Any] = field(default_factory=dict)


def best_of(n: int, fn: Callable[[], Any], min_total_s: float = 0.1, max_calls: int = 25) -> tuple[float, Any]:
    """Smallest wall time of at least n calls (the machine is shared: the minimum is the
    least disturbed), and the last result.  Short calls are repeated until they have run
    ``min_total_s`` in all (at most ``max_calls`` times), so millisecond runs get more tries."""
    best = math.inf
    out = None
    total = 0.0
    calls = 0
    if n <= 1:
        min_total_s = 0.0                    # a single untimed-purpose run
    while calls < n or (total < min_total_s and calls < max_calls):
        t0 = time.perf_counter()
        out = fn()
        dt = time.perf_counter() - t0
        best = min(best, dt)
        total += dt
        calls += 1
    return best, out


def run_longarc(problem: Problem, env: Environment, rtol: float, method: str = "dop853",
                repeats: int = 1, atol: tuple[float, float] | None = None, **settings: Any) -> Run:
    """One longarc propagation to the end of the arc (final state only), timed."""
    ap, av = atol if atol is not None else tolerances(rtol)
    st = IntegratorSettings(method=method, rtol=rtol, atol_pos_m=ap, atol_vel_m_s=av, **settings)
    y0 = problem.y0
    T = problem.duration_s
    out = OutputGrid(times_s=np.array([T]))

    def go() -> PropagationResult:
        return propagate(env.epoch, y0, problem.forces, duration=T, settings=st, output=out,
                         rotation_table=env.rot_table, ephemeris_table=env.eph_table,
                         pole_table=env.pole_table)

    dt, res = best_of(repeats, go)
    if not res.ok or res.t_final != T:
        raise RuntimeError(f"longarc {problem.key} {method} rtol {rtol:g}: {res.message}")
    return Run("longarc", method, rtol, res.state_final.copy(), res.stats["evaluations"],
               res.stats["accepted_steps"], dt,
               {"rejected": res.stats["rejected_steps"], "restarts": res.stats["restarts"]})


def shadow_boundaries(problem: Problem, env: Environment, rtol: float = 1e-14) -> np.ndarray:
    """Penumbra and umbra boundary times [s] over the arc (longarc events; empty without SRP)."""
    if not problem.srp:
        return np.zeros(0)
    ap, av = tolerances(rtol)
    res = propagate(env.epoch, problem.y0, problem.forces, duration=problem.duration_s,
                    settings=IntegratorSettings(rtol=rtol, atol_pos_m=ap, atol_vel_m_s=av),
                    output=OutputGrid(times_s=np.array([problem.duration_s])),
                    events=[EventSpec("penumbra"), EventSpec("umbra")],
                    rotation_table=env.rot_table, ephemeris_table=env.eph_table,
                    pole_table=env.pole_table)
    t = np.array(sorted(e.t_s for e in res.events))
    return t[(t > 0.0) & (t < problem.duration_s)]


def run_scipy(problem: Problem, env: Environment, rtol: float, rhs: Callable, repeats: int = 1,
              breaks: np.ndarray | None = None, atol: tuple[float, float] | None = None) -> Run:
    """solve_ivp(DOP853) with the same tolerances (rtol raised to scipy's minimum 100 eps),
    split at ``breaks`` (shadow boundaries) like longarc's restarts."""
    ap, av = atol if atol is not None else tolerances(rtol)
    rt = max(rtol, SCIPY_MIN_RTOL)
    at = np.array([ap, ap, ap, av, av, av])
    edges = [0.0] + [float(b) for b in (breaks if breaks is not None else [])] + [problem.duration_s]
    y0 = problem.y0

    def go() -> tuple[np.ndarray, int, int]:
        y = y0
        nfev = 0
        steps = 0
        for a, b in zip(edges[:-1], edges[1:]):
            sol = solve_ivp(rhs, (a, b), y, method="DOP853", rtol=rt, atol=at)
            if sol.status != 0:
                raise RuntimeError(f"scipy {problem.key} rtol {rtol:g}: {sol.message}")
            y = sol.y[:, -1]
            nfev += sol.nfev
            steps += sol.t.size - 1
        return y, nfev, steps

    with warnings.catch_warnings():
        warnings.simplefilter("error")        # no silent rtol clamping or other surprises
        dt, (y, nfev, steps) = best_of(repeats, go)
    return Run("scipy", "DOP853", rtol, np.array(y), nfev, steps, dt,
               {"rtol_effective": rt, "segments": len(edges) - 1})
