"""Batch-study configuration: a TOML study file -> validated, fully resolved cases.

A study file has four top-level tables (every key is documented in ``configs/README.md``):

``[study]``
    name, description, output file, number of worker processes, optional Dask scheduler
    address, segment length for writing long arcs, whether to draw plots.
``[defaults]``
    everything a case needs (epoch, duration, initial state, spacecraft, force models,
    integrator, output, stop conditions, optional fitting); each case starts from it.
``[cases.<name>]``
    one table per case, deep-merged over ``[defaults]`` (tables merge key by key, lists
    and values replace).  ``template = true`` makes a case a base for sweeps only.
``[[sweeps]]``
    generators of cases: a grid over dotted key paths (``"initial_state.raan_deg"``),
    cartesian product or zipped, and/or seeded Monte Carlo dispersions (normal or
    uniform) drawn with ``numpy.random.Generator(PCG64(seed))`` — the same seed gives
    the same cases on every machine.

:func:`load_study` returns a :class:`Study` whose ``cases`` are :class:`ResolvedCase`
objects (validated :class:`CaseConfig` + force-model list with every parameter filled);
:meth:`ResolvedCase.to_toml` gives the fully resolved case as TOML text (the HDF5 output
stores it, and :func:`case_from_toml` reads it back).

Every problem is reported at once in a :class:`StudyConfigError`, each message naming
the key path where the offending value was written (``cases.nav-b2.initial_state.
eccentricity``, ``defaults.forces[1].degree``, ``sweeps[0] (raan-grid).grid.
"initial_state.raan_dg"``), the value, and what is allowed; unknown keys get a
did-you-mean suggestion (difflib).  Physical impossibilities that need the dynamics
(perigee below the surface) or data (epoch outside the ephemeris / EOP span) are not
configuration errors: such a case fails at run time and the study carries on.
"""

from __future__ import annotations

import copy
import difflib
import functools
import itertools
import json
import math
import re
import tomllib
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Any, Literal, Optional, Union

import numpy as np
import pydantic
from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

__all__ = [
    "StudyConfigError",
    "StudySettings",
    "CaseConfig",
    "KeplerianState",
    "CartesianState",
    "EquinoctialState",
    "SpacecraftConfig",
    "IntegratorConfig",
    "OutputConfig",
    "StopConfig",
    "FittingConfig",
    "SweepConfig",
    "ResolvedCase",
    "Study",
    "load_study",
    "parse_study",
    "case_from_toml",
    "dumps_toml",
    "set_dotted",
    "get_dotted",
]

NAME_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9_.+-]*$"
"""Case, sweep and study names: letters, digits and ``_ . + -`` (they become HDF5 group names)."""
_NAME_RE = re.compile(NAME_PATTERN)
_NAME_RULE = "letters, digits and _ . + - (starting with a letter or digit)"

TOP_LEVEL_KEYS = ("study", "defaults", "cases", "sweeps")
MAX_CASES_PER_SWEEP = 100_000

# Mutually exclusive alternatives: giving one of them in an override (case, sweep)
# removes the others inherited from the base, so a case may say ``duration_days`` while
# the defaults say ``duration_s``.
_EXCLUSIVE_GROUPS: dict[tuple[str, ...], tuple[tuple[str, ...], ...]] = {
    (): (("duration_s", "duration_days", "end_epoch"),),
    ("initial_state",): (("true_anomaly_deg", "mean_anomaly_deg"),
                         ("mean_longitude_deg", "true_longitude_deg")),
    ("output",): (("step_s", "times_s"),),
}
# Tables whose ``kind`` selects the schema: a different kind in an override replaces
# the whole inherited table instead of merging into it.
_KIND_TABLES: frozenset[tuple[str, ...]] = frozenset({("initial_state",)})

# spacecraft key -> force-model parameter names it feeds when the model entry omits them
SPACECRAFT_FEEDS: dict[str, tuple[str, ...]] = {
    "mass_kg": ("mass_kg",),
    "srp_area_m2": ("srp_area_m2", "area_m2"),
    "cr": ("cr",),
}


# ======================================================================================
# Errors
# ======================================================================================
class StudyConfigError(ValueError):
    """Invalid study configuration; ``problems`` lists every problem found (one line each)."""

    def __init__(self, problems: list[str], source: str | Path | None = None) -> None:
        self.problems = list(problems)
        self.source = str(source) if source is not None else ""
        where = f" in {self.source}" if self.source else ""
        n = len(self.problems)
        text = f"{n} problem{'s' if n != 1 else ''} in the study configuration{where}:\n"
        text += "\n".join(f"  - {p}" for p in self.problems)
        super().__init__(text)


# ======================================================================================
# Schema (pydantic v2, extra keys forbidden everywhere)
# ======================================================================================
class _Section(BaseModel):
    """Base of all config tables: unknown keys are errors, no silent type coercion
    (an int is accepted where a float is expected), no inf/nan."""

    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False,
                              validate_default=False)


def _check_epoch_text(text: str) -> str:
    from propagator.timescales import Epoch

    Epoch.from_iso(text)  # raises ValueError naming what is expected
    return text


class StudySettings(_Section):
    """The ``[study]`` table."""

    name: str = Field("study", pattern=NAME_PATTERN, description="study name (HDF5 root attribute)")
    description: str = Field("", description="free text, copied to the output file")
    output: str = Field("", description="HDF5 output file; relative paths are relative to the study "
                                        "file's folder; default longarc-output/<name>.h5 in the "
                                        "current directory")
    workers: Optional[int] = Field(None, ge=1, le=4096,
                                   description="local worker processes (default: number of CPU cores)")
    dask_scheduler: Optional[str] = Field(None, min_length=1,
                                          description="address of a running Dask scheduler, e.g. "
                                                      "'tcp://10.0.0.5:8786'; cases then run there")
    segment_days: float = Field(1.0, gt=0.0, le=366.0,
                                description="long arcs are propagated and written this many days at a "
                                            "time, so memory stays bounded [d]")
    plots: bool = Field(True, description="draw summary plots (PNG) next to the output file")
    plot_cases: Optional[list[str]] = Field(None, description="cases whose element history and ground "
                                                             "track are drawn (default: the first two "
                                                             "explicit cases)")


class KeplerianState(_Section):
    """Osculating Keplerian elements in GCRF (elliptical orbits)."""

    kind: Literal["keplerian"]
    semi_major_axis_m: float = Field(gt=0.0, description="semi-major axis a [m]")
    eccentricity: float = Field(ge=0.0, lt=1.0, description="eccentricity e [-], 0 <= e < 1")
    inclination_deg: float = Field(ge=0.0, le=180.0, description="inclination i [deg]")
    raan_deg: float = Field(description="right ascension of the ascending node [deg]")
    arg_perigee_deg: float = Field(description="argument of perigee [deg]")
    true_anomaly_deg: Optional[float] = Field(None, description="true anomaly [deg] (or mean_anomaly_deg)")
    mean_anomaly_deg: Optional[float] = Field(None, description="mean anomaly [deg] (or true_anomaly_deg)")

    @model_validator(mode="after")
    def _one_anomaly(self) -> "KeplerianState":
        given = [k for k in ("true_anomaly_deg", "mean_anomaly_deg") if getattr(self, k) is not None]
        if len(given) != 1:
            raise ValueError("give exactly one of true_anomaly_deg, mean_anomaly_deg "
                             f"(got {', '.join(given) if given else 'neither'})")
        return self


