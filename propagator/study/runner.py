"""Run the cases of a study: in this process, on local worker processes, or on Dask.

One case (:func:`execute_case`):

1. epoch (``propagator.timescales.Epoch``), initial state -> GCRF (Keplerian/equinoctial via
   ``propagator.elements``, ITRF via ``propagator.frames.itrf_to_gcrf``);
2. propagation with ``propagator.propagate.propagate`` in *segments* of
   ``[study] segment_days`` (each continues from the previous segment's final state at an
   epoch moved to the segment start, TT), written to the HDF5 store segment by segment,
   so a year-long arc never needs the whole trajectory in memory; the STM is chained
   across segments (Phi(t, t0) = Phi(t, t_k) Phi(t_k, t0));
3. optional ITRF states, osculating elements, per-model accelerations, events;
4. optional element fits (``propagator.fitting``) over the first windows of the arc;
5. ``finish`` with the summed integrator statistics.

A case that fails (bad epoch for the EOP/ephemeris, perigee under the surface -> altitude
stop, integrator failure) is marked ``failed`` with its error and traceback; the study
carries on.  In one process, step 1 (with the resolved TOML and the first segment's
output grid) is done for :data:`SETUP_BATCH` cases at a time before they run
(:func:`_case_setups`): the same values, made while that code is warm; a case whose
setup raises is set up again when it runs and fails as it would have.  The numbers do not depend on where a case runs: the same resolved
configuration gives bitwise-identical output in-process, on worker processes and on Dask.

Parallel runs (:func:`run_study`): each worker writes its case to its own temporary HDF5
file (``<output>.parts/``; on Dask the file's bytes travel back with the result) and the
parent copies the finished group into the study file with
``StudyStore.import_case_from`` — only the parent ever writes the study file.  Task
functions live in this importable module so that workers load numba's disk cache instead
of recompiling (see DESIGN.md).

Rerun: cases already ``complete`` in the output file with an identical resolved
configuration are skipped (the file, not a side list, is the record); a case whose
configuration changed is recomputed.  SIGINT/SIGTERM: no new case starts, running cases
are stopped and marked ``interrupted``, the file is closed cleanly; a second signal
stops at once.
"""

from __future__ import annotations

import functools
import json
import math
import multiprocessing as mp
import os
import shutil
import signal
import tempfile
import threading
import time
import traceback
import uuid
from collections import deque
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Optional

import numpy as np

from propagator.study.config import ResolvedCase, Study, case_from_toml
from propagator.study.hdf5_store import (STATUS_COMPLETE, STATUS_FAILED, STATUS_INTERRUPTED,
                                         StudyStore, mark_unfinished_as_interrupted)

__all__ = [
    "CaseOutcome",
    "RunReport",
    "ClusterUnavailableError",
    "CaseInterrupted",
    "execute_case",
    "run_case",
    "run_case_to_bytes",
    "run_study",
    "initial_state_gcrf",
    "output_times",
    "itrf_states",
]

STATUS_SKIPPED = "skipped"
CONNECT_TIMEOUT_S = 10.0
"""How long to try to reach a Dask scheduler [s]."""


class ClusterUnavailableError(RuntimeError):
    """The Dask scheduler cannot be reached (or dask.distributed is missing)."""


class CaseInterrupted(Exception):
    """Raised inside a case when a stop was requested (SIGINT/SIGTERM)."""


@dataclass
class CaseOutcome:
    """What a worker reports for one case (small; the data are in the HDF5 file)."""

    name: str
    status: str
    error: str = ""
    traceback: str = ""
    wall_s: float = 0.0
    n_samples: int = 0
    part_file: Optional[str] = None
    data: Optional[bytes] = field(default=None, repr=False)
    fit_errors: list[str] = field(default_factory=list)
    timings: dict[str, float] = field(default_factory=dict)
    """Wall time [s] of each stage of the case (``_StageTimer`` names; for benchmarks)."""


@dataclass
class RunReport:
    """Result of :func:`run_study`."""

    study: str
    output: Path
    total: int = 0
    complete: list[str] = field(default_factory=list)
    skipped: list[str] = field(default_factory=list)
    recomputed_changed: list[str] = field(default_factory=list)
    failed: dict[str, str] = field(default_factory=dict)
    interrupted: list[str] = field(default_factory=list)
    not_started: list[str] = field(default_factory=list)
    fit_warnings: dict[str, list[str]] = field(default_factory=dict)
    plots: list[Path] = field(default_factory=list)
    plot_errors: list[str] = field(default_factory=list)
    wall_s: float = 0.0
    signal_name: str = ""
    where: str = ""
    workers: int = 1
    """Processes that computed cases (1 in this process; pool size; Dask worker threads)."""
    stage_seconds: dict[str, float] = field(default_factory=dict)
    """Wall time [s] of each stage summed over the computed cases (``CaseOutcome.timings``)."""

    @property
    def ok(self) -> bool:
        return not self.failed and not self.interrupted and not self.not_started

    def print(self, console: Any = None) -> None:
        """Readable end-of-run summary (rich console)."""
        from rich.console import Console
        from rich.text import Text

        con = console or Console()
        con.print(Text(f"Study {self.study!r}: {self.total} case(s) — {len(self.complete)} computed, "
                       f"{len(self.skipped)} already complete (skipped), {len(self.failed)} failed"
                       + (f", {len(self.interrupted)} interrupted" if self.interrupted else "")
                       + (f", {len(self.not_started)} not started" if self.not_started else "")
                       + f" in {self.wall_s:.1f} s ({self.where})."))
        if self.recomputed_changed:
            con.print(Text("recomputed because their configuration changed: "
                           + ", ".join(self.recomputed_changed)))
        for name, err in self.failed.items():
            first = err.strip().splitlines()[0] if err.strip() else "(no message)"
            con.print(Text(f"FAILED {name}: {first}", style="bold red"))
        for name, msgs in self.fit_warnings.items():
            for m in msgs:
                con.print(Text(f"fit warning {name}: {m}", style="yellow"))
        if self.signal_name:
            con.print(Text(f"Stopped by {self.signal_name}: unfinished cases are marked 'interrupted'; "
                           "run the same command again to finish them.", style="magenta"))
        con.print(Text(f"output file: {self.output}"))
        if self.plots:
            con.print(Text(f"plots ({len(self.plots)}): {self.plots[0].parent}"))
            for p in self.plots:
                con.print(Text(f"  {p.name}"))
        for e in self.plot_errors:
            con.print(Text(f"plot skipped: {e}", style="yellow"))
        if self.failed:
            con.print(Text(f"details: longarc summary {self.output}"))


