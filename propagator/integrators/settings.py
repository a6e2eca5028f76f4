"""Integrator settings, output grids and event requests (validated, SI units).

Default method and tolerances (DOP853, rtol 1e-13, atol 1e-6 m and 1e-9 m/s, i.e.
atol = rtol x 1e7 m and rtol x 1e4 m/s) come from a work-precision study on two-body
orbits against Kepler's equation (max position error over the arc; evaluations):

    =====  ======  ==================  ==================  ==================
    orbit  arc     rtol 1e-12          rtol 1e-13          rtol 1e-14
    =====  ======  ==================  ==================  ==================
    LEO    1 d     1.0e-4 m   8,666    1.1e-5 m  11,534    3.6e-6 m  15,362
    LEO    7 d     6.6e-3 m  60,134    7.7e-4 m  80,210    2.6e-4 m 106,970
    MEO    1 d     5.7e-5 m   1,418    5.8e-6 m   1,862    3.1e-7 m   2,462
    MEO    7 d     1.9e-4 m   9,314    1.2e-5 m  12,410    1.5e-5 m  16,538
    GEO    7 d     1.9e-4 m   4,718    1.0e-5 m   6,278    3.6e-6 m   8,354
    HEO    1 d     5.6e-3 m   2,090    3.6e-4 m   2,606    2.6e-5 m   3,470
    =====  ======  ==================  ==================  ==================

(DOP853; LEO a = 7000 km e = 0.001, MEO a = 26,560 km e = 0.01, GEO, HEO a = 26,600 km
e = 0.7.)  RK8(7)13M needs about as many evaluations for 3-50x larger errors except on
the HEO orbit (1 d: 3.0e-5 m with 3,369 evaluations at 1e-13); RK5(4) needs 3-4x more
evaluations for 10-100x larger errors.  rtol 1e-13 keeps numerical error well below
the sub-millimetre effects compared in force-model studies (30-day MEO: 0.65 mm) for
~30 % more work than 1e-12.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import pydantic

from propagator.integrators.tableaus import METHODS


class IntegratorSettings(pydantic.BaseModel):
    """How to integrate: method, tolerances, step-size control and limits.

    Error control (Hairer, Norsett & Wanner, Solving ODEs I, 2nd ed., eq. II.4.10-11):
    component i of the local error estimate is scaled by ``atol_i + rtol * |y_i|`` with
    atol_i = ``atol_pos_m`` for position and ``atol_vel_m_s`` for velocity; the step is
    accepted when the RMS (or max) of the scaled errors is <= 1.
    """

    model_config = pydantic.ConfigDict(extra="forbid", frozen=True)

    method: str = pydantic.Field("dop853", description="Runge-Kutta pair: " + ", ".join(sorted(METHODS)))
    rtol: float = pydantic.Field(1e-13, description="relative tolerance [-]")
    atol_pos_m: float = pydantic.Field(1e-6, description="absolute tolerance on position [m]")
    atol_vel_m_s: float = pydantic.Field(1e-9, description="absolute tolerance on velocity [m/s]")
    error_norm: Literal["rms", "max"] = pydantic.Field("rms", description="norm of the scaled error vector")
    control_variational: bool = pydantic.Field(
        False, description="include STM/sensitivity components in the error norm")
    atol_variational: float = pydantic.Field(
        1e-10, description="absolute tolerance of variational components when controlled [-]")
    safety: float = pydantic.Field(0.9, description="safety factor of the step-size controller (0, 1)")
    min_factor: float = pydantic.Field(0.2, description="smallest step-size ratio h_new/h (0, 1)")
    max_factor: float = pydantic.Field(10.0, description="largest step-size ratio h_new/h (> 1)")
    pi_beta: float = pydantic.Field(
        0.04, description="PI controller weight of the previous error (0 = plain I control)")
    first_step_s: float | None = pydantic.Field(None, description="first step [s]; None = automatic")
    max_step_s: float = pydantic.Field(math.inf, description="largest step [s]")
    min_step_s: float = pydantic.Field(0.0, description="smallest step [s] before giving up")
    max_steps: int = pydantic.Field(5_000_000, description="largest number of steps (accepted + rejected)")
    fixed_step_s: float | None = pydantic.Field(
        None, description="fixed step [s]: error control off (convergence studies)")
    compensated_summation: bool = pydantic.Field(
        True, description="compensated accumulation of the state and time, with the rounding "
                          "residuals of the method's coefficients restored (False: plain double)")
    restart_at_shadow: bool | None = pydantic.Field(
        None, description="discard the step crossing a shadow boundary (penumbra/umbra), land "
                          "on it and restart; None = when a selected model has a 'shadow' "
                          "parameter other than 'none' (e.g. solar_radiation)")

    @pydantic.field_validator("method")
    @classmethod
    def _known_method(cls, value: str) -> str:
        if value.lower() not in METHODS:
            raise ValueError(f"unknown integration method {value!r}; known methods: {', '.join(sorted(METHODS))}")
        return value.lower()

    @pydantic.field_validator("rtol", "atol_pos_m", "atol_vel_m_s", "atol_variational")
    @classmethod
    def _positive_tol(cls, value: float, info: pydantic.ValidationInfo) -> float:
        if not (math.isfinite(value) and value > 0.0):
            raise ValueError(f"{info.field_name} must be a finite positive number, got {value!r}")
        if info.field_name == "rtol" and value < 1e-15:
            raise ValueError(f"rtol = {value!r} is below the double-precision limit (use >= 1e-15)")
        return value

    @pydantic.field_validator("safety", "min_factor")
    @classmethod
    def _unit_interval(cls, value: float, info: pydantic.ValidationInfo) -> float:
        if not (0.0 < value < 1.0):
            raise ValueError(f"{info.field_name} must lie in (0, 1), got {value!r}")
        return value

    @pydantic.field_validator("max_factor")
    @classmethod
    def _above_one(cls, value: float) -> float:
        if not (value > 1.0):
            raise ValueError(f"max_factor must be > 1, got {value!r}")
        return value

    @pydantic.field_validator("pi_beta")
    @classmethod
    def _beta_range(cls, value: float) -> float:
        if not (0.0 <= value <= 0.2):
            raise ValueError(f"pi_beta must lie in [0, 0.2] (0.04 recommended), got {value!r}")
        return value

    @pydantic.field_validator("first_step_s", "fixed_step_s")
    @classmethod
    def _positive_step(cls, value: float | None, info: pydantic.ValidationInfo) -> float | None:
        if value is not None and not (math.isfinite(value) and value > 0.0):
            raise ValueError(f"{info.field_name} must be a finite positive number of seconds, got {value!r}")
        return value

    @pydantic.field_validator("max_step_s")
    @classmethod
    def _max_step(cls, value: float) -> float:
        if not (value > 0.0):
            raise ValueError(f"max_step_s must be > 0, got {value!r}")
        return value

    @pydantic.field_validator("min_step_s")
    @classmethod
    def _min_step(cls, value: float) -> float:
        if not (math.isfinite(value) and value >= 0.0):
            raise ValueError(f"min_step_s must be finite and >= 0, got {value!r}")
        return value

    @pydantic.field_validator("max_steps")
    @classmethod
    def _max_steps(cls, value: int) -> int:
        if value < 1:
            raise ValueError(f"max_steps must be >= 1, got {value!r}")
        return value


@dataclass(frozen=True)
class OutputGrid:
    """Where states are reported.

    Exactly one of: ``step_s`` (every step_s seconds from the start, plus the end time),
    ``times_s`` (explicit times in seconds since the epoch, sorted in the direction of
    integration, inside the propagation span), or ``every_step=True`` (every accepted
    integrator step).  Output times never shorten integrator steps (dense output).
    """

    step_s: float | None = None
    times_s: np.ndarray | None = None
    every_step: bool = False

    def __post_init__(self) -> None:
        given = (self.step_s is not None) + (self.times_s is not None) + bool(self.every_step)
        if given != 1:
            raise ValueError("OutputGrid: give exactly one of step_s, times_s, every_step=True")
        if self.step_s is not None and not (math.isfinite(self.step_s) and self.step_s > 0.0):
            raise ValueError(f"OutputGrid.step_s must be a finite positive number of seconds, got {self.step_s!r}")
        if self.times_s is not None:
            arr = np.array(self.times_s, dtype=np.float64).ravel()      # own copy
            if not np.all(np.isfinite(arr)):
                raise ValueError("OutputGrid.times_s must be finite")
            object.__setattr__(self, "times_s", arr)
            # checked once here, not at every propagation (times() is on the per-run path)
            d = np.diff(arr)
            object.__setattr__(self, "_ascending", bool(np.all(d >= 0.0)))
            object.__setattr__(self, "_descending", bool(np.all(d <= 0.0)))
            object.__setattr__(self, "_range", (float(arr.min()), float(arr.max())) if arr.size else None)

    def times(self, t0: float, t_end: float) -> np.ndarray | None:
        """Output times for a run from t0 to t_end (None in every-step mode)."""
        if self.every_step:
            return None
        direction = 1.0 if t_end >= t0 else -1.0
        if self.step_s is not None:
            span = abs(t_end - t0)
            n = int(math.floor(span / self.step_s * (1 + 1e-12)))
            times = t0 + direction * self.step_s * np.arange(n + 1, dtype=np.float64)
            if abs(times[-1] - t_end) > 1e-9 * max(1.0, abs(t_end)):
                times = np.append(times, t_end)
            else:
                times[-1] = t_end
            return times
        times = self.times_s
        if times.size:
            if not (self._ascending if direction > 0.0 else self._descending):
                raise ValueError("OutputGrid.times_s must be sorted in the direction of integration")
            lo, hi = min(t0, t_end), max(t0, t_end)
            t_min, t_max = self._range
            if t_min < lo or t_max > hi:
                raise ValueError(f"OutputGrid.times_s must lie within the propagation span [{lo}, {hi}] s")
        return times


EVENT_KINDS = ("ascending_node", "descending_node", "periapsis", "apoapsis", "radius",
               "penumbra", "umbra")


@dataclass(frozen=True)
class EventSpec:
    """An event to locate on the dense output (time to < 1e-6 s).

    kind:
        ``ascending_node`` / ``descending_node``: z (GCRF) crosses 0 upward / downward;
        ``periapsis`` / ``apoapsis``: r.v crosses 0 upward / downward;
        ``radius``: |r| crosses ``radius_m`` (geocentric); ``direction`` "down", "up" or
        "both" (e.g. a terminal re-entry stop at R_earth + 100 km);
        ``penumbra``: the outer boundary of the Earth's penumbra; ``umbra``: the umbra
        boundary (conical shadow, ``forcemodels.shadow``); ``direction`` "entry", "exit"
        or "both".
    terminal: stop the propagation at the first such event (status "stopped by event").
    restart: discard the step that crosses the event, land exactly on it and restart
        with fresh stages (set automatically for shadow events by
        ``IntegratorSettings.restart_at_shadow``).
    """

    kind: str
    direction: str = "both"
    radius_m: float | None = None
    terminal: bool = False
    restart: bool = False
    name: str = field(default="")

    def __post_init__(self) -> None:
        if self.kind not in EVENT_KINDS:
            raise ValueError(f"unknown event kind {self.kind!r}; known: {', '.join(EVENT_KINDS)}")
        allowed = {"radius": ("down", "up", "both"), "penumbra": ("entry", "exit", "both"),
                   "umbra": ("entry", "exit", "both")}.get(self.kind, ("both",))
        if self.direction not in allowed:
            raise ValueError(f"event {self.kind!r}: direction must be one of {allowed}, got {self.direction!r}")
        if self.kind == "radius":
            if self.radius_m is None or not (math.isfinite(self.radius_m) and self.radius_m > 0.0):
                raise ValueError("event 'radius' needs radius_m > 0 (geocentric radius threshold [m])")
        elif self.radius_m is not None:
            raise ValueError(f"event {self.kind!r} takes no radius_m")
        if not self.name:
            object.__setattr__(self, "name", self.kind if self.direction == "both" else f"{self.kind}_{self.direction}")