class CartesianState(_Section):
    """Position and velocity in GCRF or ITRF (Earth-fixed velocity: relative to ITRF)."""

    kind: Literal["cartesian"]
    frame: Literal["GCRF", "ITRF"] = Field("GCRF", description="frame of position_m / velocity_m_s")
    position_m: list[float] = Field(min_length=3, max_length=3, description="position [m]")
    velocity_m_s: list[float] = Field(min_length=3, max_length=3, description="velocity [m/s]")

    @model_validator(mode="after")
    def _not_at_centre(self) -> "CartesianState":
        if math.hypot(*self.position_m) == 0.0:
            raise ValueError("position_m is the Earth's centre")
        return self


class EquinoctialState(_Section):
    """Equinoctial elements (Broucke & Cefola 1972, direct set) in GCRF:
    h = e sin(argp + RAAN), k = e cos(argp + RAAN), p = tan(i/2) sin RAAN,
    q = tan(i/2) cos RAAN, longitude = argp + RAAN + anomaly."""

    kind: Literal["equinoctial"]
    semi_major_axis_m: float = Field(gt=0.0, description="semi-major axis a [m]")
    h: float = Field(description="e sin(argp + RAAN) [-]")
    k: float = Field(description="e cos(argp + RAAN) [-]")
    p: float = Field(description="tan(i/2) sin(RAAN) [-]")
    q: float = Field(description="tan(i/2) cos(RAAN) [-]")
    mean_longitude_deg: Optional[float] = Field(None, description="mean longitude [deg] (or true_longitude_deg)")
    true_longitude_deg: Optional[float] = Field(None, description="true longitude [deg] (or mean_longitude_deg)")

    @model_validator(mode="after")
    def _check(self) -> "EquinoctialState":
        e = math.hypot(self.h, self.k)
        if e >= 1.0:
            raise ValueError(f"eccentricity sqrt(h^2 + k^2) = {e:.6g} must be < 1 (elliptical orbits only)")
        given = [k for k in ("mean_longitude_deg", "true_longitude_deg") if getattr(self, k) is not None]
        if len(given) != 1:
            raise ValueError("give exactly one of mean_longitude_deg, true_longitude_deg "
                             f"(got {', '.join(given) if given else 'neither'})")
        return self


InitialState = Annotated[Union[KeplerianState, CartesianState, EquinoctialState], Field(discriminator="kind")]


class SpacecraftConfig(_Section):
    """Spacecraft properties; they feed force models (e.g. solar radiation pressure)
    whose entries do not give the same parameter themselves."""

    name: str = Field("", description="display name, e.g. 'KESTREL-EO1'")
    mass_kg: Optional[float] = Field(None, gt=0.0, description="mass [kg]")
    srp_area_m2: Optional[float] = Field(None, gt=0.0, description="cross-section area facing the Sun [m^2]")
    cr: Optional[float] = Field(None, gt=0.0, le=2.0,
                                description="radiation-pressure coefficient [-], 0 < Cr <= 2")


class IntegratorConfig(_Section):
    """Adaptive Runge-Kutta settings, mapped onto ``propagator.integrators.settings.IntegratorSettings``.

    Keys left out take that class's defaults (filled in here, so the resolved case
    shows the values used).
    """

    method: Optional[str] = Field(None, description="Runge-Kutta pair: dop853, rk87 or rk54")
    relative_tolerance: Optional[float] = Field(None, ge=1e-15, lt=1.0, description="relative tolerance [-]")
    absolute_tolerance_m: Optional[float] = Field(None, gt=0.0, description="absolute tolerance on position [m]")
    absolute_tolerance_m_s: Optional[float] = Field(None, gt=0.0,
                                                    description="absolute tolerance on velocity [m/s]")
    initial_step_s: Optional[float] = Field(None, gt=0.0, description="first step [s] (default: automatic)")
    max_step_s: Optional[float] = Field(None, gt=0.0, description="largest step [s] (default: unlimited)")
    max_steps: Optional[int] = Field(None, ge=1, description="give up after this many steps per segment [-]")
    restart_at_shadow_boundaries: Optional[bool] = Field(
        None, description="end the step exactly at each Earth-shadow boundary and restart there "
                          "(removes the SRP kink error); default: when a force model has a shadow")

    @model_validator(mode="after")
    def _fill_defaults(self) -> "IntegratorConfig":
        try:
            from propagator.integrators.settings import IntegratorSettings
        except ImportError:  # pragma: no cover - integrators not installed
            return self
        d = IntegratorSettings()
        for mine, theirs in (("method", "method"), ("relative_tolerance", "rtol"),
                             ("absolute_tolerance_m", "atol_pos_m"), ("absolute_tolerance_m_s", "atol_vel_m_s"),
                             ("max_steps", "max_steps")):
            if getattr(self, mine) is None:
                setattr(self, mine, getattr(d, theirs))
        return self

    @field_validator("method")
    @classmethod
    def _known_method(cls, v: Optional[str]) -> Optional[str]:
        if v is None:
            return v
        try:
            from propagator.integrators.tableaus import METHODS
        except ImportError:  # pragma: no cover - integrators not installed
            return v
        if v.lower() not in METHODS:
            raise ValueError(f"unknown integration method{_suggest(v.lower(), sorted(METHODS))}; "
                             f"known methods: {', '.join(sorted(METHODS))}")
        return v.lower()


class OutputConfig(_Section):
    """Output grid and contents."""

    step_s: Optional[float] = Field(None, gt=0.0, description="output every step_s seconds [s] (default 60)")
    times_s: Optional[list[float]] = Field(None, min_length=1,
                                           description="explicit output times, seconds since the epoch [s]")
    itrf: bool = Field(False, description="also write Earth-fixed (ITRF) states")
    elements: bool = Field(False, description="also write osculating Keplerian elements")
    accelerations: bool = Field(False, description="also write each force model's acceleration")
    stm: bool = Field(False, description="also write the 6x6 state transition matrix")
    record_events: list[Literal["ascending_node", "descending_node", "periapsis", "apoapsis",
                                "penumbra", "umbra"]] = Field(
        default_factory=list, description="events to locate and store (times and states)")

    @model_validator(mode="after")
    def _grid(self) -> "OutputConfig":
        if self.step_s is not None and self.times_s is not None:
            raise ValueError("give step_s or times_s, not both")
        if self.step_s is None and self.times_s is None:
            self.step_s = 60.0
        if self.times_s is not None:
            t = self.times_s
            if any(b <= a for a, b in zip(t, t[1:])) and any(b >= a for a, b in zip(t, t[1:])):
                raise ValueError("times_s must be strictly monotonic")
            if len(set(t)) != len(t):
                raise ValueError("times_s has repeated values")
        return self


class StopConfig(_Section):
    """Conditions that end a case early (the case is then reported as failed, its data kept)."""

    min_altitude_m: Optional[float] = Field(
        0.0, ge=-6.0e6, le=1.0e9,
        description="stop when the geocentric distance falls below the WGS84 equatorial radius "
                    "plus this [m] (a sphere, not the ellipsoid)")