# ======================================================================================
# One case
# ======================================================================================
def initial_state_gcrf(case: ResolvedCase, epoch: Any) -> np.ndarray:
    """Initial GCRF state [m, m/s] of a case (elements -> Cartesian, ITRF -> GCRF).

    Keplerian and equinoctial elements use the GM of the case's ``central_gravity``
    model (else ``constants.GM_EARTH``); conversions from ``propagator.elements``
    (Vallado 2013 Algorithm 10; Broucke & Cefola 1972).
    """
    from propagator import elements as el
    from propagator.constants import GM_EARTH

    st = case.config.initial_state
    gm = dict(case.forces).get("central_gravity", {}).get("gm_m3_s2", GM_EARTH)
    d2r = math.pi / 180.0
    if st.kind == "cartesian":
        r = np.array(st.position_m, dtype=np.float64)
        v = np.array(st.velocity_m_s, dtype=np.float64)
        if st.frame == "ITRF":
            from propagator.frames import itrf_to_gcrf

            r, v = itrf_to_gcrf(epoch, r, v)
        return np.concatenate([r, v])
    if st.kind == "keplerian":
        e = st.eccentricity
        nu = (st.true_anomaly_deg * d2r if st.true_anomaly_deg is not None
              else _mean_to_true(st.mean_anomaly_deg * d2r, e))
        return np.asarray(el.kep_to_cart([st.semi_major_axis_m, e, st.inclination_deg * d2r,
                                          st.raan_deg * d2r, st.arg_perigee_deg * d2r, nu], gm),
                          dtype=np.float64)
    # equinoctial: mean longitude = M + argp + RAAN; a true longitude is converted through
    # the anomalies with e = |(h, k)| and longitude of perigee atan2(h, k)
    if st.mean_longitude_deg is not None:
        lam = st.mean_longitude_deg * d2r
    else:
        e = math.hypot(st.h, st.k)
        varpi = math.atan2(st.h, st.k)
        M = float(el.true_to_mean(st.true_longitude_deg * d2r - varpi, e)) if e > 0 else \
            st.true_longitude_deg * d2r - varpi
        lam = M + varpi
    return np.asarray(el.equinoctial_to_cart([st.semi_major_axis_m, st.h, st.k, st.p, st.q, lam], gm),
                      dtype=np.float64)


def _mean_to_true(M: float, e: float) -> float:
    """``float(propagator.elements.mean_to_true(M, e))`` [rad], memoised per process on
    the exact values (a sweep's cases usually share the anomaly and the eccentricity;
    the Kepler solve costs ~12 us isolated, several times that between integrations)."""
    return _mean_to_true_cached(*_exact_key(M), *_exact_key(e))


def _exact_key(x: float) -> tuple[float, bool]:
    """A float as a cache key that tells -0.0 from 0.0 (they compare equal)."""
    x = float(x)
    return x, math.copysign(1.0, x) < 0.0


@functools.lru_cache(maxsize=256)
def _mean_to_true_cached(M: float, m_neg: bool, e: float, e_neg: bool) -> float:
    from propagator import elements as el

    return float(el.mean_to_true(M, e))


def output_times(case: ResolvedCase, duration_s: float) -> np.ndarray:
    """Output grid [s since epoch, TT]: every ``step_s`` from 0 (plus the end time), or the
    explicit ``times_s`` (checked against the span and the direction of propagation)."""
    from propagator.integrators.settings import OutputGrid

    out = case.config.output
    if out.times_s is None:
        return np.asarray(OutputGrid(step_s=out.step_s).times(0.0, duration_s), dtype=np.float64)
    t = np.asarray(out.times_s, dtype=np.float64)
    lo, hi = min(0.0, duration_s), max(0.0, duration_s)
    if t.min() < lo or t.max() > hi:
        raise ValueError(f"output.times_s must lie within the propagation span [{lo}, {hi}] s")
    if t.size > 1 and np.any(np.diff(t) * math.copysign(1.0, duration_s) <= 0.0):
        raise ValueError("output.times_s must be ordered in the direction of propagation "
                         f"({'forward' if duration_s > 0 else 'backward'})")
    return t


class _SegmentGrid:
    """The output grid of a case, produced segment by segment (a year at 10 s would be
    25 MB per copy if built whole).  Values are bitwise those of
    :func:`output_times` (``OutputGrid.times``: ``(direction * step) * i``, the last
    sample replaced by / followed by the end time)."""

    def __init__(self, case: ResolvedCase, duration: float) -> None:
        self.sgn = math.copysign(1.0, duration)
        self.duration = duration
        out = case.config.output
        if out.times_s is not None:
            self.times: Optional[np.ndarray] = output_times(case, duration)
            return
        self.times = None
        self.step = float(out.step_s)
        span = abs(duration)
        self.n = int(math.floor(span / self.step * (1 + 1e-12)))
        last = self.sgn * self.step * self.n
        self.replace_last = abs(last - duration) <= 1e-9 * max(1.0, abs(duration))

    def count(self) -> int:
        """Number of grid times (the samples of a case that reaches its end time)."""
        if self.times is not None:
            return int(self.times.size)
        return self.n + (1 if self.replace_last else 2)

    def between(self, ta: float, tb: float, include_start: bool) -> np.ndarray:
        """Grid times t with ta <= t <= tb (ta < t if not include_start), in the
        direction of propagation."""
        sa, sb = ta * self.sgn, tb * self.sgn
        if self.times is not None:
            vals = self.times
        else:
            i_lo = max(0, int(math.floor(sa / self.step)) - 1)
            i_hi = min(self.n, int(math.ceil(sb / self.step)) + 1)
            vals = (self.sgn * self.step) * np.arange(i_lo, i_hi + 1, dtype=np.float64)
            if i_hi == self.n:
                if self.replace_last:
                    vals[-1] = self.duration
                else:
                    vals = np.append(vals, self.duration)
        s = vals * self.sgn
        keep = ((s >= sa) if include_start else (s > sa)) & (s <= sb)
        return vals[keep]


def itrf_states(epoch_tt: Any, t: np.ndarray, states: np.ndarray, node_step_s: float = 3600.0,
                eop_policy: str = "error") -> np.ndarray:
    """GCRF states (n, 6) at ``t`` [s TT since ``epoch_tt``] -> ITRF (n, 6) [m, m/s].

    The slowly varying ingredients of the IERS Conventions 2010 (ch. 5) CIO-based
    rotation (X, Y, s, xp, yp, s', UT1-TT, rotation rate) come from
    ``propagator.frames.rotation_parts`` on nodes every ``node_step_s`` and are
    interpolated with a cubic spline (scipy); the Earth rotation angle is evaluated
    exactly at every sample (``erfa.era00``, IERS 2010 eq. 5.15) and the matrix is
    assembled with ``erfa.c2ixys``, ``erfa.pom00``, ``erfa.c2tcio`` (eq. 5.1).  Velocity:
    v_ITRF = R v - omega x r_ITRF with omega = W e_z dERA/dt, as ``propagator.frames``.
    Cost ~1e-5 s per sample instead of ~7e-5 s for a full pyerfa rotation.
    """
    import erfa
    from scipy.interpolate import CubicSpline

    from propagator.frames import rotation_parts
    from propagator.timescales import jd_add_seconds

    t = np.ascontiguousarray(t, dtype=np.float64)
    if t.size == 0:
        return np.zeros((0, 6))
    lo, hi = float(t.min()), float(t.max())
    n_nodes = max(4, int(math.ceil((hi - lo) / node_step_s)) + 5)
    nodes = lo - 2 * node_step_s + node_step_s * np.arange(n_nodes, dtype=np.float64)
    j1, j2 = jd_add_seconds(np.full(n_nodes, epoch_tt.jd1), np.full(n_nodes, epoch_tt.jd2), nodes)
    p = rotation_parts(j1, j2, eop_policy=eop_policy)
    f = {k: CubicSpline(nodes, np.asarray(p[k], dtype=np.float64))(t)
         for k in ("x", "y", "s", "xp", "yp", "sp", "ut1_minus_tt", "omega")}
    u1, u2 = jd_add_seconds(np.full(t.size, epoch_tt.jd1), np.full(t.size, epoch_tt.jd2),
                            t + f["ut1_minus_tt"])
    era = erfa.era00(u1, u2)
    rc2i = erfa.c2ixys(f["x"], f["y"], f["s"])
    rpom = erfa.pom00(f["xp"], f["yp"], f["sp"])
    rot = erfa.c2tcio(rc2i, era, rpom)
    w = rpom[:, :, 2] * f["omega"][:, None]
    r = np.einsum("nij,nj->ni", rot, states[:, :3])
    v = np.einsum("nij,nj->ni", rot, states[:, 3:6]) - np.cross(w, r)
    return np.hstack([r, v])


