"""Propagate one case: the Python face of the compiled integrator.

``propagate`` validates the request, prepares the selected force models
(:func:`forcemodels.registry.prepare`), builds the environment tables only when a model
(or a shadow event) needs them, packs everything with
:func:`forcemodels.compose.build_forces` and runs the stepping loop of
``propagator/integrators/stepper.py`` inside the composed, cached numba module.

Units: SI (m, m/s, s); states GCRF; times are TT seconds since the case epoch.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
import pydantic

from forcemodels import compose, registry
from forcemodels.environment import FLAG_SUN, NEED_MOON, NEED_POLE, NEED_ROTATION, NEED_SUN
from propagator import table_cache
from propagator.integrators import stepper as _st
from propagator.integrators.settings import EventSpec, IntegratorSettings, OutputGrid
from propagator.integrators.tableaus import Tableau, get_tableau, rounding_residuals

ForceSpec = str | tuple[str, dict[str, Any] | pydantic.BaseModel | None]

_EVENT_CODES = {
    ("ascending_node", "both"): (_st.EV_NODE, 1),
    ("descending_node", "both"): (_st.EV_NODE, -1),
    ("periapsis", "both"): (_st.EV_APSIS, 1),
    ("apoapsis", "both"): (_st.EV_APSIS, -1),
    ("radius", "both"): (_st.EV_RADIUS, 0),
    ("radius", "up"): (_st.EV_RADIUS, 1),
    ("radius", "down"): (_st.EV_RADIUS, -1),
    ("penumbra", "both"): (_st.EV_PENUMBRA, 0),
    ("penumbra", "entry"): (_st.EV_PENUMBRA, -1),   # out[0] > 0 sunlit, decreasing on entry
    ("penumbra", "exit"): (_st.EV_PENUMBRA, 1),
    ("umbra", "both"): (_st.EV_UMBRA, 0),
    ("umbra", "entry"): (_st.EV_UMBRA, -1),         # out[1] < 0 in the umbra
    ("umbra", "exit"): (_st.EV_UMBRA, 1),
}
_SHADOW_KINDS = ("penumbra", "umbra")


@dataclass(frozen=True)
class EventRecord:
    """One located event: time [s since epoch, TT], which request, crossing sense, state."""

    t_s: float
    name: str
    kind: str
    rising: bool
    state: np.ndarray


@dataclass
class PropagationResult:
    """Output of :func:`propagate`.

    times (n,) [s since epoch, TT]; states (n, 6) GCRF [m, m/s]; stm (n, 6, 6) d y(t) / d y0
    when variational equations were integrated; sensitivities (n, 6, ns) d y(t) / d p for
    ``sensitivity_names``; events in time order; stats: evaluations, accepted/rejected
    steps, smallest/largest step [s], ...; status: 0 ok, 1 max steps, 2 step too small,
    3 stopped by a terminal event, 4 non-finite state (``message`` says it in words).
    """

    epoch: Any
    times: np.ndarray
    states: np.ndarray
    stm: np.ndarray | None
    sensitivities: np.ndarray | None
    sensitivity_names: list[tuple[str, str]]
    events: list[EventRecord]
    stats: dict[str, float]
    status: int
    message: str
    t_final: float
    state_final: np.ndarray
    method: str
    settings: IntegratorSettings
    model_names: list[str]
    model_metadata: list[dict[str, Any]]
    forces: tuple = field(repr=False, default=())

    @property
    def ok(self) -> bool:
        """True when the run reached its end time or a terminal event."""
        return self.status in (_st.STATUS_OK, _st.STATUS_EVENT_STOP)


def _normalise_forces(forces: Sequence[ForceSpec]) -> list[tuple[str, Any]]:
    out = []
    for item in forces:
        if isinstance(item, str):
            out.append((item, None))
        elif isinstance(item, (tuple, list)) and len(item) == 2 and isinstance(item[0], str):
            out.append((item[0], item[1]))
        else:
            raise ValueError(f"force model entries are 'name' or ('name', params), got {item!r}")
    names = [n for n, _ in out]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise ValueError(f"force model(s) selected twice: {dup}")
    if not out:
        raise ValueError("no force model selected")
    return out


def _end_time(epoch: Any, t_end: Any, duration: float | None) -> float:
    if (t_end is None) == (duration is None):
        raise ValueError("give exactly one of t_end (s since epoch, or an Epoch) and duration (s)")
    if duration is not None:
        value = float(duration)
    elif isinstance(t_end, (int, float, np.floating, np.integer)):
        value = float(t_end)
    elif hasattr(t_end, "to") and hasattr(epoch, "to"):
        value = float(t_end.to("TT") - epoch.to("TT"))
    else:
        raise ValueError(f"t_end must be seconds since the epoch or an Epoch, got {t_end!r}")
    if not math.isfinite(value):
        raise ValueError(f"end time must be finite, got {value!r}")
    return value


def _event_arrays(events: Sequence[EventSpec], restart_at_shadow: bool) -> tuple[list[EventSpec], list[bool], np.ndarray, np.ndarray]:
    specs = list(events)
    for ev in specs:
        if not isinstance(ev, EventSpec):
            raise ValueError(f"events must be EventSpec instances, got {ev!r}")
    hidden = [False] * len(specs)
    if restart_at_shadow:
        for kind in _SHADOW_KINDS:
            specs.append(EventSpec(kind=kind, direction="both", restart=True, name=f"{kind}_restart"))
            hidden.append(True)
    ev_int = np.zeros((len(specs), _st.N_EVI), dtype=np.int64)
    ev_par = np.zeros(len(specs))
    for k, ev in enumerate(specs):
        code, sense = _EVENT_CODES[(ev.kind, ev.direction)]
        ev_int[k, _st.EVI_KIND] = code
        ev_int[k, _st.EVI_DIR] = sense
        ev_int[k, _st.EVI_TERMINAL] = int(ev.terminal)
        ev_int[k, _st.EVI_RESTART] = int(ev.restart)
        ev_par[k] = ev.radius_m if ev.radius_m is not None else 0.0
    return specs, hidden, ev_int, ev_par


_TABLEAU_ARRAYS: dict[str, tuple[np.ndarray, ...]] = {}


def tableau_arrays(tab: Tableau) -> tuple[np.ndarray, ...]:
    """(A, c, b, b_lo, e, e_aux, P, tab_int) as the compiled loop takes them (built once per
    method and process; the loop only reads them.  Not marked read-only: numba would
    compile a second version of the loop for read-only arrays)."""
    cached = _TABLEAU_ARRAYS.get(tab.name)
    if cached is None:
        cached = _TABLEAU_ARRAYS[tab.name] = _pack_tableau(tab)
    return cached


def _pack_tableau(tab: Tableau) -> tuple[np.ndarray, ...]:
    ti = np.zeros(_st.N_TAB, dtype=np.int64)
    ti[_st.TAB_STAGES] = tab.n_stages
    ti[_st.TAB_TOTAL] = tab.n_total
    ti[_st.TAB_ERR_ORDER] = tab.error_order
    ti[_st.TAB_ERR_KIND] = tab.error_kind
    ti[_st.TAB_DENSE_DEG] = tab.P.shape[1]
    f = lambda a: np.ascontiguousarray(a, dtype=np.float64)  # noqa: E731
    return f(tab.A), f(tab.c), f(tab.b), f(rounding_residuals(tab)), f(tab.e), f(tab.e_aux), f(tab.P), ti


def control_arrays(settings: IntegratorSettings, n_sens: int, out_mode: int) -> tuple[np.ndarray, np.ndarray]:
    """(ctl, opt) arrays of the compiled loop for ``settings``."""
    ctl = np.zeros(_st.N_CTL)
    ctl[_st.CTL_RTOL] = settings.rtol
    ctl[_st.CTL_ATOL_POS] = settings.atol_pos_m
    ctl[_st.CTL_ATOL_VEL] = settings.atol_vel_m_s
    ctl[_st.CTL_ATOL_VAR] = settings.atol_variational
    ctl[_st.CTL_SAFETY] = settings.safety
    ctl[_st.CTL_FAC_MIN] = settings.min_factor
    ctl[_st.CTL_FAC_MAX] = settings.max_factor
    ctl[_st.CTL_BETA] = settings.pi_beta
    ctl[_st.CTL_H_FIRST] = settings.first_step_s or 0.0
    ctl[_st.CTL_H_MAX] = settings.max_step_s
    ctl[_st.CTL_H_MIN] = settings.min_step_s
    ctl[_st.CTL_H_FIXED] = settings.fixed_step_s or 0.0
    opt = np.zeros(_st.N_OPT, dtype=np.int64)
    opt[_st.OPT_MAX_STEPS] = settings.max_steps
    opt[_st.OPT_FIXED] = settings.fixed_step_s is not None
    opt[_st.OPT_NORM] = _st.NORM_MAX if settings.error_norm == "max" else _st.NORM_RMS
    opt[_st.OPT_KAHAN] = settings.compensated_summation
    opt[_st.OPT_NSENS] = n_sens
    opt[_st.OPT_ERR_VAR] = settings.control_variational
    opt[_st.OPT_OUT_MODE] = out_mode
    return ctl, opt


def propagate(epoch: Any, state0: Sequence[float] | np.ndarray,
              forces: Sequence[ForceSpec] = ("central_gravity",),
              t_end: Any = None, duration: float | None = None,
              settings: IntegratorSettings | dict[str, Any] | None = None,
              output: OutputGrid | np.ndarray | Sequence[float] | None = None,
              stm: bool = False, sensitivities: Sequence[tuple[str, str]] = (),
              events: Sequence[EventSpec] = (), rotation_table: np.ndarray | None = None,
              ephemeris_table: np.ndarray | None = None,
              pole_table: np.ndarray | None = None) -> PropagationResult:
    """Propagate ``state0`` (GCRF [m, m/s] at ``epoch``) to ``t_end`` (or for ``duration``).

    Args:
        epoch: case epoch (:class:`propagator.timescales.Epoch`); t = 0 there.
        state0: position and velocity, 6 floats.
        forces: force models, each ``"name"`` or ``("name", {params})``; names from the
            force-model registry.
        t_end: end time [s since epoch, TT] or an Epoch; negative/earlier = backward.
        duration: alternatively the signed duration [s].
        settings: :class:`IntegratorSettings` (or a dict of its fields).
        output: :class:`OutputGrid`, or an array of times [s]; default every accepted step.
        stm: also integrate the 6x6 state transition matrix.
        sensitivities: (model, parameter) pairs, e.g. ("solar_radiation", "cr"), whose
            d y / d p columns are integrated too (implies the variational equations).
        events: :class:`EventSpec` requests (node, apsides, radius, shadow boundaries).
        rotation_table, ephemeris_table: precomputed environment tables
            (``propagator.rotation_table.build_rotation_table``,
            ``forcemodels.ephemeris.build_sun_moon_table``) covering the span, e.g. shared
            by several cases; built here when needed and not given.
        pole_table: precomputed pole table (``propagator.rotation_table.build_pole_table``)
            for models that need only the pole (zonal_j2).  Without it the pole comes from
            the full rotation if that is filled anyway or ``rotation_table`` is given
            (third row of R), else a pole table is built here.

    Returns:
        :class:`PropagationResult`.  A run that stops early (max steps, step too small,
        non-finite state) returns what it has, with ``status`` and ``message`` set.
    """
    y6 = np.asarray(state0, dtype=np.float64).ravel()
    if y6.shape != (6,) or not np.all(np.isfinite(y6)):
        raise ValueError(f"state0 must be 6 finite numbers (GCRF m, m/s), got {state0!r}")
    if settings is None:
        settings = IntegratorSettings()
    elif isinstance(settings, dict):
        settings = IntegratorSettings(**settings)
    elif not isinstance(settings, IntegratorSettings):
        raise ValueError(f"settings must be IntegratorSettings or a dict, got {type(settings).__name__}")
    if output is None:
        output = OutputGrid(every_step=True)
    elif not isinstance(output, OutputGrid):
        output = OutputGrid(times_s=np.asarray(output, dtype=np.float64))
    t_fin = _end_time(epoch, t_end, duration)
    t0 = 0.0
    tableau = get_tableau(settings.method)

    # force models and environment tables
    specs = _normalise_forces(forces)
    case = registry.CaseSetup(epoch=epoch, t_start=t0, t_end=t_fin)
    prepared = [registry.prepare(name, params, case) for name, params in specs]
    needs = set().union(*(pm.needs for pm in prepared))
    restart = settings.restart_at_shadow
    if restart is None:
        # models whose acceleration has kinks at the shadow boundaries expose a 'shadow'
        # parameter (solar_radiation: "conical" | "none")
        restart = any(str(pm.metadata.get("parameters", {}).get("shadow", "none")) != "none"
                      for pm in prepared)
    ev_specs, hidden, ev_int, ev_par = _event_arrays(events, restart)
    shadow_events = any(ev.kind in _SHADOW_KINDS for ev in ev_specs)
    lo, hi = min(t0, t_fin), max(t0, t_fin)
    rot_table = rotation_table
    eph_table = ephemeris_table
    if NEED_ROTATION in needs and rot_table is None:
        rot_table = table_cache.rotation_table(epoch, lo, hi)
    pole_tab = pole_table
    if (NEED_POLE in needs and NEED_ROTATION not in needs and pole_tab is None and rot_table is None):
        pole_tab = table_cache.pole_table(epoch, lo, hi)
    if (needs & {NEED_SUN, NEED_MOON} or shadow_events) and eph_table is None:
        eph_table = table_cache.sun_moon_table(epoch, lo, hi)
    sens = [(str(m), str(p)) for m, p in sensitivities]
    forces_tuple = compose.build_forces(prepared, rot_table, eph_table, sens, pole_table=pole_tab)
    if shadow_events:
        forces_tuple[1][FLAG_SUN] = 1        # event functions read the Sun from env_fill

    # initial state (with variational equations)
    n_sens = len(sens)
    variational = bool(stm) or n_sens > 0
    if variational:
        y0 = np.concatenate([y6, np.eye(6).ravel(), np.zeros(6 * n_sens)])
    else:
        y0 = y6.copy()

    out_times = output.times(t0, t_fin)
    out_mode = _st.OUT_STEPS if out_times is None else _st.OUT_GRID
    if out_times is None:
        out_times = np.zeros(0)
    A, c, b, b_lo, e, e_aux, P, ti = tableau_arrays(tableau)
    ctl, opt = control_arrays(settings, n_sens, out_mode)

    module = compose.composed()
    try:
        (status, t_last, y_last, out_t, out_y, n_out, ev_t, ev_k, ev_d, ev_y, n_ev, st) = module.integrate(
            t0, y0, t_fin, forces_tuple, A, c, b, b_lo, e, e_aux, P, ti, ctl, opt,
            np.ascontiguousarray(out_times, dtype=np.float64), ev_int, ev_par)
        message = _st.STATUS_MESSAGES.get(int(status), "unknown status")
    except ZeroDivisionError:
        # compiled force-model kernels follow Python semantics: x / 0.0 raises (e.g. r = 0)
        status, t_last, y_last = _st.STATUS_NONFINITE, t0, y0
        out_t, out_y, n_out = np.zeros(0), np.zeros((0, y0.size)), 0
        ev_t, ev_k, ev_d, ev_y, n_ev = np.zeros(0), np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros((0, 6)), 0
        st = np.zeros(_st.N_STAT)
        message = (_st.STATUS_MESSAGES[_st.STATUS_NONFINITE]
                   + " (division by zero in a force model; no output kept)")

    times = np.array(out_t[:n_out])
    ys = np.array(out_y[:n_out])
    n = ys.shape[0]
    stm_out = ys[:, 6:42].reshape(n, 6, 6) if variational else None
    sens_out = ys[:, 42:].reshape(n, 6, n_sens) if n_sens else None
    records = []
    for i in range(n_ev):
        k = int(ev_k[i])
        if hidden[k]:
            continue
        spec = ev_specs[k]
        records.append(EventRecord(t_s=float(ev_t[i]), name=spec.name, kind=spec.kind,
                                   rising=bool(ev_d[i] > 0), state=np.array(ev_y[i])))
    accepted = int(st[_st.STAT_ACCEPTED])
    stats = {
        "evaluations": int(st[_st.STAT_NFEV]),
        "accepted_steps": accepted,
        "rejected_steps": int(st[_st.STAT_REJECTED]),
        # smallest step not shortened to land on t_end / an event (else the largest)
        "min_step_s": (float(st[_st.STAT_H_MIN]) if np.isfinite(st[_st.STAT_H_MIN])
                       else float(st[_st.STAT_H_MAX])) if accepted else 0.0,
        "max_step_s": float(st[_st.STAT_H_MAX]) if accepted else 0.0,
        "dense_output_steps": int(st[_st.STAT_DENSE]),
        "restarts": int(st[_st.STAT_RESTARTS]),
        "evaluations_per_step": float(st[_st.STAT_NFEV]) / accepted if accepted else 0.0,
    }
    return PropagationResult(
        epoch=epoch, times=times, states=ys[:, :6].copy(), stm=stm_out, sensitivities=sens_out,
        sensitivity_names=sens, events=records, stats=stats, status=int(status),
        message=message, t_final=float(t_last),
        state_final=np.array(y_last[:6]), method=tableau.name, settings=settings,
        model_names=[pm.name for pm in prepared], model_metadata=[pm.metadata for pm in prepared],
        forces=forces_tuple)


def per_model_accelerations(result: PropagationResult, times: np.ndarray | None = None,
                            states: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """Acceleration of each force model [m/s^2], (n, 3) GCRF, keyed by model name.

    Evaluated at ``result.times``/``result.states`` by default, or at the given times [s
    since epoch] and states (n, 6) within the span of the run (same force setup and
    environment tables).  For diagnostics output.
    """
    if times is None and states is None:
        times, states = result.times, result.states
    elif times is None or states is None:
        raise ValueError("give both times and states, or neither")
    times = np.ascontiguousarray(times, dtype=np.float64).ravel()
    states = np.ascontiguousarray(states, dtype=np.float64)
    if states.ndim != 2 or states.shape[1] < 6 or states.shape[0] != times.size:
        raise ValueError(f"states must be (n, 6) with n = len(times) = {times.size}, got {states.shape}")
    out = np.zeros((times.size, len(result.model_names), 3))
    compose.composed().model_accelerations(times, states, result.forces, out)
    return {name: out[:, m, :].copy() for m, name in enumerate(result.model_names)}