class FittingConfig(_Section):
    """Element fits of the propagated arc (``propagator.fitting``), stored under ``fits/``.

    Windows of ``window_hours`` start at the beginning of the arc every ``spacing_hours``;
    at most ``max_windows`` of them (fits read that part of the arc into memory).
    """

    element_sets: list[Literal["keplerian", "broadcast", "mean"]] = Field(
        default_factory=lambda: ["broadcast"], min_length=1,
        description="keplerian: two-body fit per window (GCRF); broadcast: broadcast-style set "
                    "per window (ITRF); mean: one-period averaged elements and secular rates")
    window_hours: float = Field(4.0, gt=0.0, le=240.0, description="length of each fit window [h]")
    spacing_hours: Optional[float] = Field(None, gt=0.0, le=8784.0,
                                           description="start-to-start spacing of windows [h] "
                                                       "(default: the window length)")
    max_windows: int = Field(6, ge=1, le=10000, description="fit at most this many windows [-]")


class CaseConfig(_Section):
    """Everything one case needs.  Exactly one of duration_s / duration_days / end_epoch."""

    description: str = Field("", description="free text")
    epoch: str = Field(description="initial epoch, ISO 8601 with a time scale, e.g. '2031-03-20T12:00:00 UTC'")
    duration_s: Optional[float] = Field(None, description="propagation span [s] (negative: backwards)")
    duration_days: Optional[float] = Field(None, description="propagation span [d] (negative: backwards)")
    end_epoch: Optional[str] = Field(None, description="final epoch, ISO 8601 with a time scale")
    initial_state: InitialState
    spacecraft: SpacecraftConfig = Field(default_factory=SpacecraftConfig)
    forces: list[dict[str, Any]] = Field(min_length=1, description="force models, each {model = name, ...}")
    integrator: IntegratorConfig = Field(default_factory=IntegratorConfig)
    output: OutputConfig = Field(default_factory=OutputConfig)
    stop: StopConfig = Field(default_factory=StopConfig)
    fitting: Optional[FittingConfig] = Field(None, description="element fits; omit to skip")

    @field_validator("epoch", "end_epoch")
    @classmethod
    def _epoch_text(cls, v: Optional[str]) -> Optional[str]:
        return v if v is None else _check_epoch_text(v)

    @model_validator(mode="after")
    def _duration(self) -> "CaseConfig":
        given = [k for k in ("duration_s", "duration_days", "end_epoch") if getattr(self, k) is not None]
        if len(given) != 1:
            raise ValueError("give exactly one of duration_s, duration_days, end_epoch "
                             f"(got {', '.join(given) if given else 'none'})")
        if self.duration_s == 0.0 or self.duration_days == 0.0:
            raise ValueError("the duration must not be zero")
        return self

    # --- helpers for the runner -----------------------------------------------------
    def duration_seconds(self) -> float:
        """Signed span [s]; end_epoch is converted via the time scales (may raise at run time)."""
        if self.duration_s is not None:
            return float(self.duration_s)
        if self.duration_days is not None:
            return float(self.duration_days) * 86400.0
        from propagator.timescales import Epoch

        return float(Epoch.from_iso(self.end_epoch) - Epoch.from_iso(self.epoch))

    def output_step_s(self) -> Optional[float]:
        """Output step [s], or None when explicit times_s are given."""
        return None if self.output.times_s is not None else float(self.output.step_s)


class RangeConfig(_Section):
    """An inclusive range of values for a grid axis: ``{first, last, step}`` or ``{first, last, count}``."""

    first: float
    last: float
    step: Optional[float] = None
    count: Optional[int] = Field(None, ge=1, le=MAX_CASES_PER_SWEEP)

    @model_validator(mode="after")
    def _check(self) -> "RangeConfig":
        if (self.step is None) == (self.count is None):
            raise ValueError("give exactly one of step, count")
        if self.step is not None:
            if self.step == 0.0:
                raise ValueError("step must not be zero")
            n = (self.last - self.first) / self.step
            if n < -1e-9:
                raise ValueError(f"step {self.step} does not lead from first={self.first} to last={self.last}")
            if n > MAX_CASES_PER_SWEEP:
                raise ValueError(f"range has {int(n) + 1} values (at most {MAX_CASES_PER_SWEEP})")
        if self.count == 1 and self.first != self.last:
            raise ValueError("count = 1 needs first == last")
        return self

    def values(self) -> list[float | int]:
        if self.step is not None:
            n = int(math.floor((self.last - self.first) / self.step + 1e-9)) + 1
            vals = [self.first + i * self.step for i in range(n)]
        else:
            n = int(self.count)
            vals = [self.first] if n == 1 else [self.first + (self.last - self.first) * i / (n - 1)
                                                for i in range(n)]
        return [float(v) for v in vals]


class DispersionConfig(_Section):
    """A Monte Carlo dispersion of one numeric key.

    normal: value = mean + sigma * N(0, 1) (mean defaults to the base case's value);
    uniform: value ~ U(low, high), or U(base - half_width, base + half_width).
    """

    distribution: Literal["normal", "uniform"]
    mean: Optional[float] = None
    sigma: Optional[float] = Field(None, ge=0.0)
    low: Optional[float] = None
    high: Optional[float] = None
    half_width: Optional[float] = Field(None, ge=0.0)

    @model_validator(mode="after")
    def _check(self) -> "DispersionConfig":
        if self.distribution == "normal":
            if self.sigma is None:
                raise ValueError("a normal dispersion needs sigma")
            extra = [k for k in ("low", "high", "half_width") if getattr(self, k) is not None]
            if extra:
                raise ValueError(f"a normal dispersion takes mean and sigma, not {', '.join(extra)}")
        else:
            extra = [k for k in ("mean", "sigma") if getattr(self, k) is not None]
            if extra:
                raise ValueError(f"a uniform dispersion takes low/high or half_width, not {', '.join(extra)}")
            bounds = self.low is not None or self.high is not None
            if bounds == (self.half_width is not None):
                raise ValueError("a uniform dispersion needs either low and high, or half_width")
            if bounds and (self.low is None or self.high is None or not self.low < self.high):
                raise ValueError("a uniform dispersion needs low < high")
        return self


class SweepConfig(_Section):
    """One ``[[sweeps]]`` entry."""

    name: str = Field(pattern=NAME_PATTERN, description="sweep name; generated cases are <name>-<index>")
    description: str = ""
    base: Optional[str] = Field(None, description="case to start from (default: [defaults])")
    combine: Literal["product", "zip"] = Field("product", description="grid axes: cartesian product or zipped")
    grid: dict[str, Any] = Field(default_factory=dict, description="dotted key -> list of values or range")
    samples: Optional[int] = Field(None, ge=1, le=MAX_CASES_PER_SWEEP, description="Monte Carlo samples per grid point")
    seed: Optional[int] = Field(None, ge=0, description="seed of numpy's PCG64 generator")
    dispersions: dict[str, DispersionConfig] = Field(default_factory=dict, description="dotted key -> dispersion")
    overrides: dict[str, Any] = Field(default_factory=dict, description="case keys set in every generated case")

    @model_validator(mode="after")
    def _check(self) -> "SweepConfig":
        if not self.grid and not self.dispersions:
            raise ValueError("a sweep needs a grid table, a dispersions table, or both")
        if self.dispersions and (self.samples is None or self.seed is None):
            missing = [k for k in ("samples", "seed") if getattr(self, k) is None]
            raise ValueError(f"Monte Carlo dispersions need {' and '.join(missing)} (the seed makes "
                             "the draws reproducible)")
        if not self.dispersions and (self.samples is not None or self.seed is not None):
            raise ValueError("samples/seed are given but there is no dispersions table")
        both = set(self.grid) & set(self.dispersions)
        if both:
            raise ValueError(f"key(s) {', '.join(sorted(both))} are both in grid and dispersions")
        return self