def _integrator_settings(case: ResolvedCase) -> Any:
    """``IntegratorSettings`` of a case (frozen, so the cases of a study with the same
    ``[integrator]`` values share one object, made once per process)."""
    ic = case.config.integrator
    vals = (ic.method, ic.relative_tolerance, ic.absolute_tolerance_m, ic.absolute_tolerance_m_s, ic.max_steps,
            ic.restart_at_shadow_boundaries, ic.initial_step_s, ic.max_step_s)
    # exact types and float signs in the key: values that compare equal but differ
    # (1 and 1.0, -0.0 and 0.0) get their own settings
    key = tuple((type(v), _exact_key(v) if type(v) is float else v) for v in vals)
    return _settings_cached(key, vals)


@functools.lru_cache(maxsize=64)
def _settings_cached(key: tuple, vals: tuple) -> Any:
    from propagator.integrators.settings import IntegratorSettings

    method, rtol, atol_m, atol_m_s, max_steps, restart, first_step, max_step = vals
    kw: dict[str, Any] = dict(method=method, rtol=rtol, atol_pos_m=atol_m, atol_vel_m_s=atol_m_s,
                              max_steps=max_steps)
    if restart is not None:
        kw["restart_at_shadow"] = restart
    if first_step is not None:
        kw["first_step_s"] = first_step
    if max_step is not None:
        kw["max_step_s"] = max_step
    return IntegratorSettings(**kw)


_STOP_EVENT_NAME = "stop_min_altitude"


def _events(case: ResolvedCase) -> tuple[list[Any], Optional[float]]:
    """Event specifications of a case (recorded events, then the altitude stop) and the
    stop radius [m] (None without a stop).  ``EventSpec`` is frozen: the specifications
    are made once per process for each set of values (a new list each call)."""
    alt = case.config.stop.min_altitude_m
    key = (tuple(case.config.output.record_events),
           None if alt is None else (type(alt), _exact_key(alt)))
    evs, r_stop = _events_cached(key, alt)
    return list(evs), r_stop


@functools.lru_cache(maxsize=64)
def _events_cached(key: tuple, min_altitude_m: Optional[float]) -> tuple[tuple[Any, ...], Optional[float]]:
    from propagator.constants import WGS84_A
    from propagator.integrators.settings import EventSpec

    evs = [EventSpec(kind=k) for k in key[0]]
    r_stop = None
    if min_altitude_m is not None:
        r_stop = WGS84_A + min_altitude_m
        if r_stop > 0:
            evs.append(EventSpec(kind="radius", direction="down", radius_m=r_stop, terminal=True,
                                 name=_STOP_EVENT_NAME))
        else:
            r_stop = None
    return tuple(evs), r_stop


def _segments(duration: float, segment_s: float) -> list[tuple[float, float]]:
    n = max(1, int(math.ceil(abs(duration) / segment_s - 1e-12)))
    sgn = math.copysign(1.0, duration)
    bounds = [sgn * min(k * segment_s, abs(duration)) for k in range(n)] + [duration]
    return [(bounds[k], bounds[k + 1]) for k in range(n)]


class _StageTimer:
    """Accumulates wall time [s] per stage of a case: ``lap(name)`` charges the time since
    the previous lap to ``name``."""

    __slots__ = ("t", "laps")

    def __init__(self) -> None:
        self.t = time.perf_counter()
        self.laps: dict[str, float] = {}

    def lap(self, name: str) -> None:
        now = time.perf_counter()
        self.laps[name] = self.laps.get(name, 0.0) + (now - self.t)
        self.t = now


def _event_label(event: Any) -> str:
    """Name stored for an event; shadow-boundary crossings say whether they enter or leave.

    The shadow event functions are positive on the sunlit side of their boundary, so a
    falling crossing (in physical time, also for backward runs) is an entry.
    """
    if event.kind in ("penumbra", "umbra") and event.name == event.kind:
        return f"{event.kind}_{'exit' if event.rising else 'entry'}"
    return event.name


def execute_case(case: ResolvedCase, store: StudyStore, *, segment_s: float = 86400.0,
                 stop_requested: Callable[[], bool] = lambda: False,
                 case_toml: Optional[str] = None, setup: Optional["_CaseSetup"] = None) -> CaseOutcome:
    """Propagate one case into ``store`` (its group is created, filled and finished).

    Never raises for a failure of the case itself: the error and traceback go to the
    file (status ``failed``) and into the returned :class:`CaseOutcome`.  A stop request
    (checked between segments) marks the case ``interrupted``.  ``case_toml``: the
    case's ``to_toml()`` text when the caller has it already (stored as
    ``case_config_toml``).  ``setup``: the case's :func:`_case_setup` for this
    ``segment_s``, when the caller made it beforehand (its time counts as the case's;
    it carries its own TOML, ``case_toml`` is then not used).
    """
    t_wall = time.perf_counter() - (setup.seconds if setup is not None else 0.0)
    name = case.name
    try:
        return _execute(case, store, segment_s, stop_requested, t_wall, case_toml, setup)
    except CaseInterrupted as exc:
        _mark_interrupted(store, name, str(exc) or "interrupted")
        return CaseOutcome(name, STATUS_INTERRUPTED, error=str(exc), wall_s=time.perf_counter() - t_wall)
    except (KeyboardInterrupt, SystemExit):
        _mark_interrupted(store, name, "interrupted (signal)")
        raise
    except Exception as exc:  # the case failed: record it, the study carries on
        tb = traceback.format_exc()
        msg = f"{type(exc).__name__}: {exc}"
        try:
            store.mark_failed(name, msg, tb)
        except Exception:  # pragma: no cover - the file itself is broken
            pass
        return CaseOutcome(name, STATUS_FAILED, error=msg, traceback=tb, wall_s=time.perf_counter() - t_wall)


def _mark_interrupted(store: StudyStore, name: str, why: str) -> None:
    """``StudyStore.mark_interrupted`` (status ``interrupted``, ``why`` in ``error``), best effort."""
    try:
        store.mark_interrupted(name, why)
    except Exception:  # pragma: no cover - best effort while stopping
        pass


@functools.lru_cache(maxsize=64)
def _case_epochs(epoch_iso: str) -> tuple[Any, Any]:
    """(epoch in its own scale, the same in TT) of an epoch text, parsed once per process
    (``Epoch`` is immutable; parsing and the TT conversion cost ~0.1 ms per case)."""
    from propagator.timescales import Epoch

    epoch = Epoch.from_iso(epoch_iso)
    return epoch, epoch.to("TT")


@dataclass
class _CaseSetup:
    """What a case needs before its group is begun (:func:`_case_setup`)."""

    epoch: Any
    epoch_tt: Any
    duration: float
    grid: "_SegmentGrid"
    state0: np.ndarray
    settings: Any
    events: list
    r_stop: Optional[float]
    extra: dict
    toml: str
    segments: list[tuple[float, float]]
    first: tuple[np.ndarray, Any]
    """Output times of the first segment [s since the epoch, TT] and the ``OutputGrid``
    (times since the segment start, plus its end) that segment is propagated with."""
    seconds: float
    """Wall time [s] it took."""


_FIRST_OUTPUTS: dict[tuple, tuple[np.ndarray, Any]] = {}


