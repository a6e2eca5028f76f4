"""Errors, warnings and input checks of the element-fitting stage.

Every bad-input error is a :class:`FittingInputError` (a ``ValueError``) whose message
names the problem and, where there is one, the offending sample index and value.
"""

from __future__ import annotations

from typing import Any

import numpy as np


class FittingInputError(ValueError):
    """Base class of the fitting stage's bad-input errors."""


class NotEnoughSamplesError(FittingInputError):
    """Fewer samples (position components) in the window than fitted parameters."""


class WindowOutsideArcError(FittingInputError):
    """The requested window (or reference time) is not inside the sampled arc."""


class NonMonotonicTimesError(FittingInputError):
    """Sample times are not strictly increasing."""

    def __init__(self, message: str, index: int) -> None:
        super().__init__(message)
        self.index = index


class NonFiniteInputError(FittingInputError):
    """A time, position or velocity is NaN or infinite."""

    def __init__(self, message: str, index: int) -> None:
        super().__init__(message)
        self.index = index


class DegenerateOrbitError(FittingInputError):
    """The arc is not an ellipse (hyperbolic, parabolic, rectilinear or through the centre)."""

    def __init__(self, message: str, index: int | None = None, value: float | None = None) -> None:
        super().__init__(message)
        self.index = index
        self.value = value


class OutOfScopeError(FittingInputError):
    """The orbit is outside what a given element set can represent (e.g. near-zero inclination)."""


class FitNotConvergedWarning(UserWarning):
    """A least-squares fit stopped without meeting its convergence criteria."""


class FitNotConvergedError(RuntimeError):
    """Raised (when asked for) by a fit that did not converge; ``.result`` holds the best fit."""

    def __init__(self, message: str, result: Any) -> None:
        super().__init__(message)
        self.result = result


# --- input checks -------------------------------------------------------------------------

def check_times(times: Any) -> np.ndarray:
    """Return ``times`` as float64[n]; finite and strictly increasing, else raise."""
    t = np.asarray(times, dtype=float)
    if t.ndim != 1:
        raise FittingInputError(f"times must be one-dimensional, got shape {t.shape}")
    bad = np.flatnonzero(~np.isfinite(t))
    if bad.size:
        i = int(bad[0])
        raise NonFiniteInputError(f"time at index {i} is not finite ({float(t[i])!r})", i)
    dt = np.diff(t)
    bad = np.flatnonzero(dt <= 0.0)
    if bad.size:
        i = int(bad[0]) + 1
        raise NonMonotonicTimesError(
            f"times must be strictly increasing: t[{i}] = {float(t[i])!r} <= t[{i - 1}] = "
            f"{float(t[i - 1])!r}", i)
    return t


def check_vectors(name: str, values: Any, n: int) -> np.ndarray:
    """Return ``values`` as float64[n, 3]; finite, else raise naming the first bad row."""
    x = np.asarray(values, dtype=float)
    if x.shape != (n, 3):
        raise FittingInputError(f"{name} must have shape ({n}, 3) to match the times, got {x.shape}")
    bad = np.flatnonzero(~np.all(np.isfinite(x), axis=1))
    if bad.size:
        i = int(bad[0])
        raise NonFiniteInputError(f"{name} at index {i} is not finite ({x[i].tolist()!r})", i)
    return x


def check_arc(times: Any, positions: Any, velocities: Any | None = None
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Validate an arc: strictly increasing finite times, finite (n, 3) positions/velocities."""
    t = check_times(times)
    r = check_vectors("positions", positions, t.size)
    v = None if velocities is None else check_vectors("velocities", velocities, t.size)
    norms = np.linalg.norm(r, axis=1)
    bad = np.flatnonzero(norms == 0.0)
    if bad.size:
        i = int(bad[0])
        raise DegenerateOrbitError(f"position at index {i} is at the centre of attraction", i, 0.0)
    return t, r, v


def window_mask(times: np.ndarray, window: tuple[float, float] | None) -> np.ndarray:
    """Boolean mask of the samples inside ``window = (t_start, t_end)`` (inclusive).

    Raises :class:`WindowOutsideArcError` if the window is empty, reversed or not inside
    the arc ``[times[0], times[-1]]``.
    """
    if window is None:
        return np.ones(times.size, dtype=bool)
    t0, t1 = float(window[0]), float(window[1])
    if not (np.isfinite(t0) and np.isfinite(t1)) or t1 <= t0:
        raise WindowOutsideArcError(f"window ({t0!r}, {t1!r}) must be finite with start < end")
    tol = 1e-9 * max(1.0, abs(times[0]), abs(times[-1]))
    if t0 < times[0] - tol or t1 > times[-1] + tol:
        raise WindowOutsideArcError(
            f"window ({t0!r}, {t1!r}) s is not inside the arc ({float(times[0])!r}, "
            f"{float(times[-1])!r}) s")
    return (times >= t0 - tol) & (times <= t1 + tol)


def check_sample_count(n_samples: int, n_params: int, what: str) -> None:
    """Raise :class:`NotEnoughSamplesError` unless 3 * n_samples >= n_params and n_samples >= 2."""
    if 3 * n_samples < n_params or n_samples < 2:
        raise NotEnoughSamplesError(
            f"{what}: {n_samples} position samples ({3 * n_samples} components) in the window "
            f"for {n_params} parameters")