# ======================================================================================
# Resolved cases
# ======================================================================================
@dataclass
class ResolvedCase:
    """One fully resolved case.

    ``forces`` is the force-model list as ``(name, params)`` with every parameter filled
    (defaults of the model, spacecraft values fed in); ``origin`` says where the case
    came from (``cases.<name>`` or ``sweeps[i] (<sweep>) #k``); ``sweep_values`` the
    values a sweep set (dotted key -> value).
    """

    name: str
    config: CaseConfig
    forces: list[tuple[str, dict[str, Any]]]
    origin: str = ""
    sweep_values: dict[str, Any] = field(default_factory=dict)
    sweep: str = ""
    base_case: Optional[str] = None

    def resolved_dict(self) -> dict[str, Any]:
        """The case as plain data (what :meth:`to_toml` writes)."""
        d = self.config.model_dump(mode="python", exclude_none=True)
        d["forces"] = [{"model": n, **copy.deepcopy(p)} for n, p in self.forces]
        return d

    def preflight(self) -> list[str]:
        """Problems that would stop this case before integration, found without running it.

        Prepares every force model for the case's epoch and span exactly as the run does
        (reads gravity-field files, checks the ephemeris span), so a missing or malformed
        ``.gfc``, a degree above the file's maximum or an epoch outside every ephemeris is
        reported by ``longarc check``.  Returns one message per problem (empty if none).
        """
        from forcemodels import registry
        from propagator.timescales import Epoch

        try:
            epoch = Epoch.from_iso(self.config.epoch)
            setup = registry.CaseSetup(epoch=epoch, t_start=0.0, t_end=self.config.duration_seconds())
        except ValueError as exc:
            return [f"case {self.name!r}: {exc}"]
        problems = []
        for name, params in self.forces:
            try:
                registry.prepare(name, params, setup)
            except (ValueError, OSError) as exc:
                problems.append(f"case {self.name!r}, force model {name!r}: {exc}")
        return problems

    def force_dicts(self) -> list[dict[str, Any]]:
        """Force models as ``[{"model": name, **params}, ...]`` (for the output file)."""
        return [{"model": n, **copy.deepcopy(p)} for n, p in self.forces]

    def to_toml(self) -> str:
        """Fully resolved case as TOML text (readable back with :func:`case_from_toml`)."""
        head = [f"# longarc case {self.name!r}, fully resolved"]
        if self.origin:
            head.append(f"# from {self.origin}")
        if self.sweep:
            head.append(f"# sweep {self.sweep}" + (f" based on case {self.base_case}" if self.base_case else ""))
        for k, v in self.sweep_values.items():
            head.append(f"# sweep value {k} = {_toml_value(v)}")
        # what resolved_dict() gives, without copying the force parameters (only read here)
        d = self.config.model_dump(mode="python", exclude_none=True)
        d["forces"] = [{"model": n, **p} for n, p in self.forces]
        return "\n".join(head) + "\n" + dumps_toml(d)


@dataclass
class Study:
    """A validated study: settings + resolved cases (templates excluded)."""

    settings: StudySettings
    cases: list[ResolvedCase]
    path: Optional[Path] = None
    templates: list[str] = field(default_factory=list)

    @property
    def name(self) -> str:
        return self.settings.name

    def output_path(self, override: str | Path | None = None) -> Path:
        """Where the HDF5 file goes: ``override``, else ``[study] output`` (relative to the
        study file's folder), else ``longarc-output/<name>.h5`` in the current directory."""
        if override:
            return Path(override).expanduser().resolve()
        if self.settings.output:
            p = Path(self.settings.output).expanduser()
            if not p.is_absolute() and self.path is not None:
                p = self.path.parent / p
            return p.resolve()
        return (Path.cwd() / "longarc-output" / f"{self.name}.h5").resolve()

    def case(self, name: str) -> ResolvedCase:
        for c in self.cases:
            if c.name == name:
                return c
        close = difflib.get_close_matches(name, [c.name for c in self.cases], n=1)
        raise KeyError(f"no case {name!r} in study {self.name!r}"
                       + (f" (did you mean {close[0]!r}?)" if close else ""))


# ======================================================================================
# Key paths and provenance
# ======================================================================================
Path_ = tuple[Union[str, int], ...]


def _join(prefix: str, path: Path_) -> str:
    rest = _dotted(path)
    return prefix if not rest else prefix + ("" if rest.startswith("[") else ".") + rest


def _dotted(path: Path_) -> str:
    out = ""
    for seg in path:
        if isinstance(seg, int):
            out += f"[{seg}]"
        else:
            s = seg if re.fullmatch(r"[A-Za-z0-9_+-]+", seg) else json.dumps(seg)
            out += ("." if out else "") + s
    return out


@dataclass(frozen=True)
class _Origin:
    """Where a value was written: ``prefix`` + path relative to ``base``."""

    prefix: str
    base: Path_ = ()

    def display(self, path: Path_) -> str:
        rest = _dotted(tuple(path[len(self.base):]))
        if not rest:
            return self.prefix
        if not self.prefix:
            return rest
        return self.prefix + ("" if rest.startswith("[") else ".") + rest


class _Origins:
    """Provenance of every value of a merged case dict (path -> origin)."""

    def __init__(self) -> None:
        self.map: dict[Path_, _Origin] = {}

    def copy(self) -> "_Origins":
        o = _Origins()
        o.map = dict(self.map)
        return o

    def drop(self, path: Path_) -> None:
        n = len(path)
        for p in [p for p in self.map if p[:n] == path]:
            del self.map[p]

    def record(self, path: Path_, value: Any, origin: _Origin) -> None:
        self.map[path] = origin
        if isinstance(value, dict):
            for k, v in value.items():
                self.record(path + (k,), v, origin)
        elif isinstance(value, list):
            for i, v in enumerate(value):
                if isinstance(v, (dict, list)):
                    self.record(path + (i,), v, origin)

    def display(self, path: Path_, fallback: str) -> str:
        n = len(path)
        mixed = {o.prefix for p, o in self.map.items() if p[:n] == tuple(path)}
        if len(mixed) > 1:  # a table merged from several places: name it in the case
            return _Origin(fallback).display(path)
        for n in range(len(path), 0, -1):  # a key missing at the top belongs to the case
            o = self.map.get(tuple(path[:n]))
            if o is not None:
                return o.display(path)
        return _Origin(fallback).display(path)