def _first_segment_output(grid: "_SegmentGrid", ta: float, tb: float) -> tuple[np.ndarray, Any]:
    """:func:`_segment_output` of the first segment, shared by the cases whose grids
    and first segments have the same exact values (a sweep's cases; ~40 us each).  The
    shared output times are read-only; ``OutputGrid`` is frozen and the integration
    only reads its times.  Explicit ``times_s`` grids are not shared."""
    if grid.times is not None:
        return _segment_output(grid, 0, ta, tb)
    key = (grid.sgn, _exact_key(grid.step), grid.n, grid.replace_last, _exact_key(grid.duration),
           _exact_key(ta), _exact_key(tb))
    got = _FIRST_OUTPUTS.get(key)
    if got is None:
        sel, out = _segment_output(grid, 0, ta, tb)
        sel.flags.writeable = False
        if len(_FIRST_OUTPUTS) >= 64:
            _FIRST_OUTPUTS.clear()
        got = _FIRST_OUTPUTS[key] = (sel, out)
    return got


def _segment_output(grid: "_SegmentGrid", k: int, ta: float, tb: float) -> tuple[np.ndarray, Any]:
    """Output times of segment ``k`` (from ``ta`` to ``tb`` [s since the epoch, TT]) and
    the ``OutputGrid`` it is propagated with: those times relative to ``ta``, followed by
    the segment end when it is not one of them (it carries the state to the next one)."""
    from propagator.integrators.settings import OutputGrid

    sel = grid.between(ta, tb, include_start=(k == 0))
    local = sel - ta
    add_end = local.size == 0 or local[-1] != tb - ta
    req = np.append(local, tb - ta) if add_end else local
    return sel, OutputGrid(times_s=req)


def _case_setup(case: ResolvedCase, segment_s: float, case_toml: Optional[str] = None) -> _CaseSetup:
    """Epoch, span, output grid, initial GCRF state, integrator settings, events, the
    runner's case attributes and the resolved TOML of a case; raises what makes the case
    fail before it begins (bad epoch, span, initial state under the stop altitude)."""
    t0 = time.perf_counter()
    cfg = case.config
    name = case.name
    epoch, epoch_tt = _case_epochs(cfg.epoch)
    duration = cfg.duration_seconds()
    if not (math.isfinite(duration) and duration != 0.0):
        raise ValueError(f"propagation span must be finite and non-zero, got {duration!r} s")
    grid = _SegmentGrid(case, duration)
    state0 = initial_state_gcrf(case, epoch)
    settings = _integrator_settings(case)
    events, r_stop = _events(case)
    if r_stop is not None and np.linalg.norm(state0[:3]) < r_stop:
        raise ValueError(f"the initial geocentric distance {np.linalg.norm(state0[:3]):.1f} m is below "
                         f"{r_stop:.1f} m (WGS84 equatorial radius + stop.min_altitude_m = "
                         f"{cfg.stop.min_altitude_m} m)")
    extra = {
        "object_name": cfg.spacecraft.name or name,
        "object_id": name,
        "case_origin": case.origin,
        "sweep_name": case.sweep,
        "sweep_values_json": json.dumps(case.sweep_values),
        "segment_length_s": float(segment_s),
        "duration_s": float(duration),
    }
    if case_toml is None:
        case_toml = case.to_toml()
    segments = _segments(duration, segment_s)
    first = _first_segment_output(grid, *segments[0])
    return _CaseSetup(epoch, epoch_tt, duration, grid, state0, settings, events, r_stop, extra, case_toml,
                      segments, first, time.perf_counter() - t0)


def _execute(case: ResolvedCase, store: StudyStore, segment_s: float, stop_requested: Callable[[], bool],
             t_wall: float, case_toml: Optional[str] = None, setup: Optional[_CaseSetup] = None) -> CaseOutcome:
    from propagator.propagate import per_model_accelerations, propagate

    tm = _StageTimer()
    tm.t = t_wall
    cfg = case.config
    name = case.name
    if setup is None:
        setup = _case_setup(case, segment_s, case_toml)
    epoch, epoch_tt, duration, grid = setup.epoch, setup.epoch_tt, setup.duration, setup.grid
    state0, settings, events, r_stop = setup.state0, setup.settings, setup.events, setup.r_stop
    want_stm = cfg.output.stm
    tm.lap("setup")
    writer = store.begin_case(name, epoch_iso=cfg.epoch, epoch_jd1=epoch.jd1, epoch_jd2=epoch.jd2,
                              epoch_scale=epoch.scale, case_config_toml=setup.toml,
                              force_models=[{"model": n, **p} for n, p in case.forces], extra_attrs=setup.extra,
                              expected_rows=grid.count())
    tm.lap("hdf5_write")
    totals = {"evaluations": 0, "accepted_steps": 0, "rejected_steps": 0, "dense_output_steps": 0,
              "restarts": 0}
    min_step, max_step = math.inf, 0.0
    phi_acc = np.eye(6)
    y = state0
    n_written = 0
    status_text = "reached the end time"
    failure = ""
    segments = setup.segments
    metadata: list[dict] = []
    for k, (ta, tb) in enumerate(segments):
        if stop_requested():
            raise CaseInterrupted(f"stop requested before segment {k + 1}/{len(segments)} (t = {ta} s)")
        sel, out_grid = setup.first if k == 0 else _segment_output(grid, k, ta, tb)
        ep_k = epoch_tt + ta if ta != 0.0 else epoch_tt
        res = propagate(ep_k, y, forces=case.forces, duration=tb - ta, settings=settings,
                        output=out_grid, stm=want_stm, events=events)
        tm.lap("propagate")
        if not metadata:
            metadata = res.model_metadata
        st = res.stats
        for key in totals:
            totals[key] += int(st.get(key, 0))
        if st.get("accepted_steps", 0):
            min_step = min(min_step, float(st["min_step_s"]))
            max_step = max(max_step, float(st["max_step_s"]))
        n_got = res.times.shape[0]
        n_keep = min(n_got, sel.size)
        if n_keep:
            states = res.states[:n_keep]
            stm_block = None
            if want_stm:
                stm_block = np.einsum("nij,jk->nik", res.stm[:n_keep], phi_acc)
            kw: dict[str, Any] = {}
            if cfg.output.itrf:
                kw["states_itrf"] = itrf_states(epoch_tt, sel[:n_keep], states)
            if cfg.output.elements:
                from propagator.elements import cart_to_kep

                gm = dict(case.forces).get("central_gravity", {}).get("gm_m3_s2")
                kw["elements"] = cart_to_kep(states) if gm is None else cart_to_kep(states, gm)
            if cfg.output.accelerations:
                kw["accelerations"] = per_model_accelerations(res, res.times[:n_keep], states)
            tm.lap("output_conversions")
            writer.append(sel[:n_keep], states, stm=stm_block, **kw)
            n_written += n_keep
        rec = [e for e in res.events]
        if rec:
            writer.add_events(np.array([ta + e.t_s for e in rec]), [_event_label(e) for e in rec],
                              np.array([e.state[:6] for e in rec]))
        tm.lap("hdf5_write")
        if not res.ok or res.status != 0:
            if any(e.name == _STOP_EVENT_NAME for e in rec):
                t_stop = ta + next(e.t_s for e in rec if e.name == _STOP_EVENT_NAME)
                failure = (f"stopped at t = {t_stop:.3f} s ({t_stop / 86400.0:.4f} d): the geocentric distance "
                           f"fell below {r_stop:.1f} m (WGS84 equatorial radius + stop.min_altitude_m = "
                           f"{cfg.stop.min_altitude_m} m); perigee too low for this span")
            else:
                failure = f"integration stopped at t = {ta + res.t_final:.3f} s: {res.message}"
            status_text = failure
            break
        y = res.state_final
        if want_stm:
            phi_acc = res.stm[-1] @ phi_acc
    fit_errors: list[str] = []
    if not failure and cfg.fitting is not None:
        fit_errors = _run_fits(case, writer, epoch_tt)
        tm.lap("fits")
    stats = {"nfev": totals["evaluations"], "accepted": totals["accepted_steps"],
             "rejected": totals["rejected_steps"], "dense_output_steps": totals["dense_output_steps"],
             "restarts": totals["restarts"], "min_step_s": (min_step if math.isfinite(min_step) else 0.0),
             "max_step_s": max_step, "segments": len(segments), "method": settings.method,
             "status": status_text, "message": status_text, "wall_time_s": time.perf_counter() - t_wall,
             "model_metadata_json": json.dumps(metadata, default=str)}
    writer.finish(stats, status=STATUS_FAILED if failure else STATUS_COMPLETE)
    if failure:
        store.mark_failed(name, failure)
    tm.lap("hdf5_write")
    if failure:
        return CaseOutcome(name, STATUS_FAILED, error=failure, wall_s=time.perf_counter() - t_wall,
                           n_samples=n_written, timings=tm.laps)
    return CaseOutcome(name, STATUS_COMPLETE, wall_s=time.perf_counter() - t_wall, n_samples=n_written,
                       fit_errors=fit_errors, timings=tm.laps)


