"""Two-body Keplerian fit: the elements at a reference time whose two-body motion best
fits time-tagged positions over a window.

Method: nonlinear least squares on the position residuals with
``scipy.optimize.least_squares`` (trust-region reflective, Branch, Coleman & Li, SIAM J.
Sci. Comput. 21 (1999) 1-23, as implemented in SciPy).  The unknowns are the
equinoctial elements ``(a, h, k, p, q, lam0)`` at the reference time (Broucke & Cefola
1972; no singularity at e = 0 or i = 0 — the retrograde set is used for i > 90 deg), each
scaled to metres of position (``a`` itself, the others multiplied by the initial ``a``)
so that the Jacobian columns are of order one.  Two-body motion advances only the mean
longitude, ``lam(t) = lam0 + sqrt(gm / a^3) (t - t_ref)``, and positions follow from
:func:`~propagator.fitting.osculating.cartesian_from_equinoctial`.  The Jacobian is
taken by central differences with a fixed 1 cm step in the scaled unknowns (the
position error of the difference quotient is ~1e-19 relative, its round-off ~1e-6
relative).  The initial guess is the osculating state at the reference time,
interpolated from the samples (cubic Hermite with velocities, else a cubic spline).

Units: SI (m, s, rad).  Times are float seconds on one continuous scale (longarc: TT
seconds since the case epoch).  Positions must be in an inertial frame.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
from scipy.interpolate import CubicHermiteSpline, CubicSpline
from scipy.optimize import least_squares

from propagator.constants import GM_EARTH
from propagator.fitting.errors import (DegenerateOrbitError, FitNotConvergedError, FitNotConvergedWarning,
                                       WindowOutsideArcError, check_arc, check_sample_count,
                                       window_mask)
from propagator.fitting.osculating import (cartesian_from_equinoctial, equinoctial_from_cartesian,
                                           equinoctial_to_keplerian, keplerian_from_cartesian,
                                           wrap_2pi)

__all__ = ["KeplerianFit", "fit_keplerian_from_arrays", "interpolate_state",
           "solve_scaled_least_squares", "LsqOutcome"]

_FD_STEP_M = 1e-2
"""Central-difference step in the scaled (metre) unknowns (see module docstring)."""


@dataclass
class LsqOutcome:
    """What :func:`solve_scaled_least_squares` found."""

    x: np.ndarray
    residuals: np.ndarray
    converged: bool
    status: int
    message: str
    nfev: int


def solve_scaled_least_squares(fun: Callable[[np.ndarray], np.ndarray], x0: np.ndarray, *,
                               max_nfev: int = 100, step: float = _FD_STEP_M,
                               tol: float = 1e-15) -> LsqOutcome:
    """Minimise ``|fun(x)|^2`` with scipy.optimize.least_squares (method 'trf').

    ``x`` must be scaled so that one unit of every component moves the model by about
    one metre; the Jacobian is then taken by central differences with the absolute
    ``step``.  ``ftol = xtol = tol`` (relative), ``gtol`` disabled (absolute gradient
    tests are meaningless for metre residuals).  ``max_nfev`` counts residual
    evaluations by least_squares (the Jacobian's 2n extra evaluations are not counted).
    A fit that stops on ``max_nfev`` (SciPy status 0) is reported as not converged.
    """
    x0 = np.asarray(x0, dtype=float)
    n = x0.size

    def jac(x: np.ndarray) -> np.ndarray:
        cols = []
        for j in range(n):
            dx = np.zeros(n)
            dx[j] = step
            cols.append((fun(x + dx) - fun(x - dx)) / (2.0 * step))
        return np.stack(cols, axis=1)

    res = least_squares(fun, x0, jac=jac, method="trf", x_scale=1.0, ftol=tol, xtol=tol,
                        gtol=None, max_nfev=max_nfev)
    converged = bool(res.status > 0 and np.all(np.isfinite(res.fun)))
    return LsqOutcome(x=res.x, residuals=res.fun, converged=converged, status=int(res.status),
                      message=str(res.message), nfev=int(res.nfev))


def interpolate_state(times: np.ndarray, positions: np.ndarray, velocities: np.ndarray | None,
                      t: float) -> tuple[np.ndarray, np.ndarray]:
    """Position and velocity at ``t`` interpolated from samples.

    Cubic Hermite interpolation when velocities are given (scipy.interpolate.
    CubicHermiteSpline), else a not-a-knot cubic spline and its derivative
    (scipy.interpolate.CubicSpline).  Used for initial guesses only.
    """
    i = int(np.searchsorted(times, t))
    if i < times.size and times[i] == t and velocities is not None:
        return positions[i].copy(), velocities[i].copy()
    if velocities is not None:
        sp = CubicHermiteSpline(times, positions, velocities, axis=0)
    else:
        sp = CubicSpline(times, positions, axis=0)
    return np.asarray(sp(t), dtype=float), np.asarray(sp(t, 1), dtype=float)


def _retro_for(r: np.ndarray, v: np.ndarray) -> int:
    hz = np.cross(r, v)[2]
    return 1 if hz >= 0.0 else -1


@dataclass
class KeplerianFit:
    """Two-body elements at ``t_ref`` fitted to positions over ``window``.

    Keplerian ``a`` [m], ``e``, ``i``, ``raan``, ``argp``, ``M`` [rad] and the equinoctial
    set ``equinoctial = {a, h, k, p, q, lam}`` (retrograde factor ``retro``) at ``t_ref``
    [s].  ``residuals`` = fitted - given positions [m] at ``times`` (the window
    samples).  ``converged`` False means the solver stopped early: the elements are the
    best found.
    """

    t_ref: float
    gm: float
    retro: int
    a: float
    e: float
    i: float
    raan: float
    argp: float
    M: float
    equinoctial: dict[str, float]
    window: tuple[float, float]
    times: np.ndarray
    residuals: np.ndarray
    converged: bool
    status: int
    message: str
    nfev: int
    frame: str = "inertial"
    initial_guess: dict[str, float] = field(default_factory=dict)

    @property
    def n_samples(self) -> int:
        return int(self.times.size)

    @property
    def rms_3d(self) -> float:
        """RMS of the 3D residual norm over the window [m]."""
        return float(np.sqrt(np.mean(np.sum(self.residuals ** 2, axis=1))))

    @property
    def max_3d(self) -> float:
        """Largest 3D residual over the window [m]."""
        return float(np.max(np.linalg.norm(self.residuals, axis=1)))

    @property
    def mean_motion(self) -> float:
        """Two-body mean motion sqrt(gm / a^3) [rad/s]."""
        return float(np.sqrt(self.gm / self.a ** 3))

    def state(self, t: Any) -> tuple[np.ndarray, np.ndarray]:
        """Two-body positions [m] and velocities [m/s] at times ``t`` [s], shape (n, 3)."""
        t = np.atleast_1d(np.asarray(t, dtype=float))
        q = self.equinoctial
        lam = q["lam"] + self.mean_motion * (t - self.t_ref)
        return cartesian_from_equinoctial(q["a"], q["h"], q["k"], q["p"], q["q"], lam, self.gm,
                                          self.retro)

    def position(self, t: Any) -> np.ndarray:
        """Two-body positions [m] at times ``t`` [s], shape (n, 3)."""
        return self.state(t)[0]

    def to_dict(self) -> dict[str, Any]:
        """Summary (elements, window, convergence, residual RMS/max), JSON-serialisable."""
        return {
            "kind": "two-body keplerian", "frame": self.frame, "t_ref_s": self.t_ref,
            "gm_m3_s2": self.gm, "retrograde_factor": self.retro,
            "a_m": self.a, "e": self.e, "i_rad": self.i, "raan_rad": self.raan,
            "argp_rad": self.argp, "mean_anomaly_rad": self.M,
            "equinoctial": dict(self.equinoctial),
            "window_s": list(self.window), "n_samples": self.n_samples,
            "converged": self.converged, "solver_status": self.status,
            "solver_message": self.message, "nfev": self.nfev,
            "rms_3d_m": self.rms_3d, "max_3d_m": self.max_3d,
        }


def report_convergence(result: Any, what: str, on_failure: str) -> None:
    """Warn (``on_failure='warn'``) or raise FitNotConvergedError (``'raise'``) if not converged."""
    if result.converged:
        return
    msg = (f"{what} did not converge ({result.message}, status {result.status}, "
           f"{result.nfev} evaluations); best 3D RMS residual {result.rms_3d:.6g} m, "
           f"max {result.max_3d:.6g} m")
    if on_failure == "raise":
        raise FitNotConvergedError(msg, result)
    warnings.warn(msg, FitNotConvergedWarning, stacklevel=3)


def _resolve_window(t: np.ndarray, window: tuple[float, float] | None, t_ref: float | None
                    ) -> tuple[np.ndarray, tuple[float, float], float]:
    mask = window_mask(t, window)
    w = (float(t[mask][0]), float(t[mask][-1])) if window is None else (float(window[0]), float(window[1]))
    if t_ref is None:
        t_ref = 0.5 * (w[0] + w[1])
    t_ref = float(t_ref)
    if not (np.isfinite(t_ref) and w[0] <= t_ref <= w[1]):
        raise WindowOutsideArcError(f"reference time {t_ref!r} s is not inside the window {w} s")
    return mask, w, t_ref


def fit_keplerian_from_arrays(times: Any, positions: Any, velocities: Any | None = None, *,
                              t_ref: float | None = None,
                              window: tuple[float, float] | None = None,
                              gm: float = GM_EARTH, max_nfev: int = 100,
                              on_failure: str = "warn") -> KeplerianFit:
    """Fit two-body Keplerian elements at ``t_ref`` to positions over ``window``.

    Args:
        times: sample times [s], strictly increasing.
        positions: inertial positions [m], shape (n, 3).
        velocities: optional inertial velocities [m/s] (used only for the initial guess).
        t_ref: reference time of the elements [s]; default the window centre.
        window: ``(t_start, t_end)`` [s] inside the arc; default the whole arc.
        gm: gravitational parameter [m^3/s^2].
        max_nfev: residual-evaluation budget of the solver.
        on_failure: ``'warn'`` (flag ``converged=False`` + FitNotConvergedWarning) or
            ``'raise'`` (FitNotConvergedError carrying the best result).

    Raises:
        FittingInputError subclasses for bad input (see :mod:`propagator.fitting.errors`).
    """
    if on_failure not in ("warn", "raise"):
        raise ValueError(f"on_failure must be 'warn' or 'raise', got {on_failure!r}")
    t, r, v = check_arc(times, positions, velocities)
    mask, w, t_ref = _resolve_window(t, window, t_ref)
    tw, rw = t[mask], r[mask]
    vw = None if v is None else v[mask]
    check_sample_count(tw.size, 6, "two-body Keplerian fit")
    # Every sample must be an elliptic state if velocities are given (clear error early).
    if vw is not None:
        keplerian_from_cartesian(rw, vw, gm)
    r0, v0 = interpolate_state(tw, rw, vw, t_ref)
    retro = _retro_for(r0, v0)
    try:
        eq0 = {k: float(x[0]) for k, x in equinoctial_from_cartesian(r0, v0, gm, retro).items()}
    except DegenerateOrbitError as exc:
        raise DegenerateOrbitError(
            f"the state interpolated at t_ref = {t_ref!r} s is not a usable ellipse ({exc}); "
            "the arc is hyperbolic, degenerate or too coarsely sampled", None, exc.value) from exc
    a0 = eq0["a"]
    p0 = np.array([eq0["a"], eq0["h"], eq0["k"], eq0["p"], eq0["q"], eq0["lam"]])
    scale = np.array([1.0, a0, a0, a0, a0, a0])
    dt = tw - t_ref

    def model(x: np.ndarray) -> np.ndarray:
        a, h, k, p, q, lam0 = x / scale
        if not (a > 0.0 and h * h + k * k < 1.0):
            return np.full(rw.shape, 1e20)
        lam = lam0 + np.sqrt(gm / a ** 3) * dt
        return cartesian_from_equinoctial(a, h, k, p, q, lam, gm, retro)[0]

    def fun(x: np.ndarray) -> np.ndarray:
        return (model(x) - rw).ravel()

    out = solve_scaled_least_squares(fun, p0 * scale, max_nfev=max_nfev)
    a, h, k, p, q, lam0 = out.x / scale
    kep = equinoctial_to_keplerian(a, h, k, p, q, lam0, retro)
    res = KeplerianFit(
        t_ref=t_ref, gm=float(gm), retro=retro, a=float(a), e=float(kep["e"]), i=float(kep["i"]),
        raan=float(kep["raan"]), argp=float(kep["argp"]), M=float(kep["M"]),
        equinoctial={"a": float(a), "h": float(h), "k": float(k), "p": float(p), "q": float(q),
                     "lam": float(wrap_2pi(lam0))},
        window=w, times=tw, residuals=out.residuals.reshape(-1, 3), converged=out.converged,
        status=out.status, message=out.message, nfev=out.nfev,
        initial_guess=dict(eq0))
    res.equinoctial["lam_unwrapped"] = float(lam0)
    report_convergence(res, "two-body Keplerian fit", on_failure)
    return res