def _merge(base: dict, over: dict, origins: _Origins, origin: _Origin, path: Path_ = ()) -> dict:
    """Deep-merge ``over`` into a copy of ``base`` (tables merge, everything else replaces)."""
    out = dict(base)
    if path in _KIND_TABLES and "kind" in over and out.get("kind") != over.get("kind"):
        out = {}
        origins.drop(path)
    for group in _EXCLUSIVE_GROUPS.get(path, ()):
        if any(k in over for k in group):
            for k in group:
                if k not in over and k in out:
                    del out[k]
                    origins.drop(path + (k,))
    for k, v in over.items():
        if isinstance(v, dict) and isinstance(out.get(k), dict):
            out[k] = _merge(out[k], v, origins, origin, path + (k,))
        else:
            out[k] = copy.deepcopy(v)
            origins.drop(path + (k,))
            origins.record(path + (k,), v, origin)
    return out


def _split_key(key: str) -> list[str]:
    parts = key.split(".")
    if not key or any(p == "" for p in parts):
        raise ValueError(f"malformed key path {key!r}: use dotted names like 'initial_state.raan_deg'")
    return parts


def _step_into_list(lst: list, seg: str, key: str) -> int:
    """A list segment is an index or, for the force list, a model name."""
    if re.fullmatch(r"\d+", seg):
        i = int(seg)
        if i >= len(lst):
            raise ValueError(f"key path {key!r}: index {i} is past the end of a list of {len(lst)}")
        return i
    hits = [i for i, e in enumerate(lst) if isinstance(e, dict) and e.get("model") == seg]
    if len(hits) != 1:
        names = [e.get("model") for e in lst if isinstance(e, dict)]
        close = difflib.get_close_matches(seg, [str(n) for n in names], n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        raise ValueError(f"key path {key!r}: no force model {seg!r} in this case's forces "
                         f"(has {', '.join(map(str, names)) or 'none'}){hint}")
    return hits[0]


def set_dotted(d: dict, key: str, value: Any) -> Path_:
    """Set ``d[a][b]... = value`` for ``key = "a.b..."`` (creating tables as needed).

    In a list, a segment is an index or a force-model name (``forces.solar_radiation.cr``).
    Returns the concrete path that was set.
    """
    parts = _split_key(key)
    node: Any = d
    path: list[str | int] = []
    for seg in parts[:-1]:
        if isinstance(node, list):
            i = _step_into_list(node, seg, key)
            path.append(i)
            node = node[i]
            continue
        if not isinstance(node, dict):
            raise ValueError(f"key path {key!r}: {_dotted(tuple(path)) or 'root'} is a value, not a table")
        if seg not in node or not isinstance(node[seg], (dict, list)):
            node[seg] = {}
        path.append(seg)
        node = node[seg]
    last = parts[-1]
    if isinstance(node, list):
        i = _step_into_list(node, last, key)
        node[i] = value
        path.append(i)
    elif isinstance(node, dict):
        node[last] = value
        path.append(last)
    else:
        raise ValueError(f"key path {key!r}: {_dotted(tuple(path))} is a value, not a table")
    return tuple(path)


def get_dotted(d: dict, key: str) -> Any:
    """``d[a][b]...`` for ``key = "a.b..."`` (KeyError if absent)."""
    node: Any = d
    for seg in _split_key(key):
        if isinstance(node, list):
            node = node[_step_into_list(node, seg, key)]
        elif isinstance(node, dict) and seg in node:
            node = node[seg]
        else:
            raise KeyError(key)
    return node


# ======================================================================================
# Pydantic error -> message naming the key path
# ======================================================================================
def _show(v: Any) -> str:
    try:
        s = _toml_value(v)
    except TypeError:
        s = repr(v)
    return s if len(s) <= 80 else s[:77] + "..."


def _model_members(ann: Any) -> list[type[BaseModel]]:
    """BaseModel classes inside an annotation (Optional / Union / Annotated)."""
    origin = typing.get_origin(ann)
    if origin is Annotated:
        return _model_members(typing.get_args(ann)[0])
    if origin in (Union, types.UnionType):
        out: list[type[BaseModel]] = []
        for a in typing.get_args(ann):
            out.extend(_model_members(a))
        return out
    if isinstance(ann, type) and issubclass(ann, BaseModel):
        return [ann]
    return []


def _tag_of(cls: type[BaseModel]) -> Optional[str]:
    f = cls.model_fields.get("kind")
    if f is None:
        return None
    args = typing.get_args(f.annotation)
    return args[0] if args else None


def _walk_loc(root: type[BaseModel], loc: tuple) -> tuple[Path_, Optional[type[BaseModel]]]:
    """Clean a pydantic ``loc`` (drop union tags) and find the model owning its last key."""
    clean: list[str | int] = []
    cur: Optional[type[BaseModel]] = root
    owner: Optional[type[BaseModel]] = root
    i = 0
    while i < len(loc):
        seg = loc[i]
        owner = cur
        if cur is not None and isinstance(seg, str) and seg in cur.model_fields:
            clean.append(seg)
            ann = cur.model_fields[seg].annotation
            if typing.get_origin(ann) in (Union, types.UnionType):
                inner = [a for a in typing.get_args(ann) if a is not type(None)]
                ann = inner[0] if len(inner) == 1 else ann
            if typing.get_origin(ann) in (dict, list) and i + 1 < len(loc):
                # a table of tables / list of tables: the next segment is a key or index
                members = _model_members(typing.get_args(ann)[-1])
                clean.append(loc[i + 1])
                i += 2
                cur = members[0] if len(members) == 1 else None
                continue
            members = _model_members(ann)
            i += 1
            if len(members) > 1 and i < len(loc) and isinstance(loc[i], str):
                tagged = [m for m in members if _tag_of(m) == loc[i]]
                if tagged:
                    i += 1
                cur = tagged[0] if tagged else None
            else:
                cur = members[0] if len(members) == 1 else None
            continue
        clean.append(seg)
        cur = None
        i += 1
    return tuple(clean), owner


def _suggest(word: str, allowed: list[str]) -> str:
    close = difflib.get_close_matches(str(word), allowed, n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _pydantic_problems(exc: pydantic.ValidationError, root: type[BaseModel], where) -> list[tuple[Path_, str]]:
    """Messages for each error of ``exc``; ``where(path) -> display key path``."""
    out: list[tuple[Path_, str]] = []
    for err in exc.errors(include_url=False):
        path, owner = _walk_loc(root, tuple(err["loc"]))
        typ = err["type"]
        shown = where(path)
        if typ == "missing":
            desc = ""
            if owner is not None and path and path[-1] in owner.model_fields:
                d = owner.model_fields[path[-1]].description
                desc = f" ({d})" if d else ""
            out.append((path, f"{shown}: required key is missing{desc}"))
        elif typ == "extra_forbidden":
            allowed = sorted(owner.model_fields) if owner is not None else []
            if owner is CaseConfig:
                allowed = sorted(allowed + ["template"])
            hint = _suggest(str(path[-1]), allowed)
            if not hint and owner in (KeplerianState, CartesianState, EquinoctialState):
                hint = (f" (these are the keys of kind = {_tag_of(owner)!r}; set kind to switch "
                        "representation)")
            out.append((path, f"{shown}: unknown key{hint}. Allowed keys: {', '.join(allowed)}"))
        elif typ in ("union_tag_invalid", "union_tag_not_found"):
            tags = [t for t in (_tag_of(m) for m in (KeplerianState, CartesianState, EquinoctialState))]
            if typ == "union_tag_not_found":
                out.append((path, f"{where(path + ('kind',))}: required key is missing (one of "
                                  f"{', '.join(map(repr, tags))})"))
            else:
                bad = err.get("ctx", {}).get("tag", "")
                out.append((path, f"{where(path + ('kind',))} = {_show(bad)}: not an allowed kind"
                                  f"{_suggest(bad, tags)}. Allowed: {', '.join(map(repr, tags))}"))
        else:
            msg = err["msg"]
            for pre in ("Value error, ", "Assertion failed, "):
                msg = msg.removeprefix(pre)
            desc = ""
            if owner is not None and path and isinstance(path[-1], str) and path[-1] in owner.model_fields:
                d = owner.model_fields[path[-1]].description
                desc = f" [{d}]" if d else ""
            inp = err.get("input")
            if not isinstance(inp, dict) or typ.endswith("_type"):
                out.append((path, f"{shown} = {_show(inp)}: {msg}{desc}"))
            else:
                out.append((path, f"{shown}: {msg}{desc}"))
    return out


# ======================================================================================
# Loading
# ======================================================================================
def load_study(path: str | Path) -> Study:
    """Read, validate and expand the study file at ``path``.

    Raises :class:`StudyConfigError` (a ``ValueError``) listing every problem found.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise StudyConfigError([f"cannot read the study file: {exc}"], source=path) from None
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise StudyConfigError([f"not UTF-8 text: {exc}"], source=path) from None
    except tomllib.TOMLDecodeError as exc:
        raise StudyConfigError([f"not valid TOML: {exc}"], source=path) from None
    return parse_study(data, path=path)


def parse_study(data: dict[str, Any], *, path: str | Path | None = None) -> Study:
    """Validate and expand an already parsed study (``tomllib`` output)."""
    path = Path(path).resolve() if path is not None else None
    problems = _Problems()

    for k in data:
        if k not in TOP_LEVEL_KEYS:
            problems.add(f"{_dotted((k,))}: unknown top-level table{_suggest(k, list(TOP_LEVEL_KEYS))} "
                         f"Allowed: {', '.join(TOP_LEVEL_KEYS)}")

    # --- [study] -----------------------------------------------------------------------
    study_raw = data.get("study", {})
    settings = StudySettings(name=path.stem if path is not None and _NAME_RE.match(path.stem) else "study")
    if not isinstance(study_raw, dict):
        problems.add(f"study = {_show(study_raw)}: must be a table [study]")
    else:
        raw = dict(study_raw)
        raw.setdefault("name", settings.name)
        try:
            settings = StudySettings.model_validate(raw)
        except pydantic.ValidationError as exc:
            for _, msg in _pydantic_problems(exc, StudySettings, lambda p: _join("study", p)):
                problems.add(msg)

    # --- [defaults] ------------------------------------------------------------------
    defaults = data.get("defaults", {})
    if not isinstance(defaults, dict):
        problems.add(f"defaults = {_show(defaults)}: must be a table [defaults]")
        defaults = {}
    base_origins = _Origins()
    base_origins.record((), defaults, _Origin("defaults"))

    # --- [cases.*] -------------------------------------------------------------------
    cases_raw = data.get("cases", {})
    if not isinstance(cases_raw, dict):
        problems.add(f"cases = {_show(cases_raw)}: must be tables [cases.<name>]")
        cases_raw = {}
    merged: dict[str, tuple[dict, _Origins, str, dict, str]] = {}  # name -> (dict, origins, origin, sweep values, fallback)
    templates: list[str] = []
    order: list[str] = []
    for name, body in cases_raw.items():
        label = f"cases.{_dotted((name,))}"
        if not _NAME_RE.match(name):
            problems.add(f"{label}: bad case name {name!r}: use {_NAME_RULE}")
            continue
        if not isinstance(body, dict):
            problems.add(f"{label} = {_show(body)}: a case must be a table")
            continue
        body = dict(body)
        template = body.pop("template", False)
        if not isinstance(template, bool):
            problems.add(f"{label}.template = {_show(template)}: must be true or false")
            template = False
        origins = base_origins.copy()
        d = _merge(defaults, body, origins, _Origin(label))
        merged[name] = (d, origins, label, {}, label)
        order.append(name)
        if template:
            templates.append(name)

    # --- [[sweeps]] ------------------------------------------------------------------
    sweeps_raw = data.get("sweeps", [])
    if not isinstance(sweeps_raw, list):
        problems.add("sweeps: must be an array of tables [[sweeps]]")
        sweeps_raw = []
    sweep_of: dict[str, tuple[str, Optional[str]]] = {}
    for k, sw_raw in enumerate(sweeps_raw):
        label = f"sweeps[{k}]"
        if isinstance(sw_raw, dict) and isinstance(sw_raw.get("name"), str):
            label += f" ({sw_raw['name']})"
        if not isinstance(sw_raw, dict):
            problems.add(f"{label} = {_show(sw_raw)}: a sweep must be a table [[sweeps]]")
            continue
        try:
            sweep = SweepConfig.model_validate(sw_raw)
        except pydantic.ValidationError as exc:
            for _, msg in _pydantic_problems(exc, SweepConfig, lambda p, lb=label: _join(lb, p)):
                problems.add(msg)
            continue
        for name, d, origins, values, origin, sw_name, sw_base in _expand_sweep(
                sweep, label, defaults, base_origins, merged, problems):
            if name in merged:
                problems.add(f"{label}: generated case name {name!r} is already used "
                             f"by {merged[name][2]}; rename the sweep")
                continue
            merged[name] = (d, origins, origin, values, f"{label} case {name}")
            order.append(name)
            sweep_of[name] = (sw_name, sw_base)

    # --- validate every case -----------------------------------------------------------
    base_dir = path.parent if path is not None else Path.cwd()
    resolved: list[ResolvedCase] = []
    for name in order:
        if name in templates:
            continue
        d, origins, origin, values, fallback = merged[name]
        case = _validate_case(name, d, origins, origin, values, fallback, base_dir, problems)
        if case is not None:
            case.sweep, case.base_case = sweep_of.get(name, ("", None))
            resolved.append(case)
    known = {c.name for c in resolved}
    for i, n in enumerate(settings.plot_cases or []):
        if n not in known and n in merged and n not in templates:
            continue  # invalid case: already reported
        if n not in known:
            problems.add(f"study.plot_cases[{i}] = {_show(n)}: no such case{_suggest(n, sorted(known))}")
    if not resolved and not problems.items:
        problems.add("the study has no cases: add [cases.<name>] tables (not all templates) or [[sweeps]]")
    if problems.items:
        raise StudyConfigError(problems.render(), source=path)
    return Study(settings=settings, cases=resolved, path=path, templates=templates)


class _Problems:
    """Problem collector; a problem from [defaults] or a sweep shows once, with the cases it hits."""

    def __init__(self) -> None:
        self.items: dict[str, list[str]] = {}

    def add(self, msg: str, case: str | None = None) -> None:
        cases = self.items.setdefault(msg, [])
        if case is not None and case not in cases:
            cases.append(case)

    def render(self) -> list[str]:
        out = []
        for msg, cases in self.items.items():
            if cases and not any(f"cases.{c}" in msg for c in cases):
                shown = ", ".join(cases[:3]) + (f" and {len(cases) - 3} more" if len(cases) > 3 else "")
                msg += f" (case{'s' if len(cases) > 1 else ''} {shown})"
            out.append(msg)
        return out


def _expand_sweep(sweep: SweepConfig, label: str, defaults: dict, base_origins: _Origins,
                  merged: dict, problems: _Problems):
    """Yield ``(name, dict, origins, sweep_values, origin)`` for each generated case."""
    if sweep.base is not None:
        if sweep.base not in merged:
            problems.add(f"{label}.base = {_show(sweep.base)}: no such case"
                         f"{_suggest(sweep.base, list(merged))}. Known cases: {', '.join(merged) or 'none'}")
            return
        base_dict, base_orig = merged[sweep.base][0], merged[sweep.base][1]
    else:
        base_dict, base_orig = defaults, base_origins
    origins0 = base_orig.copy()
    base = _merge(base_dict, sweep.overrides, origins0, _Origin(f"{label}.overrides"))

    # grid axes
    axes: list[tuple[str, list[Any]]] = []
    ok = True
    for key, spec in sweep.grid.items():
        where = f"{label}.grid.{json.dumps(key)}"
        try:
            _split_key(key)
        except ValueError as exc:
            problems.add(f"{where}: {exc}")
            ok = False
            continue
        if isinstance(spec, list):
            if not spec:
                problems.add(f"{where} = []: a grid axis needs at least one value")
                ok = False
                continue
            axes.append((key, spec))
        elif isinstance(spec, dict):
            try:
                rng_spec = RangeConfig.model_validate(spec)
                vals = rng_spec.values()
                if all(isinstance(spec.get(k, 0), int) and not isinstance(spec.get(k, 0), bool)
                       for k in ("first", "last", "step")) and "step" in spec:
                    vals = [int(round(v)) for v in vals]
                axes.append((key, vals))
            except pydantic.ValidationError as exc:
                for _, msg in _pydantic_problems(exc, RangeConfig, lambda p, w=where: _join(w, p)):
                    problems.add(msg)
                ok = False
        else:
            problems.add(f"{where} = {_show(spec)}: a grid axis is a list of values or a range table "
                         "{first, last, step} / {first, last, count}")
            ok = False
    if sweep.combine == "zip" and axes:
        lengths = {k: len(v) for k, v in axes}
        if len(set(lengths.values())) > 1:
            problems.add(f"{label}.combine = \"zip\": grid axes must have equal lengths, got "
                         + ", ".join(f"{k}: {n}" for k, n in lengths.items()))
            ok = False
    if not ok:
        return
    if not axes:
        points: list[tuple] = [()]
    elif sweep.combine == "zip":
        points = list(zip(*[v for _, v in axes]))
    else:
        points = list(itertools.product(*[v for _, v in axes]))
    samples = sweep.samples or 1
    total = len(points) * samples
    if total > MAX_CASES_PER_SWEEP:
        problems.add(f"{label}: expands to {total} cases (at most {MAX_CASES_PER_SWEEP})")
        return

    # Monte Carlo draws: one Generator(PCG64(seed)); each dispersion in the order written
    # draws all its values at once (grid point major, sample minor).
    draws: dict[str, np.ndarray] = {}
    if sweep.dispersions:
        rng = np.random.Generator(np.random.PCG64(sweep.seed))
        for key, disp in sweep.dispersions.items():
            where = f"{label}.dispersions.{json.dumps(key)}"
            centre = None
            if (disp.distribution == "normal" and disp.mean is None) or disp.half_width is not None:
                try:
                    centre = get_dotted(base, key)
                except (KeyError, ValueError, IndexError, TypeError):
                    centre = None
                if isinstance(centre, bool) or not isinstance(centre, (int, float)):
                    problems.add(f"{where}: the base case has no numeric value at this key "
                                 f"(found {_show(centre) if centre is not None else 'nothing'}); "
                                 "give mean (normal) or low/high (uniform)")
                    ok = False
                    continue
            if disp.distribution == "normal":
                mean = disp.mean if disp.mean is not None else float(centre)
                draws[key] = rng.normal(mean, disp.sigma, size=total)
            else:
                lo, hi = ((disp.low, disp.high) if disp.half_width is None
                          else (float(centre) - disp.half_width, float(centre) + disp.half_width))
                draws[key] = rng.uniform(lo, hi, size=total)
    if not ok:
        return

    width = max(2, len(str(total - 1)))
    idx = 0
    for point in points:
        for s in range(samples):
            name = f"{sweep.name}-{idx:0{width}d}"
            d = copy.deepcopy(base)
            origins = origins0.copy()
            values: dict[str, Any] = {}
            bad = False
            for (key, _), value in zip(axes, point):
                bad |= not _apply(d, origins, key, value, _Origin(f"{label}.grid.{json.dumps(key)}"),
                                  label, problems)
                values[key] = value
            for key, arr in draws.items():
                value = float(arr[idx])
                bad |= not _apply(d, origins, key, value, _Origin(f"{label}.dispersions.{json.dumps(key)}"),
                                  label, problems)
                values[key] = value
            idx += 1
            if bad:
                continue
            yield name, d, origins, values, f"{label} #{idx - 1}", sweep.name, sweep.base


def _apply(d: dict, origins: _Origins, key: str, value: Any, origin: _Origin, label: str,
           problems: _Problems) -> bool:
    try:
        path = set_dotted(d, key, copy.deepcopy(value))
    except ValueError as exc:
        problems.add(f"{origin.prefix}: {exc}")
        return False
    origins.drop(path)
    origins.record(path, value, _Origin(origin.prefix, path))
    return True


def _validate_case(name: str, d: dict, origins: _Origins, origin: str, values: dict, fallback: str,
                   base_dir: Path, problems: _Problems) -> Optional[ResolvedCase]:
    where = lambda p: origins.display(p, fallback)  # noqa: E731
    n_before = len(problems.items)
    config: Optional[CaseConfig] = None
    try:
        config = CaseConfig.model_validate(d)
    except pydantic.ValidationError as exc:
        for _, msg in _pydantic_problems(exc, CaseConfig, where):
            problems.add(msg, name)
    forces = _validate_forces(name, d, config, where, base_dir, problems)
    if config is None or forces is None or len(problems.items) > n_before:
        return None
    config = config.model_copy(update={"forces": [{"model": n, **copy.deepcopy(p)} for n, p in forces]})
    return ResolvedCase(name=name, config=config, forces=forces, origin=origin, sweep_values=values)


def _validate_forces(name: str, d: dict, config: Optional[CaseConfig], where, base_dir: Path,
                     problems: _Problems) -> Optional[list[tuple[str, dict]]]:
    from forcemodels import registry

    entries = d.get("forces")
    if not isinstance(entries, list):
        return None  # reported by pydantic (missing / wrong type)
    spacecraft = d.get("spacecraft") if isinstance(d.get("spacecraft"), dict) else {}
    known = registry.known_names()
    out: list[tuple[str, dict]] = []
    seen: dict[str, int] = {}
    ok = True
    for i, entry in enumerate(entries):
        path: Path_ = ("forces", i)
        if not isinstance(entry, dict):
            ok = False
            continue  # reported by pydantic
        model_name = entry.get("model")
        if model_name is None:
            problems.add(f"{where(path + ('model',))}: required key is missing (the force model's name, "
                         f"one of {', '.join(known)})", name)
            ok = False
            continue
        if not isinstance(model_name, str) or model_name not in known:
            problems.add(f"{where(path + ('model',))} = {_show(model_name)}: unknown force model"
                         f"{_suggest(str(model_name), known)}. Known models: {', '.join(known)}", name)
            ok = False
            continue
        if model_name in seen:
            problems.add(f"{where(path + ('model',))} = {_show(model_name)}: force model listed twice "
                         f"(also forces[{seen[model_name]}])", name)
            ok = False
            continue
        seen[model_name] = i
        spec = registry.get(model_name)
        params = {k: v for k, v in entry.items() if k != "model"}
        fields = spec.params.model_fields
        fed: dict[str, str] = {}
        for sc_key, targets in SPACECRAFT_FEEDS.items():
            if sc_key in spacecraft and spacecraft[sc_key] is not None:
                for t in targets:
                    if t in fields and t not in params:
                        params[t] = spacecraft[sc_key]
                        fed[t] = sc_key
                        break
        if ("area_to_mass_m2_kg" in fields and "area_to_mass_m2_kg" not in params
                and isinstance(spacecraft.get("srp_area_m2"), (int, float))
                and isinstance(spacecraft.get("mass_kg"), (int, float)) and spacecraft["mass_kg"] > 0):
            params["area_to_mass_m2_kg"] = spacecraft["srp_area_m2"] / spacecraft["mass_kg"]
            fed["area_to_mass_m2_kg"] = "srp_area_m2"
        for k, v in list(params.items()):
            if isinstance(v, str) and k in fields and _is_path_field(fields[k].annotation):
                p = Path(v).expanduser()
                if not p.is_absolute():
                    params[k] = str((base_dir / p).resolve())
        try:
            validated = spec.params.model_validate(params)
        except pydantic.ValidationError as exc:
            ok = False
            for err in exc.errors(include_url=False):
                loc = tuple(err["loc"])
                key = loc[0] if loc else None
                if key in fed:
                    shown = f"{where(('spacecraft', fed[key]))} (fed to forces[{i}] {model_name}.{key})"
                else:
                    shown = where(path + loc)
                typ = err["type"]
                allowed = ["model"] + sorted(fields)
                if typ == "extra_forbidden":
                    problems.add(f"{shown}: unknown parameter of force model {model_name!r}"
                                 f"{_suggest(str(loc[-1]), allowed)}. Allowed keys: {', '.join(allowed)}", name)
                elif typ == "missing":
                    desc = fields[key].description if key in fields else ""
                    problems.add(f"{shown}: required parameter of force model {model_name!r} is missing"
                                 + (f" ({desc})" if desc else ""), name)
                else:
                    msg = err["msg"].removeprefix("Value error, ")
                    desc = fields[key].description if key in fields else ""
                    problems.add(f"{shown} = {_show(err.get('input'))}: {msg}" + (f" [{desc}]" if desc else ""),
                                 name)
            continue
        out.append((model_name, validated.model_dump(mode="json", exclude_none=True)))
    if ok:
        try:
            registry.check_conflicts([n for n, _ in out])
        except ValueError as exc:
            problems.add(f"{where(('forces',))}: {exc}", name)
            ok = False
    return out if ok else None


def _is_path_field(ann: Any) -> bool:
    if ann is Path:
        return True
    return any(_is_path_field(a) for a in typing.get_args(ann))


def case_from_toml(name: str, text: str) -> ResolvedCase:
    """Rebuild a :class:`ResolvedCase` from :meth:`ResolvedCase.to_toml` text."""
    data = tomllib.loads(text)
    problems = _Problems()
    origins = _Origins()
    origins.record((), data, _Origin(f"case {name}"))
    case = _validate_case(name, data, origins, "", {}, f"case {name}", Path.cwd(), problems)
    if case is None:
        raise StudyConfigError(problems.render(), source=f"resolved case {name!r}")
    origin = ""
    values: dict[str, Any] = {}
    for line in text.splitlines():
        if line.startswith("# from "):
            origin = line[len("# from "):]
        elif line.startswith("# sweep ") and not line.startswith("# sweep value "):
            sw, _, base = line[len("# sweep "):].partition(" based on case ")
            case.sweep, case.base_case = sw, (base or None)
        elif line.startswith("# sweep value "):
            k, _, v = line[len("# sweep value "):].partition(" = ")
            values[k] = tomllib.loads(f"x = {v}")["x"]
    case.origin, case.sweep_values = origin, values
    return case


# ======================================================================================
# A small TOML writer (tomllib only reads)
# ======================================================================================
_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")


@functools.lru_cache(maxsize=1024)
def _toml_key(k: str) -> str:
    return k if _BARE_KEY.match(k) else json.dumps(k)


def _toml_value(v: Any) -> str:
    t = type(v)  # fast paths for the common exact types (same text as below)
    if t is float:
        if v != v or v in (math.inf, -math.inf):
            return "nan" if v != v else ("inf" if v > 0 else "-inf")
        return repr(v)
    if t is str:
        return json.dumps(v)
    if t is int:
        return str(v)
    if t is bool:
        return "true" if v else "false"
    if isinstance(v, (bool, np.bool_)):
        return "true" if v else "false"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        x = float(v)
        if math.isnan(x):
            return "nan"
        if math.isinf(x):
            return "inf" if x > 0 else "-inf"
        return repr(x)
    if isinstance(v, str):
        return json.dumps(v)  # JSON string escapes are valid TOML basic-string escapes
    if isinstance(v, Path):
        return json.dumps(str(v))
    if isinstance(v, (list, tuple, np.ndarray)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        items = [f"{_toml_key(str(k))} = {_toml_value(x)}" for k, x in v.items() if x is not None]
        return "{ " + ", ".join(items) + " }" if items else "{}"
    raise TypeError(f"cannot write {type(v).__name__} {v!r} as TOML")


def _is_table_array(v: Any) -> bool:
    return isinstance(v, list) and len(v) > 0 and all(isinstance(x, dict) for x in v)


def dumps_toml(data: dict[str, Any]) -> str:
    """Write a dict of TOML-representable data (no None) as TOML text.

    Scalars and lists come first in each table, then sub-tables ``[a.b]``, then arrays of
    tables ``[[a.c]]``; ``None`` values are left out (TOML has no null).
    """
    lines: list[str] = []
    _emit_table(lines, data, (), header=False)
    return "\n".join(lines).lstrip("\n") + "\n"


def _emit_table(lines: list[str], table: dict, path: tuple[str, ...], header: bool, array_item: bool = False) -> None:
    scalars, tables, arrays = [], [], []
    for k, v in table.items():  # one pass; the same three groups, in table order
        if v is None:
            continue
        if isinstance(v, dict):
            tables.append((k, v))
        elif _is_table_array(v):
            arrays.append((k, v))
        else:
            scalars.append((k, v))
    name = ".".join(_toml_key(p) for p in path)
    if array_item:
        lines.extend(["", f"[[{name}]]"])
    elif header and (scalars or not (tables or arrays)):
        lines.extend(["", f"[{name}]"])
    for k, v in scalars:
        lines.append(f"{_toml_key(str(k))} = {_toml_value(v)}")
    for k, v in tables:
        _emit_table(lines, v, path + (str(k),), header=True)
    for k, v in arrays:
        for item in v:
            _emit_table(lines, item, path + (str(k),), header=True, array_item=True)
