"""Force-model registry: config name -> parameter schema, compiled kernels, metadata.

A model module in ``forcemodels/models/`` calls :func:`register` once at import time.
:func:`load_all` imports every module of that package, so adding a model is one new
module; nothing in the integrator, the composer or the runner changes.
"""

from __future__ import annotations

import difflib
import importlib
import pkgutil
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
import pydantic

from forcemodels.environment import ALL_NEEDS


@dataclass(frozen=True)
class CaseSetup:
    """What a model's ``prepare`` may use: the case epoch and the span to cover.

    ``epoch`` is a :class:`propagator.timescales.Epoch`; ``t_start``/``t_end`` are seconds
    since the epoch (TT) and may be in either order (backward propagation).
    """

    epoch: Any
    t_start: float
    t_end: float


@dataclass(frozen=True)
class PreparedModel:
    """A model ready for the compiled right-hand side.

    ``p`` holds small scalar parameters, ``d`` data arrays (flattened; the kernel knows
    the layout), ``metadata`` goes to the output file, ``estimable`` maps a parameter name
    (e.g. "cr") to its index in ``p`` for sensitivities.
    """

    name: str
    kind: int
    p: np.ndarray
    d: np.ndarray
    needs: frozenset[str]
    metadata: dict[str, Any]
    estimable: dict[str, int] = field(default_factory=dict)


@dataclass(frozen=True)
class ForceModel:
    """Registration record of one force model.

    Attributes:
        name: config name (our own, descriptive).
        summary: one line for listings.
        params: pydantic model validating the config parameters (units in field docs).
        accel: numba kernel ``accel(t, r, v, env, p, d, acc)`` adding [m/s^2].
        prepare: ``prepare(params, case) -> (p, d, metadata)``; raises ``ValueError`` with a
            clear message for bad input (runs at configuration time, never mid-integration).
        needs: subset of ``environment.ALL_NEEDS`` the kernel reads from ``env``.
        partials: optional numba kernel ``partials(t, r, v, env, p, d, dadr, dadv)``.
        estimable: parameter name -> index in ``p`` usable for sensitivities.
        uses_velocity: True if the acceleration depends on velocity (finite-difference
            partials then also perturb v).
        module: import path of the module holding ``accel``/``partials`` (``__name__``).
        conflicts_with: other model name -> reason; selecting both is a configuration
            error (:func:`check_conflicts`), e.g. zonal_j2 with gravity_field (C20 twice).
        inline: compile ``accel`` inlined into the dispatch (numba ``inline="always"``):
            for short kernels, where the call itself (six array arguments) is a
            noticeable part of the cost; leave False for long ones (compile time).
    """

    name: str
    summary: str
    params: type[pydantic.BaseModel]
    accel: Any
    prepare: Callable[[pydantic.BaseModel, CaseSetup], tuple[np.ndarray, np.ndarray, dict]]
    needs: frozenset[str] = frozenset()
    partials: Any = None
    estimable: dict[str, int] = field(default_factory=dict)
    uses_velocity: bool = False
    module: str = ""
    conflicts_with: dict[str, str] = field(default_factory=dict)
    inline: bool = False

    def __post_init__(self) -> None:
        unknown = set(self.needs) - set(ALL_NEEDS)
        if unknown:
            raise ValueError(f"force model {self.name!r}: unknown needs {sorted(unknown)}; allowed {ALL_NEEDS}")


_REGISTRY: dict[str, ForceModel] = {}
_LOADED = False


def register(model: ForceModel) -> ForceModel:
    """Add ``model`` to the registry (called once by each model module)."""
    if model.name in _REGISTRY and _REGISTRY[model.name].module != model.module:
        raise ValueError(f"force model name {model.name!r} registered twice "
                         f"({_REGISTRY[model.name].module} and {model.module})")
    _REGISTRY[model.name] = model
    return model


def load_all() -> None:
    """Import every module of ``forcemodels.models`` so that each registers itself."""
    global _LOADED
    if _LOADED:
        return
    import forcemodels.models as pkg

    for info in sorted(pkgutil.iter_modules(pkg.__path__), key=lambda i: i.name):
        if not info.name.startswith("_"):
            importlib.import_module(f"{pkg.__name__}.{info.name}")
    _LOADED = True


def known_names() -> list[str]:
    """Sorted config names of all registered models."""
    load_all()
    return sorted(_REGISTRY)


def kind_of(name: str) -> int:
    """Integer kind used by the generated dispatcher (position in ``known_names()``)."""
    return known_names().index(get(name).name)


def get(name: str) -> ForceModel:
    """The registered model called ``name``; unknown names list the known ones."""
    load_all()
    try:
        return _REGISTRY[name]
    except KeyError:
        close = difflib.get_close_matches(name, list(_REGISTRY), n=1)
        hint = f" Did you mean {close[0]!r}?" if close else ""
        raise ValueError(f"unknown force model {name!r}.{hint} Known models: {', '.join(known_names())}") from None


def check_conflicts(names: list[str] | tuple[str, ...]) -> None:
    """Raise ``ValueError`` if two of the selected models must not be combined.

    A conflict declared by either model (``ForceModel.conflicts_with``) counts; the
    message names both models and gives the declared reason.
    """
    selected = set(names)
    for name in names:
        for other, reason in get(name).conflicts_with.items():
            if other in selected:
                raise ValueError(f"force models {name!r} and {other!r} cannot be selected together: {reason}")


_DEFAULTS: dict[str, tuple[pydantic.BaseModel, dict]] = {}


def _defaults(name: str) -> tuple[pydantic.BaseModel, dict]:
    """Model ``name``'s parameters with every default, validated once per process, and
    their JSON form (a fresh copy of the dict goes to each preparation's metadata)."""
    hit = _DEFAULTS.get(name)
    if hit is None:
        validated = get(name).params.model_validate({})
        hit = _DEFAULTS[name] = (validated, validated.model_dump(mode="json"))
    return hit


def prepare(name: str, params: dict[str, Any] | pydantic.BaseModel | None, case: CaseSetup) -> PreparedModel:
    """Validate ``params`` for model ``name`` and build its compiled-side data."""
    model = get(name)
    dumped = None
    if isinstance(params, pydantic.BaseModel):
        validated = params
    elif not params:
        validated, dumped = _defaults(name)
    else:
        try:
            validated = model.params.model_validate(params)
        except pydantic.ValidationError as exc:
            raise ValueError(f"force model {name!r}: invalid parameters:\n{exc}") from None
    p, d, meta = model.prepare(validated, case)
    p = np.ascontiguousarray(p, dtype=np.float64).ravel()
    d = np.ascontiguousarray(d, dtype=np.float64).ravel()
    meta = {"model": name, **meta,
            "parameters": dict(dumped) if dumped is not None else validated.model_dump(mode="json")}
    return PreparedModel(name=name, kind=kind_of(name), p=p, d=d, needs=frozenset(model.needs),
                         metadata=meta, estimable=dict(model.estimable))