# ======================================================================================
# Element fits (propagator.fitting)
# ======================================================================================
_RIC_STATS = ("rms_r_m", "rms_i_m", "rms_c_m", "rms_3d_m", "max_3d_m")


def _run_fits(case: ResolvedCase, writer: Any, epoch_tt: Any) -> list[str]:
    """Fit the element sets asked for in ``[fitting]`` and store them under ``fits/``.

    Windows of ``window_hours`` start at the first sample, every ``spacing_hours``, at
    most ``max_windows``.  ``keplerian``: two-body fit per window to GCRF positions
    (:func:`propagator.fitting.fit_keplerian_from_arrays`); ``broadcast``: the
    broadcast-style set per window to ITRF positions
    (:func:`propagator.fitting.fit_broadcast_from_arrays`, IS-GPS-200 Table 20-IV form);
    ``mean``: one-period mean elements over the fitted span and their secular rates
    (:func:`propagator.fitting.mean_elements`).  Residuals (fit - trajectory, RIC [m])
    of every window are stored.  A fit that cannot be made (too few samples, orbit out
    of scope) is recorded in the fit group's ``error`` attribute and reported, but does
    not fail the case.  Returns the list of such problems.
    """
    import warnings

    from propagator import fitting as ft

    fc = case.config.fitting
    g = writer.group
    if "time_s" not in g:
        return ["no samples to fit"]
    t_all = g["time_s"]
    window = fc.window_hours * 3600.0
    spacing = (fc.spacing_hours or fc.window_hours) * 3600.0
    t0 = float(t_all[0])
    t_last = float(t_all[t_all.shape[0] - 1])
    if t_last < t0:
        return ["element fits need a forward arc (backward propagation given)"]
    n_win = int(math.floor((t_last - t0 - window) / spacing + 1e-9)) + 1
    n_win = max(0, min(n_win, fc.max_windows))
    span_end = t0 + (n_win - 1) * spacing + window if n_win else t_last
    n_read = int(np.searchsorted(t_all[()], span_end, side="right")) if t_all.shape[0] else 0
    t = np.asarray(t_all[:n_read])
    st = np.asarray(g["state_gcrf"][:n_read])
    problems: list[str] = []
    itrf = None
    for kind in fc.element_sets:
        attrs = {"window_s": window, "spacing_s": spacing, "n_windows": n_win, "time_scale": "TT",
                 "time_origin": "case epoch"}
        try:
            if kind == "mean":
                me = ft.mean_elements(t, st[:, :3], st[:, 3:])
                values = {"a_m": float(np.mean(me.a)), "e": float(np.mean(me.e)), "i_rad": float(np.mean(me.i)),
                          "period_s": me.period,
                          **{f"{n}_rate_rad_s": me.rate(n) for n in ("raan", "argp", "M", "u")}}
                stride = max(1, me.times.size // 2000)
                table = {"time_s": me.times[::stride], "a_m": me.a[::stride], "e": me.e[::stride],
                         "i_rad": me.i[::stride], "raan_rad": me.raan[::stride], "argp_rad": me.argp[::stride],
                         "mean_anomaly_rad": me.M[::stride]}
                writer.add_fit("mean", values, table=table,
                               attrs={**attrs, "kind": "one-period mean elements", "frame": "GCRF"})
                continue
            if n_win == 0:
                raise ValueError(f"the arc ({t_last - t0:.0f} s) is shorter than one fit window ({window:.0f} s)")
            rows: list[dict[str, Any]] = []
            res_t, res_ric = [], []
            first_values: dict[str, float] = {}
            if kind == "broadcast" and itrf is None:
                itrf = itrf_states(epoch_tt, t, st)
            pos, vel = (itrf[:, :3], itrf[:, 3:]) if kind == "broadcast" else (st[:, :3], st[:, 3:])
            for j in range(n_win):
                w = (t0 + j * spacing, t0 + j * spacing + window)
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", ft.FitNotConvergedWarning)
                    if kind == "broadcast":
                        fit = ft.fit_broadcast_from_arrays(t, pos, vel, window=w)
                        el = fit.elements.to_dict()
                    else:
                        fit = ft.fit_keplerian_from_arrays(t, pos, vel, window=w)
                        el = {k: v for k, v in fit.to_dict().items()
                              if k in ("t_ref_s", "a_m", "e", "i_rad", "raan_rad", "argp_rad", "mean_anomaly_rad")}
                mask = (t >= w[0]) & (t <= w[1])
                ric, stats = ft.fit_residuals(fit, t[mask], pos[mask], vel[mask])
                sd = stats.to_dict()
                row = {"window_start_s": w[0], "window_end_s": w[1], "n_samples": int(mask.sum()),
                       "converged": int(bool(fit.converged)), **{k: float(sd[k[:-2]]) for k in _RIC_STATS},
                       **{k: float(v) for k, v in el.items()}}
                rows.append(row)
                res_t.append(t[mask])
                res_ric.append(ric)
                if j == 0:
                    first_values = {k: float(v) for k, v in el.items()}
                if not fit.converged:
                    problems.append(f"{kind} fit of window {j} ({w[0]:.0f}-{w[1]:.0f} s) did not converge")
            table = {k: np.array([r[k] for r in rows]) for k in rows[0]}
            desc = ("broadcast-style set (IS-GPS-200 Table 20-IV form), Earth-fixed, time origin = case epoch (TT s)"
                    if kind == "broadcast" else "two-body Keplerian elements fitted to GCRF positions")
            writer.add_fit(kind, first_values, residuals_ric=np.vstack(res_ric),
                           residual_times=np.concatenate(res_t), table=table,
                           attrs={**attrs, "kind": desc, "frame": "ITRF" if kind == "broadcast" else "GCRF",
                                  "values_are": "elements of the first window; every window in table/",
                                  "worst_rms_3d_m": float(np.max(table["rms_3d_m"]))})
        except (ValueError, ArithmeticError) as exc:  # FittingInputError is a ValueError
            msg = f"{kind}: {type(exc).__name__}: {exc}"
            problems.append(msg)
            writer.add_fit(kind, {}, attrs={**attrs, "error": msg})
    return problems


# ======================================================================================
# Task functions (importable: process pools and Dask workers load them by reference)
# ======================================================================================
IN_MEMORY_MAX_BYTES = 16 * 2 ** 20
"""Cases whose time series are estimated below this size [bytes] travel from a worker
process to the parent as an in-memory HDF5 file image; larger ones through a part file
on disk, so that a long arc never has to be in memory whole."""


def output_bytes_estimate(case: ResolvedCase) -> float:
    """Uncompressed size [bytes] of the time series the case will write: samples x
    (time + GCRF state + the optional ITRF state, elements, STM, per-model
    accelerations) x 8 bytes.  ``inf`` when it cannot be told (the case will fail)."""
    try:
        cfg = case.config
        out = cfg.output
        n = len(out.times_s) if out.times_s is not None else abs(cfg.duration_seconds()) / out.step_s + 2.0
        cols = (7 + 6 * bool(out.itrf) + 6 * bool(out.elements) + 36 * bool(out.stm)
                + (3 * len(case.forces) if out.accelerations else 0))
        return float(n) * cols * 8.0
    except Exception:
        return math.inf


_MEMORY_STORES: dict[int, list] = {}
"""The in-memory store of each thread of this worker process (Dask workers run tasks in
threads): thread id -> [study name, store, size of its first file image]; see
:func:`_memory_store`."""


def _memory_store(study_name: str) -> StudyStore:
    """An in-memory study file kept open by this thread for its short cases: each case
    is written into it, handed over as a file image and deleted again, which saves
    opening and initialising a new in-memory file per case (~0.75 ms).  Only the case
    group is imported from the image (``StudyStore.import_case_from``).  Space freed by
    deleted cases is not all reused (measured: the image grows by ~10 kB per 1-day
    case), so :func:`_image_taken` starts a new file once the image is twice the size
    of the first one."""
    tid = threading.get_ident()
    got = _MEMORY_STORES.get(tid)
    if got is not None and got[0] == study_name and got[1].file.id.valid:
        return got[1]
    if got is not None:
        got[1].close()
    store = StudyStore(f"longarc-worker-{os.getpid()}-{uuid.uuid4().hex[:8]}.h5", study_name=study_name,
                       mode="w", in_memory=True)
    _MEMORY_STORES[tid] = [study_name, store, 0]
    return store


def _image_taken(size: int) -> None:
    """Record the size [bytes] of a file image of this thread's in-memory store; drop the
    store when the image has grown to twice its first size (the next case opens a
    fresh one)."""
    got = _MEMORY_STORES.get(threading.get_ident())
    if got is None:
        return
    if got[2] == 0:
        got[2] = size
    elif size > 2 * got[2]:
        _MEMORY_STORES.pop(threading.get_ident(), None)
        got[1].close()


def run_case(case_toml: str, name: str, part_path: Optional[str], study_name: str, segment_s: float,
             case: Optional[ResolvedCase] = None) -> CaseOutcome:
    """Run one case (given as resolved TOML) into its own HDF5 file ``part_path``, or,
    with ``part_path=None``, into an in-memory HDF5 file returned as bytes in
    ``CaseOutcome.data`` (for short cases: no file system round trip).

    The worker-side entry point of local process pools.  ``case``: the
    :class:`ResolvedCase` itself, when the caller has it (a local pool sends it pickled
    with its TOML, which saves parsing the TOML again, ~0.8 ms; it is the object an
    in-process run uses, so the numbers are the same); ``case_toml`` is still what the
    file records.  ``CaseOutcome.timings`` gets the worker's own stages
    (``case_from_toml``, ``worker_file``) besides those of the case.
    """
    t0 = time.perf_counter()
    if case is None:
        try:
            case = case_from_toml(name, case_toml)
        except Exception as exc:
            return CaseOutcome(name, STATUS_FAILED, error=f"{type(exc).__name__}: {exc}",
                               traceback=traceback.format_exc(), wall_s=time.perf_counter() - t0)
    t1 = time.perf_counter()
    data = None
    if part_path is None:
        store = _memory_store(study_name)
        t2 = time.perf_counter()
        try:
            outcome = execute_case(case, store, segment_s=segment_s, case_toml=case_toml)
            t3 = time.perf_counter()
            data = store.file_image()
        finally:
            store.delete_case(name)
        _image_taken(len(data))
    else:
        with StudyStore(part_path, study_name=study_name, mode="w") as store:
            t2 = time.perf_counter()
            outcome = execute_case(case, store, segment_s=segment_s, case_toml=case_toml)
            t3 = time.perf_counter()
    t4 = time.perf_counter()
    outcome.part_file = part_path
    outcome.data = data
    outcome.timings["case_from_toml"] = t1 - t0
    outcome.timings["worker_file"] = (t2 - t1) + (t4 - t3)
    return outcome


def run_case_to_bytes(case_toml: str, name: str, study_name: str, segment_s: float) -> CaseOutcome:
    """Run one case and return its HDF5 file as bytes in ``CaseOutcome.data`` (Dask
    workers need not share a file system with the client).  Short cases are written in
    memory; long ones (:data:`IN_MEMORY_MAX_BYTES`) to a temporary file first."""
    case: Optional[ResolvedCase] = None
    try:
        case = case_from_toml(name, case_toml)
        small = output_bytes_estimate(case) <= IN_MEMORY_MAX_BYTES
    except Exception:
        small = True  # run_case reports the error
    if small:
        return run_case(case_toml, name, None, study_name, segment_s, case)
    tmp = Path(tempfile.mkdtemp(prefix="longarc-case-"))
    try:
        part = tmp / "case.h5"
        outcome = run_case(case_toml, name, str(part), study_name, segment_s, case)
        if part.exists():
            outcome.data = part.read_bytes()
        outcome.part_file = None
        return outcome
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def _worker_init() -> None:
    """Worker processes leave SIGINT to the parent (which stops them itself) and warm up
    (:func:`_warm_up`) before taking their first case."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _warm_up()


def _warm_up() -> None:
    """Load what every case needs once per process: the composed numba module's cached
    machine code (one short two-body propagation: the compiled entry point has one
    signature whatever the force models), the EOP and DE421 data (one small rotation and
    Sun/Moon table).  ~1 s in a fresh process; without it the first case of each worker
    pays it.  Best effort: any failure is left for the cases to report."""
    try:
        from forcemodels.ephemeris import build_sun_moon_table
        from propagator.propagate import propagate
        from propagator.rotation_table import build_rotation_table
        from propagator.timescales import Epoch

        epoch = Epoch.from_iso("2020-01-01T00:00:00 TT")  # inside the EOP and DE421 spans (common practice)
        build_rotation_table(epoch, 0.0, 60.0)
        build_sun_moon_table(epoch, 0.0, 60.0)
        propagate(epoch, [7.0e6, 0.0, 0.0, 0.0, 7.5e3, 0.0], forces=("central_gravity",), duration=60.0)
    except Exception:  # pragma: no cover - the cases report their own errors
        pass


# ======================================================================================
# The study
# ======================================================================================
class _StopFlag:
    """SIGINT/SIGTERM handler: first signal sets the flag, a second one raises
    KeyboardInterrupt.  Installed only in the main thread."""

    def __init__(self) -> None:
        self.event = threading.Event()
        self.signal_name = ""
        self._old: dict[int, Any] = {}

    def is_set(self) -> bool:
        return self.event.is_set()

    def _handler(self, signum: int, frame: Any) -> None:
        if self.event.is_set():
            raise KeyboardInterrupt
        self.signal_name = signal.Signals(signum).name
        self.event.set()

    def __enter__(self) -> "_StopFlag":
        if threading.current_thread() is threading.main_thread():
            for s in (signal.SIGINT, signal.SIGTERM):
                self._old[s] = signal.signal(s, self._handler)
        return self

    def __exit__(self, *exc: Any) -> None:
        for s, h in self._old.items():
            signal.signal(s, h)


def _plan(study: Study, store: StudyStore, fresh: bool, report: RunReport) -> list[ResolvedCase]:
    """Cases to compute: all but those complete in the file with the same resolved
    configuration and segment length (both change the numbers)."""
    todo = []
    segment_s = study.settings.segment_days * 86400.0
    present = set() if fresh else set(store.case_names())  # one listing, not a lookup per case
    for case in study.cases:
        if case.name in present and store.case_status(case.name) == STATUS_COMPLETE:
            attrs = store.file[f"cases/{case.name}"].attrs
            stored = attrs.get("case_config_toml", "")
            if isinstance(stored, bytes):
                stored = stored.decode()
            if stored == case.to_toml() and float(attrs.get("segment_length_s", segment_s)) == segment_s:
                report.skipped.append(case.name)
                continue
            report.recomputed_changed.append(case.name)
        todo.append(case)
    return todo


def run_study(study: Study, *, output: str | os.PathLike | None = None, workers: int | None = None,
              scheduler: str | None = None, fresh: bool = False, plots: bool | None = None,
              progress: bool = True, console: Any = None) -> RunReport:
    """Run every case of ``study`` not already complete in the output file.

    Args:
        output: HDF5 file (default ``study.output_path()``).
        workers: local worker processes (default ``[study] workers``, else the CPU count);
            1 runs the cases in this process.
        scheduler: Dask scheduler address (default ``[study] dask_scheduler``); cases then
            run on that cluster.
        fresh: recompute every case even if complete.
        plots: draw the summary PNGs (default ``[study] plots``).
        progress: show a rich progress bar.
        console: a ``rich.console.Console`` for the progress bar.
    Returns:
        :class:`RunReport` (cases computed, skipped, failed, interrupted; plot files).
    Raises:
        ClusterUnavailableError if a scheduler address is given but cannot be reached.
    """
    t_start = time.perf_counter()
    out = study.output_path(output)
    out.parent.mkdir(parents=True, exist_ok=True)
    report = RunReport(study=study.name, output=out, total=len(study.cases))
    scheduler = scheduler or study.settings.dask_scheduler
    n_workers = int(workers or study.settings.workers or os.cpu_count() or 1)
    segment_s = study.settings.segment_days * 86400.0
    if out.exists():
        mark_unfinished_as_interrupted(out)
    client = _connect(scheduler) if scheduler else None
    try:
        with _StopFlag() as stop, StudyStore(out, study_name=study.name, mode="a") as store:
            store.set_root_attrs({"study_description": study.settings.description})
            todo = _plan(study, store, fresh, report)
            with _Progress(study.name, len(todo), progress, console) as bar:
                if client is not None:
                    report.where = f"Dask cluster {scheduler}"
                    _run_dask(client, todo, store, study.name, segment_s, stop, bar, report)
                elif n_workers == 1 or len(todo) <= 1:
                    report.where = "this process"
                    _run_inline(todo, store, segment_s, stop, bar, report)
                else:
                    n = min(n_workers, len(todo))
                    report.where = f"{n} local worker processes"
                    report.workers = n
                    _run_pool(todo, store, out, study.name, segment_s, n, stop, bar, report)
            report.signal_name = stop.signal_name
    finally:
        if client is not None:
            client.close()
    if (plots if plots is not None else study.settings.plots) and not report.signal_name:
        _make_plots(study, out, report)
    report.wall_s = time.perf_counter() - t_start
    return report


def _record(outcome: CaseOutcome, report: RunReport, bar: "_Progress") -> None:
    for k, v in outcome.timings.items():
        report.stage_seconds[k] = report.stage_seconds.get(k, 0.0) + v
    if outcome.status == STATUS_COMPLETE:
        report.complete.append(outcome.name)
        if outcome.fit_errors:
            report.fit_warnings[outcome.name] = outcome.fit_errors
    elif outcome.status == STATUS_INTERRUPTED:
        report.interrupted.append(outcome.name)
    else:
        report.failed[outcome.name] = outcome.error
    bar.advance(outcome.status)


SETUP_BATCH = 32
"""Cases whose setup (:func:`_case_setup`) :func:`_run_inline` makes in one go before
running them."""


def _case_setups(cases: list[ResolvedCase], segment_s: float) -> list[Optional[_CaseSetup]]:
    """:func:`_case_setup` of each case, or None where it raises (that case then makes
    it again itself and fails with the error, as without this).  Setting several cases
    up one after the other keeps that Python code warm between integrations: the setup
    of a 1-day MEO case cost ~0.1 ms instead of ~0.2 ms (measured); its time still
    counts as the case's (``execute_case(setup=...)``)."""
    out: list[Optional[_CaseSetup]] = []
    for case in cases:
        try:
            out.append(_case_setup(case, segment_s))
        except Exception:
            out.append(None)
    return out


def _run_inline(todo: list[ResolvedCase], store: StudyStore, segment_s: float, stop: _StopFlag,
                bar: "_Progress", report: RunReport) -> None:
    setups: list[Optional[_CaseSetup]] = []
    for i, case in enumerate(todo):
        if stop.is_set():
            report.not_started.extend(c.name for c in todo[i:])
            return
        if i % SETUP_BATCH == 0:
            setups = _case_setups(todo[i:i + SETUP_BATCH], segment_s)
        _record(execute_case(case, store, segment_s=segment_s, stop_requested=stop.is_set,
                             setup=setups[i % SETUP_BATCH]), report, bar)


def _pool_context() -> Any:
    methods = mp.get_all_start_methods()
    return mp.get_context("forkserver" if "forkserver" in methods else "spawn")


def _run_pool(todo: list[ResolvedCase], store: StudyStore, out: Path, study_name: str, segment_s: float,
              n: int, stop: _StopFlag, bar: "_Progress", report: RunReport) -> None:
    parts = out.with_name(out.name + ".parts")
    shutil.rmtree(parts, ignore_errors=True)  # left by a killed run
    parts.mkdir()
    queue = deque(todo)
    running: dict[Future, str] = {}
    pool = ProcessPoolExecutor(max_workers=n, mp_context=_pool_context(), initializer=_worker_init)
    stopped = False

    def submit() -> None:
        case = queue.popleft()
        part = (None if output_bytes_estimate(case) <= IN_MEMORY_MAX_BYTES
                else str(parts / f"{case.name}.{uuid.uuid4().hex[:8]}.h5"))
        try:
            running[pool.submit(run_case, case.to_toml(), case.name, part, study_name, segment_s,
                                case)] = case.name
        except BrokenProcessPool as exc:  # the pool died: every remaining case fails with the reason
            msg = f"worker pool broken: {exc}"
            for name in [case.name] + [c.name for c in queue]:
                store.mark_failed(name, msg)
                _record(CaseOutcome(name, STATUS_FAILED, error=msg), report, bar)
            queue.clear()

    try:
        while queue or running:
            while queue and len(running) < n and not stop.is_set():
                submit()
            if stop.is_set():
                stopped = True
                break
            if not running:
                continue
            done, _ = wait(list(running), timeout=0.25, return_when=FIRST_COMPLETED)
            for fut in done:
                name = running.pop(fut)
                if queue and not stop.is_set():  # keep the workers busy while importing
                    submit()
                _collect(fut, name, store, report, bar)
    finally:
        if stopped or stop.is_set():
            for fut in running:
                fut.cancel()
            procs = list((getattr(pool, "_processes", None) or {}).values())
            for proc in procs:  # their part files are discarded; SIGKILL cannot be caught
                proc.kill()
            for proc in procs:
                proc.join(timeout=10)
            _release_result_pipe(pool)
            for name in running.values():
                _mark_interrupted(store, name, f"interrupted by {stop.signal_name or 'a stop request'}")
                report.interrupted.append(name)
                bar.advance(STATUS_INTERRUPTED)
            report.not_started.extend(c.name for c in queue)
        pool.shutdown(wait=not (stopped or stop.is_set()), cancel_futures=True)
        shutil.rmtree(parts, ignore_errors=True)


def _release_result_pipe(pool: ProcessPoolExecutor) -> None:
    """After the workers were killed: close this process's copy of the write end of the
    pool's result pipe.

    A worker killed while sending a result leaves a partial message in the pipe; the
    executor's manager thread then waits for the rest forever, because this process
    still holds a write end, and the interpreter joins that thread at exit (measured:
    about 1 SIGTERM in 10 hung the CLI after the study file was closed).  With the
    write end closed the read ends with EOF, the manager thread treats the pool as
    broken and ends.  Uses a private attribute of ``concurrent.futures.process`` (CPython
    3.9-3.13); without it nothing is done."""
    writer = getattr(getattr(pool, "_result_queue", None), "_writer", None)
    if writer is not None:
        try:
            writer.close()
        except OSError:  # pragma: no cover - already closed
            pass


def _collect(fut: Any, name: str, store: StudyStore, report: RunReport, bar: "_Progress") -> None:
    """Import a finished case (its file image or part file) into the study file and
    record it."""
    try:
        outcome: CaseOutcome = fut.result()
    except Exception as exc:  # the worker died or the task could not run
        msg = f"worker failure: {type(exc).__name__}: {exc}"
        store.mark_failed(name, msg, "".join(traceback.format_exception(exc)))
        _record(CaseOutcome(name, STATUS_FAILED, error=msg), report, bar)
        return
    t0 = time.perf_counter()
    part = Path(outcome.part_file) if outcome.part_file else None
    data, outcome.data = outcome.data, None
    try:
        if data is not None:
            store.import_case_from(data, name)
        elif part is not None and part.exists():
            store.import_case_from(part, name)
        elif outcome.status == STATUS_FAILED:
            store.mark_failed(name, outcome.error, outcome.traceback)
    except KeyError:
        store.mark_failed(name, outcome.error or "the worker wrote no data for this case", outcome.traceback)
    finally:
        if part is not None:
            part.unlink(missing_ok=True)
    outcome.timings["parent_import"] = time.perf_counter() - t0
    _record(outcome, report, bar)


def _connect(address: str) -> Any:
    try:
        from distributed import Client
    except ImportError as exc:
        raise ClusterUnavailableError("running on a Dask cluster needs dask.distributed "
                                      "(pip install 'longarc[cluster]')") from exc
    try:
        return Client(address, timeout=f"{CONNECT_TIMEOUT_S}s")
    except (OSError, TimeoutError) as exc:
        raise ClusterUnavailableError(f"cannot reach the Dask scheduler at {address!r}: {exc}") from exc


def _run_dask(client: Any, todo: list[ResolvedCase], store: StudyStore, study_name: str, segment_s: float,
              stop: _StopFlag, bar: "_Progress", report: RunReport) -> None:
    from distributed import wait as dwait

    slots = max(1, sum(client.nthreads().values()))
    report.workers = slots
    queue = deque(todo)
    running: dict[Any, str] = {}
    try:
        while queue or running:
            while queue and len(running) < slots and not stop.is_set():
                case = queue.popleft()
                fut = client.submit(run_case_to_bytes, case.to_toml(), case.name, study_name, segment_s,
                                    key=f"longarc-{case.name}-{uuid.uuid4().hex[:12]}", pure=False)
                running[fut] = case.name
            if stop.is_set():
                break
            try:
                done = dwait(list(running), timeout=0.5, return_when="FIRST_COMPLETED").done
            except TimeoutError:
                continue
            for fut in done:
                name = running.pop(fut)
                _collect(fut, name, store, report, bar)
                fut.release()
    finally:
        if stop.is_set():
            for fut, name in running.items():
                fut.cancel()
                _mark_interrupted(store, name, f"interrupted by {stop.signal_name or 'a stop request'}")
                report.interrupted.append(name)
            report.not_started.extend(c.name for c in queue)


class _Progress:
    """rich progress bar: cases done / failed, elapsed, time remaining."""

    def __init__(self, study: str, total: int, enabled: bool, console: Any) -> None:
        self.enabled = enabled and total > 0
        self.total = total
        self.done = 0
        self.failed = 0
        self.study = study
        self._p = None
        self._task = None
        self._console = console

    def __enter__(self) -> "_Progress":
        if self.enabled:
            from rich.progress import (BarColumn, MofNCompleteColumn, Progress, TextColumn,
                                       TimeElapsedColumn, TimeRemainingColumn)

            self._p = Progress(TextColumn("[bold]{task.description}"), BarColumn(), MofNCompleteColumn(),
                               TextColumn("cases, [red]{task.fields[failed]} failed"),
                               TextColumn("elapsed"), TimeElapsedColumn(),
                               TextColumn("remaining"), TimeRemainingColumn(),
                               console=self._console, transient=False)
            self._p.__enter__()
            self._task = self._p.add_task(self.study, total=self.total, failed=0)
        return self

    def advance(self, status: str) -> None:
        self.done += 1
        if status != STATUS_COMPLETE:
            self.failed += 1
        if self._p is not None:
            self._p.update(self._task, advance=1, failed=self.failed)

    def __exit__(self, *exc: Any) -> None:
        if self._p is not None:
            self._p.__exit__(*exc)


# ======================================================================================
# Plots after a run
# ======================================================================================
def _make_plots(study: Study, out: Path, report: RunReport) -> None:
    """A few PNGs next to the output file: element histories and ground tracks of the
    ``[study] plot_cases`` (default: the first two explicit cases), per-model accelerations and fit residuals where stored, and
    the RIC difference of the first case of each sweep against its base case."""
    from propagator.study import plots as pl

    with StudyStore(out, mode="r") as store:
        complete = {n for n in store.completed_cases()}
        has_acc = {n for n in complete if "acceleration" in store.file[f"cases/{n}"]}
        has_fit = {n: [f for f, g in store.file[f"cases/{n}/fits"].items() if "residual_ric" in g]
                   for n in complete if "fits" in store.file[f"cases/{n}"]}
    stem = out.stem
    jobs: list[tuple[str, Callable[[Path], Any], str]] = []
    names = study.settings.plot_cases
    if names is None:
        names = [c.name for c in study.cases if not c.sweep and c.name in complete][:2]
    for n in names:
        if n in complete:
            jobs.append((n, lambda p, n=n: pl.plot_elements(out, n, p), "elements"))
            jobs.append((n, lambda p, n=n: pl.plot_ground_track(out, n, p), "ground-track"))
    acc = next((c.name for c in study.cases if c.name in has_acc), None)
    if acc:
        jobs.append((acc, lambda p, n=acc: pl.plot_accelerations(out, n, p), "accelerations"))
    for c in study.cases:
        if has_fit.get(c.name):
            for fit in has_fit[c.name][:2]:
                jobs.append((c.name, lambda p, n=c.name, f=fit: pl.plot_fit_residuals(out, n, p, fit_name=f),
                             f"fit-residuals-{fit}"))
            break
    done_sweeps = set()
    for c in study.cases:
        if c.sweep and c.base_case and c.sweep not in done_sweeps and c.name in complete \
                and c.base_case in complete:
            done_sweeps.add(c.sweep)
            jobs.append((c.name, lambda p, n=c.name, b=c.base_case: pl.plot_ric_difference(out, b, p, other_case=n),
                         f"ric-vs-{c.base_case}"))
    for case, fn, kind in jobs:
        png = out.with_name(f"{stem}_{case}_{kind}.png")
        try:
            report.plots.append(Path(fn(png)))
        except Exception as exc:  # a plot never fails a run
            report.plot_errors.append(f"{kind} of {case}: {type(exc).__name__}: {exc}")
