"""Study runner end to end: HDF5 read back with h5py, failures, reruns, process pool, Dask,
a run killed mid-study that resumes."""

from __future__ import annotations

import math
import os
import signal
import subprocess
import sys
import time
import tomllib
from pathlib import Path

import h5py
import numpy as np
import pytest

from propagator.study.config import case_from_toml, load_study, parse_study
from propagator.study.hdf5_store import open_for_reading, read_case
from propagator.study.runner import initial_state_gcrf, itrf_states, run_study

ROOT = Path(__file__).resolve().parents[1]

TINY = """
[study]
name = "tiny"
plots = false

[defaults]
epoch = "2024-03-20T12:00:00 UTC"
duration_s = 7200.0

[defaults.initial_state]
kind = "keplerian"
semi_major_axis_m = 7000000.0
eccentricity = 0.001
inclination_deg = 98.0
raan_deg = 10.0
arg_perigee_deg = 0.0
mean_anomaly_deg = 0.0

[[defaults.forces]]
model = "central_gravity"

[[defaults.forces]]
model = "zonal_j2"

[defaults.output]
step_s = 120.0

[cases.leo-a]

[cases.leo-b]
initial_state.raan_deg = 50.0
output = { step_s = 120.0, itrf = true, elements = true, accelerations = true, stm = true, record_events = ["ascending_node"] }

# perigee 6300 km, below the surface: starts at apogee, stops at the altitude event
[cases.low]
initial_state.eccentricity = 0.1
initial_state.mean_anomaly_deg = 180.0
"""

ARRAYS = ("time_s", "state_gcrf", "state_itrf", "elements_osculating", "stm")


def write_study(tmp: Path, text: str = TINY, name: str = "tiny.toml") -> Path:
    p = tmp / name
    p.write_text(text)
    return p


def same_case(a: dict, b: dict) -> bool:
    if a["status"] != b["status"]:
        return False
    for k in ARRAYS:
        if (a[k] is None) != (b[k] is None) or (a[k] is not None and not np.array_equal(a[k], b[k])):
            return False
    if set(a["accelerations"]) != set(b["accelerations"]):
        return False
    return all(np.array_equal(a["accelerations"][m], b["accelerations"][m]) for m in a["accelerations"])


@pytest.fixture(scope="module")
def inline_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("inline")
    study = load_study(write_study(tmp))
    report = run_study(study, output=tmp / "inline.h5", workers=1, progress=False)
    return study, report, tmp / "inline.h5"


# --------------------------------------------------------------------------------------
# one process
# --------------------------------------------------------------------------------------
def test_inline_run_file_contents(inline_run):
    study, report, path = inline_run
    assert sorted(report.complete) == ["leo-a", "leo-b"] and list(report.failed) == ["low"]
    with h5py.File(path, "r") as f:
        assert f.attrs["study_name"] == "tiny"
        g = f["cases/leo-b"]
        assert g.attrs["status"] == "complete"
        assert g.attrs["epoch_iso"] == "2024-03-20T12:00:00 UTC" and g.attrs["epoch_scale"] == "UTC"
        t = g["time_s"][()]
        assert np.array_equal(t, 120.0 * np.arange(61))  # 0..7200 s every 120 s, no duplicates
        for ds in ("state_gcrf", "state_itrf", "elements_osculating"):
            assert g[ds].shape == (61, 6)
        assert g["stm"].shape == (61, 6, 6) and set(g["acceleration"]) == {"central_gravity", "zonal_j2"}
        assert g["integrator_statistics"].attrs["nfev"] > 0
        back = case_from_toml("leo-b", g.attrs["case_config_toml"])
        assert back.config == study.case("leo-b").config


def test_inline_states_equal_a_direct_propagate_call(inline_run):
    """The runner is wiring only: its states are bitwise those of propagate()."""
    from propagator.integrators.settings import IntegratorSettings, OutputGrid
    from propagator.propagate import propagate
    from propagator.timescales import Epoch

    study, _, path = inline_run
    case = study.case("leo-a")
    epoch = Epoch.from_iso(case.config.epoch)
    res = propagate(epoch.to("TT"), initial_state_gcrf(case, epoch), forces=case.forces, duration=7200.0,
                    settings=IntegratorSettings(), output=OutputGrid(times_s=120.0 * np.arange(61)))
    d = read_case(path, "leo-a")
    assert np.array_equal(d["state_gcrf"], res.states)


def test_optional_outputs_agree_with_their_reference_functions(inline_run):
    from propagator.constants import GM_EARTH
    from propagator.elements import cart_to_kep
    from propagator.frames import gcrf_to_itrf
    from propagator.timescales import Epoch

    _, _, path = inline_run
    d = read_case(path, "leo-b")
    st = d["state_gcrf"]
    assert np.array_equal(d["elements_osculating"], cart_to_kep(st))
    # ITRF: fast interpolated rotation vs the full pyerfa rotation of propagator.frames
    # (IERS Conventions 2010 ch. 5 via ERFA) at a few samples
    epoch = Epoch.from_iso(d["epoch"]["iso"]).to("TT")
    for i in (0, 17, 60):
        r, v = gcrf_to_itrf(epoch + float(d["time_s"][i]), st[i, :3], st[i, 3:])
        assert np.max(np.abs(d["state_itrf"][i, :3] - r)) < 1e-6  # m
        assert np.max(np.abs(d["state_itrf"][i, 3:] - v)) < 1e-9  # m/s
    # per-model acceleration: central term is Newton's -GM r / |r|^3
    r = st[:, :3]
    newton = -GM_EARTH * r / np.linalg.norm(r, axis=1)[:, None] ** 3
    np.testing.assert_allclose(d["accelerations"]["central_gravity"], newton, rtol=1e-13, atol=0)
    # STM starts at the identity; ascending node events: z = 0 crossing upward
    assert np.array_equal(d["stm"][0], np.eye(6))
    ev = d["events"]
    assert ev["kind"] and set(ev["kind"]) == {"ascending_node"}
    assert np.all(np.abs(ev["state_gcrf"][:, 2]) < 1e-3) and np.all(ev["state_gcrf"][:, 5] > 0)


def test_impossible_case_fails_alone_with_its_reason(inline_run):
    _, report, path = inline_run
    assert "fell below" in report.failed["low"]
    d = read_case(path, "low")
    assert d["status"] == "failed" and "fell below 6378137.0 m" in d["attrs"]["error"]
    # data up to the stop are kept; the stop is an event at |r| = WGS84 a
    assert 0 < d["time_s"].size < 61 and d["events"]["kind"] == ["stop_min_altitude"]
    assert abs(np.linalg.norm(d["events"]["state_gcrf"][0, :3]) - 6378137.0) < 1e-3
    for name in ("leo-a", "leo-b"):
        assert read_case(path, name)["status"] == "complete"


def test_rerun_skips_complete_cases_and_recomputes_changed_ones(inline_run, tmp_path):
    study, _, path = inline_run
    out = tmp_path / "copy.h5"
    out.write_bytes(path.read_bytes())
    before = read_case(out, "leo-a")
    again = run_study(study, output=out, workers=1, progress=False)
    assert sorted(again.skipped) == ["leo-a", "leo-b"] and list(again.failed) == ["low"]
    assert same_case(before, read_case(out, "leo-a"))
    changed = parse_study(tomllib.loads(TINY.replace("[cases.leo-a]", "[cases.leo-a]\noutput.step_s = 600.0")))
    third = run_study(changed, output=out, workers=1, progress=False)
    assert third.recomputed_changed == ["leo-a"] and third.skipped == ["leo-b"]
    assert read_case(out, "leo-a")["time_s"].size == 13


def test_fresh_recomputes_everything_and_segment_change_counts_as_a_change(inline_run, tmp_path):
    study, _, path = inline_run
    out = tmp_path / "copy.h5"
    out.write_bytes(path.read_bytes())
    fresh = run_study(study, output=out, workers=1, progress=False, fresh=True)
    assert not fresh.skipped and sorted(fresh.complete) == ["leo-a", "leo-b"]
    assert same_case(read_case(path, "leo-a"), read_case(out, "leo-a"))  # same numbers again
    seg = parse_study(tomllib.loads(TINY.replace('name = "tiny"', 'name = "tiny"\nsegment_days = 0.05')))
    rep = run_study(seg, output=out, workers=1, progress=False)
    assert sorted(rep.recomputed_changed) == ["leo-a", "leo-b"]


def test_stop_request_between_segments_marks_the_case_interrupted(tmp_path):
    from propagator.study.hdf5_store import StudyStore
    from propagator.study.runner import execute_case

    study = parse_study(tomllib.loads(TINY))
    calls = []

    def stop_after_two_segments() -> bool:
        calls.append(1)
        return len(calls) > 2

    with StudyStore(tmp_path / "stop.h5", mode="w") as store:
        outcome = execute_case(study.case("leo-a"), store, segment_s=1800.0,
                               stop_requested=stop_after_two_segments)
    assert outcome.status == "interrupted" and "segment 3/4" in outcome.error
    d = read_case(tmp_path / "stop.h5", "leo-a")
    assert d["status"] == "interrupted"
    assert np.array_equal(d["time_s"], 120.0 * np.arange(31))  # two segments (0..3600 s) kept
    # the next run recomputes it (only complete cases are skipped)
    rep = run_study(study, output=tmp_path / "stop.h5", workers=1, progress=False)
    assert "leo-a" in rep.complete and read_case(tmp_path / "stop.h5", "leo-a")["status"] == "complete"


def test_interrupted_case_is_recomputed_even_with_an_unchanged_configuration(tmp_path):
    """Only 'complete' counts as done: an interrupted case whose stored configuration and
    segment length equal the new run's is still recomputed (not skipped)."""
    from propagator.study.hdf5_store import StudyStore
    from propagator.study.runner import execute_case

    text = TINY[:TINY.index("[cases.leo-a]")].replace('name = "tiny"', 'name = "tiny"\nsegment_days = 0.025')
    study = parse_study(tomllib.loads(text + "[cases.leo-a]\n"))
    segment_s = study.settings.segment_days * 86400.0  # 2160 s: 4 segments over 7200 s
    out = tmp_path / "stop.h5"
    calls = []
    with StudyStore(out, study_name=study.name, mode="w") as store:
        outcome = execute_case(study.case("leo-a"), store, segment_s=segment_s,
                               stop_requested=lambda: calls.append(1) or len(calls) > 1)
        assert outcome.status == "interrupted" and store.completed_cases() == set()
    d = read_case(out, "leo-a")
    assert d["status"] == "interrupted" and d["attrs"]["traceback"] == ""
    assert d["attrs"]["error"] == "stop requested before segment 2/4 (t = 2160.0 s)"
    assert np.array_equal(d["time_s"], 120.0 * np.arange(19))  # first segment 0..2160 s kept
    assert d["attrs"]["case_config_toml"] == study.case("leo-a").to_toml()
    assert d["attrs"]["segment_length_s"] == segment_s
    rep = run_study(study, output=out, workers=1, progress=False)
    assert rep.complete == ["leo-a"] and not rep.skipped and not rep.recomputed_changed
    d = read_case(out, "leo-a")
    assert d["status"] == "complete" and np.array_equal(d["time_s"], 120.0 * np.arange(61))


def test_segments_continue_the_arc_and_chain_the_stm(tmp_path):
    text = TINY.replace('name = "tiny"', 'name = "seg"\nsegment_days = 0.0173611111111111')  # ~25 min
    text = text[:text.index("[cases.leo-a]")] + "[cases.one]\noutput = { step_s = 120.0, stm = true }\n"
    seg = run_study(parse_study(tomllib.loads(text)), output=tmp_path / "seg.h5", workers=1, progress=False)
    whole = run_study(parse_study(tomllib.loads(text.replace("segment_days = 0.0173611111111111", ""))),
                      output=tmp_path / "whole.h5", workers=1, progress=False)
    assert seg.complete == whole.complete == ["one"]
    a, b = read_case(tmp_path / "seg.h5", "one"), read_case(tmp_path / "whole.h5", "one")
    assert a["integrator_statistics"]["segments"] == 5 and b["integrator_statistics"]["segments"] == 1
    assert np.array_equal(a["time_s"], b["time_s"])  # boundaries neither lost nor repeated
    # different step sequences: agreement at the integration-error level (common practice)
    assert np.max(np.abs(a["state_gcrf"][:, :3] - b["state_gcrf"][:, :3])) < 1e-4
    scale = np.max(np.abs(b["stm"]), axis=0) + 1e-300
    assert np.max(np.abs(a["stm"] - b["stm"]) / scale) < 1e-7


@pytest.mark.parametrize("duration,step", [(7200.0, 120.0), (7200.0, 7.0), (-86400.0, 300.0),
                                           (31536000.0, 10.0), (-1000.3, 0.7)])
def test_segment_grids_join_into_the_whole_grid(duration, step):
    """Segments produce the output grid piecewise, bitwise equal to OutputGrid.times and
    with no sample lost or repeated at the boundaries."""
    from propagator.study.runner import _segments, _SegmentGrid, output_times

    s = parse_study(tomllib.loads(TINY.replace("duration_s = 7200.0", f"duration_s = {duration}")
                                  .replace("step_s = 120.0", f"step_s = {step}")))
    case = s.case("leo-a")
    grid, whole = _SegmentGrid(case, duration), output_times(case, duration)
    for seg in ((86400.0, 1500.0, 333.3) if abs(duration) < 1e6 else (86400.0, 777777.7)):
        parts = [grid.between(a, b, k == 0) for k, (a, b) in enumerate(_segments(duration, seg))]
        assert np.array_equal(np.concatenate(parts), whole)


def test_initial_states_from_each_representation():
    from propagator.elements import kep_to_cart, mean_to_true
    from propagator.frames import itrf_to_gcrf
    from propagator.timescales import Epoch

    base = TINY[:TINY.index("[cases.leo-a]")]
    d2r = math.pi / 180
    # h = e sin(argp + RAAN), k = e cos(argp + RAAN), p = tan(i/2) sin RAAN, q = tan(i/2) cos RAAN
    # (Broucke & Cefola 1972) for e = 0.01, i = 55, RAAN = 30, argp = 40 deg
    hkpq = (0.01 * math.sin(70 * d2r), 0.01 * math.cos(70 * d2r), math.tan(27.5 * d2r) * math.sin(30 * d2r),
            math.tan(27.5 * d2r) * math.cos(30 * d2r))
    s = parse_study(tomllib.loads(base + ("""
[cases.kep]
initial_state = { kind = "keplerian", semi_major_axis_m = 26560000.0, eccentricity = 0.01, inclination_deg = 55.0, raan_deg = 30.0, arg_perigee_deg = 40.0, mean_anomaly_deg = 50.0 }
[cases.equ-true]
initial_state = { kind = "equinoctial", semi_major_axis_m = 26560000.0, h = %r, k = %r, p = %r, q = %r, true_longitude_deg = 0.0 }

[cases.itrf]
initial_state = { kind = "cartesian", frame = "ITRF", position_m = [7000000.0, 0.0, 0.0], velocity_m_s = [0.0, 1000.0, 7400.0] }
""" % hkpq)))
    epoch = Epoch.from_iso("2024-03-20T12:00:00 UTC")
    kep = initial_state_gcrf(s.case("kep"), epoch)
    nu = float(mean_to_true(50 * d2r, 0.01))
    assert np.array_equal(kep, kep_to_cart([26560000.0, 0.01, 55 * d2r, 30 * d2r, 40 * d2r, nu]))
    # equinoctial with the same e, i, RAAN, argp (h, k, p, q computed from them) and true
    # longitude = RAAN + argp + nu: the same state (Broucke & Cefola 1972 definitions)
    nu2 = (0.0 - 70.0) * d2r
    ref = kep_to_cart([26560000.0, 0.01, 55 * d2r, 30 * d2r, 40 * d2r, nu2 % (2 * math.pi)])
    np.testing.assert_allclose(initial_state_gcrf(s.case("equ-true"), epoch), ref, rtol=0, atol=1e-6)
    r, v = itrf_to_gcrf(epoch, [7000000.0, 0.0, 0.0], [0.0, 1000.0, 7400.0])
    assert np.array_equal(initial_state_gcrf(s.case("itrf"), epoch), np.concatenate([r, v]))


def test_fast_itrf_rotation_matches_pyerfa_over_a_day():
    """itrf_states (spline-interpolated rotation ingredients) vs propagator.frames (full
    IERS 2010 / ERFA rotation at every sample), MEO radius, one day."""
    from propagator.frames import gcrf_to_itrf
    from propagator.timescales import Epoch

    epoch = Epoch.from_iso("2024-06-01T00:00:00 TT")
    t = np.linspace(0.0, 86400.0, 7)
    rng = np.random.default_rng(1)
    st = np.hstack([rng.normal(size=(7, 3)) * 2.66e7 / math.sqrt(3), rng.normal(size=(7, 3)) * 2.2e3])
    got = itrf_states(epoch, t, st)
    for i in range(t.size):
        r, v = gcrf_to_itrf(epoch + float(t[i]), st[i, :3], st[i, 3:])
        assert np.max(np.abs(got[i, :3] - r)) < 1e-5 and np.max(np.abs(got[i, 3:] - v)) < 1e-9


# --------------------------------------------------------------------------------------
# docs/hdf5_schema.md names everything a real run writes
# --------------------------------------------------------------------------------------
# 2-h LEO arcs with every output, every fit set (one of them impossible), events, a sweep
# and a case that stops at the altitude limit
SCHEMA_STUDY = TINY[:TINY.index("[[defaults.forces]]")].replace('name = "tiny"', 'name = "schema"\ndescription = "d"') + """
[defaults.spacecraft]
name = "PROBE-1"
mass_kg = 200.0
srp_area_m2 = 2.0
cr = 1.3

[[defaults.forces]]
model = "central_gravity"

[[defaults.forces]]
model = "zonal_j2"

[[defaults.forces]]
model = "sun_gravity"

[[defaults.forces]]
model = "solar_radiation"

[cases.full]
output = { step_s = 60.0, itrf = true, elements = true, accelerations = true, stm = true, record_events = ["ascending_node", "descending_node", "periapsis", "apoapsis", "penumbra", "umbra"] }
fitting = { element_sets = ["keplerian", "broadcast", "mean"], window_hours = 1.0, spacing_hours = 0.5, max_windows = 3 }

[cases.short]
output = { step_s = 600.0 }
fitting = { element_sets = ["keplerian"], window_hours = 5.0 }

[[sweeps]]
name = "cr"
base = "short"
grid."spacecraft.cr" = { first = 1.0, last = 1.0, step = 0.1 }

[cases.low]
initial_state.eccentricity = 0.1
initial_state.mean_anomaly_deg = 180.0
"""


def _doc_names(text: str) -> set[str]:
    """Identifiers inside the code spans and fenced blocks of a Markdown page."""
    import re

    spans: list[str] = []
    for k, part in enumerate(text.split("```")):
        spans.extend([part] if k % 2 else re.findall(r"`([^`\n]+)`", part))
    return {w for sp in spans for w in re.findall(r"[A-Za-z_][A-Za-z0-9_]*", sp)}


def _file_names(path: Path) -> tuple[dict[str, str], set[str]]:
    """Every group / dataset / attribute name, fitted-value name, event kind and status
    found in a study file (name -> where first seen), and the acceleration model names."""
    names: dict[str, str] = {}
    models: set[str] = set()

    def text(v) -> str:
        return v.decode() if isinstance(v, bytes) else str(v)

    with h5py.File(path, "r") as f:
        for a in f.attrs:
            names.setdefault(a, "/ attribute")
        for key in f:
            names.setdefault(key, "/")
        for case, g in f["cases"].items():
            names.setdefault(text(g.attrs["status"]), f"{case} status value")
            for a in g.attrs:
                names.setdefault(a, f"{case} attribute")

            def visit(rel: str, obj, case=case) -> None:
                parts = rel.split("/")
                if parts[0] == "acceleration" and len(parts) == 2:  # <model_name>
                    models.add(parts[1])
                    parts = parts[:1]
                for p in parts:
                    names.setdefault(p, f"{case}/{rel}")
                for a in obj.attrs:
                    names.setdefault(a, f"{case}/{rel} attribute")

            g.visititems(visit)
            if "events" in g:
                for kind in g["events/kind"][()]:
                    names.setdefault(text(kind), f"{case}/events/kind value")
            for fit, fg in (g["fits"].items() if "fits" in g else ()):
                for n in fg["element_names"][()]:
                    names.setdefault(text(n), f"{case}/fits/{fit}/element_names value")
    return names, models


def test_schema_page_names_every_item_of_a_real_run(tmp_path):
    from forcemodels.registry import known_names
    from propagator.study.hdf5_store import StudyStore

    study = parse_study(tomllib.loads(SCHEMA_STUDY))
    out = tmp_path / "schema.h5"
    report = run_study(study, output=out, workers=1, progress=False)
    assert sorted(report.complete) == ["cr-00", "full", "short"] and list(report.failed) == ["low"]
    with StudyStore(out) as store:  # an interrupted case as the runner leaves it (its 2nd segment)
        from propagator.study.runner import execute_case

        calls = []
        execute_case(study.case("short"), store, segment_s=3600.0,
                     stop_requested=lambda: calls.append(1) or len(calls) > 1)
    with h5py.File(out, "r") as f:  # the file really holds every kind of item
        g = f["cases/full"]
        for item in ("state_itrf", "elements_osculating", "stm", "acceleration/solar_radiation", "events/kind",
                     "fits/keplerian/table/rms_3d_m", "fits/broadcast/residual_ric", "fits/mean/table/time_s",
                     "integrator_statistics"):
            assert item in g, item
        assert "error" in f["cases/cr-00/fits/keplerian"].attrs and f["cases/cr-00"].attrs["sweep_name"] == "cr"
        assert f["cases/short"].attrs["status"] == "interrupted"
        assert "stop_min_altitude" in [k.decode() for k in f["cases/low/events/kind"][()]]
    names, models = _file_names(out)
    documented = _doc_names((ROOT / "docs" / "hdf5_schema.md").read_text())
    missing = {n: where for n, where in names.items() if n not in documented}
    assert not missing, f"not named in docs/hdf5_schema.md: {missing}"
    assert models == {"central_gravity", "zonal_j2", "sun_gravity", "solar_radiation"}
    assert models <= set(known_names())


# --------------------------------------------------------------------------------------
# local processes and Dask give the same numbers
# --------------------------------------------------------------------------------------
def test_process_pool_gives_identical_numbers(inline_run, tmp_path):
    study, _, path = inline_run
    report = run_study(study, output=tmp_path / "pool.h5", workers=2, progress=False)
    assert report.where == "2 local worker processes"
    assert sorted(report.complete) == ["leo-a", "leo-b"] and list(report.failed) == ["low"]
    for c in study.cases:
        assert same_case(read_case(path, c.name), read_case(tmp_path / "pool.h5", c.name)), c.name
    assert not (tmp_path / "pool.h5.parts").exists()


def test_dask_local_cluster_gives_identical_numbers(inline_run, tmp_path):
    distributed = pytest.importorskip("distributed")
    study, _, path = inline_run
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        report = run_study(study, output=tmp_path / "dask.h5", scheduler=cluster.scheduler_address,
                           progress=False)
    assert report.where.startswith("Dask cluster")
    assert sorted(report.complete) == ["leo-a", "leo-b"] and list(report.failed) == ["low"]
    for c in study.cases:
        assert same_case(read_case(path, c.name), read_case(tmp_path / "dask.h5", c.name)), c.name


def test_unreachable_scheduler_is_reported(inline_run, tmp_path, monkeypatch):
    pytest.importorskip("distributed")
    from propagator.study import runner
    from propagator.study.runner import ClusterUnavailableError

    monkeypatch.setattr(runner, "CONNECT_TIMEOUT_S", 1.0)
    study, _, _ = inline_run
    with pytest.raises(ClusterUnavailableError, match="cannot reach"):
        run_study(study, output=tmp_path / "x.h5", scheduler="tcp://127.0.0.1:9", progress=False)


# --------------------------------------------------------------------------------------
# killed mid-study, then resumed: nothing lost, nothing duplicated
# --------------------------------------------------------------------------------------
# six ~1 s cases (30-day LEO arcs, 8x8 field), written in 2-day segments
SLOW = TINY[:TINY.index("[cases.leo-a]")].replace('name = "tiny"', 'name = "killme"\nsegment_days = 2.0') \
    .replace('duration_s = 7200.0', 'duration_days = 30.0') \
    .replace('model = "zonal_j2"', 'model = "gravity_field"\ndegree = 8') + "".join(
        f"\n[cases.sat-{k}]\ninitial_state.raan_deg = {10.0 * k}\n" for k in range(6))


def _statuses(path: Path) -> dict[str, str]:
    try:
        with open_for_reading(path) as f:
            # a name listed while its case is being renamed into place reads as None
            return {n: str(g.attrs.get("status", "")) for n, g in f["cases"].items() if g is not None}
    except (OSError, KeyError, RuntimeError, ValueError):  # a write in progress
        return {}


def _run_cli(study: Path, out: Path, workers: int) -> subprocess.Popen:
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    return subprocess.Popen([sys.executable, "-m", "propagator.cli", "run", str(study), "--output", str(out),
                             "--workers", str(workers), "--quiet", "--no-plots"],
                            cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)


def _kill_when_some_complete(proc: subprocess.Popen, out: Path, sig: int, n_complete: int = 2,
                             timeout: float = 900.0) -> dict[str, str]:
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        st = _statuses(out) if out.exists() else {}
        if sum(v == "complete" for v in st.values()) >= n_complete:
            proc.send_signal(sig)
            break
        if proc.poll() is not None:
            pytest.fail(f"the run ended before it could be killed:\n{proc.stdout.read()}")
        time.sleep(0.02)
    proc.wait(timeout=120)
    return _statuses(out)


def _check_resumed(study_path: Path, out: Path, before: dict[str, dict]) -> None:
    study = load_study(study_path)
    report = run_study(study, output=out, workers=1, progress=False)
    assert report.ok and sorted(report.skipped) == sorted(before)
    names = [c.name for c in study.cases]
    with h5py.File(out, "r") as f:
        assert sorted(f["cases"]) == sorted(names)  # nothing duplicated or left over
    for n in names:
        d = read_case(out, n)
        assert d["status"] == "complete"
        assert np.array_equal(d["time_s"], 120.0 * np.arange(30 * 720 + 1))  # every sample once
        if n in before:
            assert same_case(before[n], d)  # completed cases untouched by the resume


def test_sigterm_mid_study_then_resume(tmp_path):
    study_path = write_study(tmp_path, SLOW, "killme.toml")
    out = tmp_path / "killme.h5"
    proc = _run_cli(study_path, out, workers=2)
    st = _kill_when_some_complete(proc, out, signal.SIGTERM)
    text = proc.stdout.read()
    assert proc.returncode == 130, text
    assert "interrupted" in text and "Stopped by SIGTERM" in text
    assert not any(v == "running" for v in st.values()), st  # the file was closed cleanly
    done = [n for n, v in st.items() if v == "complete"]
    assert 2 <= len(done) < 6
    _check_resumed(study_path, out, {n: read_case(out, n) for n in done})


@pytest.mark.slow
def test_sigkill_mid_study_then_resume(tmp_path):
    study_path = write_study(tmp_path, SLOW, "killme.toml")
    out = tmp_path / "killme.h5"
    proc = _run_cli(study_path, out, workers=1)
    st = _kill_when_some_complete(proc, out, signal.SIGKILL)
    assert proc.returncode == -signal.SIGKILL
    done = [n for n, v in st.items() if v == "complete"]
    assert 2 <= len(done) < 6
    _check_resumed(study_path, out, {n: read_case(out, n) for n in done})


# --------------------------------------------------------------------------------------
# throughput machinery: same file, same numbers
# --------------------------------------------------------------------------------------
def test_fast_attribute_writes_store_what_h5py_stores(tmp_path):
    """hdf5_store._set_attrs (low-level h5a calls) against h5py's attrs[key] = value:
    same HDF5 type, shape and value for every kind of value the store writes."""
    from propagator.study.hdf5_store import _attr_value, _set_attrs

    values = {"s": "text é", "empty": "", "none": None, "f": 1.5, "nf": np.float64(-2.25), "i": 7,
              "ni": np.int64(-3), "b": True, "nb": np.bool_(False), "strs": ["a", "b"],
              "nums": [1, 2.5], "arr": np.arange(3.0), "json": {"k": [1, 2]}}
    with h5py.File(tmp_path / "a.h5", "w") as f:
        ref, fast = f.create_group("ref"), f.create_group("fast")
        for k, v in values.items():
            ref.attrs[k] = _attr_value(v)
        _set_attrs(fast, values, new=True)
        _set_attrs(fast, {"f": 3.0, "s": "again"})  # overwriting deletes first, as h5py does
        ref.attrs["f"], ref.attrs["s"] = _attr_value(3.0), "again"
    with h5py.File(tmp_path / "a.h5", "r") as f:
        ref, fast = f["ref"], f["fast"]
        assert sorted(ref.attrs) == sorted(fast.attrs)
        for k in ref.attrs:
            a, b = ref.attrs.get_id(k), fast.attrs.get_id(k)
            assert a.get_type().equal(b.get_type()) and a.shape == b.shape, k
            va, vb = ref.attrs[k], fast.attrs[k]
            assert type(va) is type(vb) and np.array_equal(np.asarray(va), np.asarray(vb)), k


def test_fast_dataset_creation_matches_h5py(tmp_path):
    """The store's second series of a kind reuses the creation property list and type
    of the first (made by h5py): identical chunks, filters, fill value, extent, bytes."""
    from propagator.study.hdf5_store import StudyStore, _append_rows

    rows = np.arange(60.0).reshape(10, 6)
    with StudyStore(tmp_path / "s.h5", study_name="x") as store:
        g = store.file.create_group("t")
        first = store._create_series(g, "first", (6,))
        second = store._create_series(g, "second", (6,))
        for ds in (first, second):
            _append_rows(ds, rows)
            _append_rows(ds, rows[:3] + 100.0)
        assert first.id.get_create_plist().equal(second.id.get_create_plist())
        assert first.id.get_type().equal(second.id.get_type())
        for attr in ("chunks", "compression", "shuffle", "maxshape", "fillvalue", "shape", "dtype"):
            assert getattr(first, attr) == getattr(second, attr), attr
        assert second.chunks == (4096, 6) and second.compression == "lzf" and second.shuffle
        assert np.array_equal(second[()], np.vstack([rows, rows[:3] + 100.0]))


def test_environment_tables_are_cached_per_epoch_and_span():
    """propagate() takes its tables from propagator.table_cache: same builder, same
    arguments, so a sweep's cases share them with bitwise identical results."""
    from forcemodels.ephemeris import build_sun_moon_table
    from propagator import table_cache
    from propagator.rotation_table import build_rotation_table
    from propagator.timescales import Epoch

    e1 = Epoch.from_iso("2024-03-20T12:00:00 TT")
    e2 = Epoch.from_iso("2024-03-21T12:00:00 TT")
    a = table_cache.rotation_table(e1, 0.0, 3600.0)
    assert table_cache.rotation_table(e1, 0.0, 3600.0) is a  # cached
    assert np.array_equal(a, build_rotation_table(e1, 0.0, 3600.0))  # the table propagate builds
    b = table_cache.rotation_table(e2, 0.0, 3600.0)
    assert not np.array_equal(a, b)  # another epoch is another table
    assert not np.array_equal(a, table_cache.rotation_table(e1, 0.0, 7200.0))
    s = table_cache.sun_moon_table(e1, -3600.0, 0.0)
    assert np.array_equal(s, build_sun_moon_table(e1, -3600.0, 0.0))
    for _ in range(table_cache.CACHE_SIZE + 2):  # bounded
        e1 = e1 + 60.0
        table_cache.sun_moon_table(e1, 0.0, 60.0)
    assert len(table_cache._CACHE) <= table_cache.CACHE_SIZE


def test_in_memory_image_and_part_file_give_the_same_case(inline_run, tmp_path):
    """A worker's case travels as an in-memory HDF5 image (short arcs) or a part file
    (long arcs); both import to the same numbers and attributes."""
    from propagator.study import runner
    from propagator.study.hdf5_store import StudyStore

    study, _, path = inline_run
    case = study.case("leo-b")
    text = case.to_toml()
    mem = runner.run_case(text, case.name, None, "tiny", 86400.0)
    disk = runner.run_case(text, case.name, str(tmp_path / "part.h5"), "tiny", 86400.0)
    assert mem.data is not None and disk.data is None and mem.status == disk.status == "complete"
    with StudyStore(tmp_path / "a.h5", study_name="tiny") as st:
        st.import_case_from(mem.data, case.name)
    with StudyStore(tmp_path / "b.h5", study_name="tiny") as st:
        st.import_case_from(tmp_path / "part.h5", case.name)
    a, b = read_case(tmp_path / "a.h5", case.name), read_case(tmp_path / "b.h5", case.name)
    assert same_case(a, b) and same_case(a, read_case(path, case.name))
    volatile = {"started_utc", "finished_utc"}
    assert {k: v for k, v in a["attrs"].items() if k not in volatile} == \
        {k: v for k, v in b["attrs"].items() if k not in volatile}
    # the size estimate sends long arcs through part files (1 year at 10 s: 3.2e6 samples)
    year = case_from_toml("y", text.replace("duration_s = 7200.0", "duration_s = 31557600.0")
                          .replace("step_s = 120.0", "step_s = 10.0"))
    assert runner.output_bytes_estimate(case) < runner.IN_MEMORY_MAX_BYTES < runner.output_bytes_estimate(year)


def test_process_pool_through_part_files_gives_identical_numbers(inline_run, tmp_path, monkeypatch):
    from propagator.study import runner

    study, _, path = inline_run
    monkeypatch.setattr(runner, "IN_MEMORY_MAX_BYTES", 0.0)  # decided in the parent: every case on disk
    report = run_study(study, output=tmp_path / "pool.h5", workers=2, progress=False)
    assert sorted(report.complete) == ["leo-a", "leo-b"] and list(report.failed) == ["low"]
    assert report.workers == 2 and report.stage_seconds["parent_import"] > 0.0
    for c in study.cases:
        assert same_case(read_case(path, c.name), read_case(tmp_path / "pool.h5", c.name)), c.name
    assert not (tmp_path / "pool.h5.parts").exists()


def test_shadow_events_are_labelled_entry_and_exit():
    """Stored shadow events say entry or exit; checked against the illumination fraction
    (forcemodels.shadow, conical model) just before and after each crossing."""
    from forcemodels.ephemeris import sun_moon_positions
    from forcemodels.shadow import illumination_nb
    from propagator.elements import kep_to_cart
    from propagator.integrators.settings import EventSpec
    from propagator.propagate import propagate
    from propagator.study.runner import _event_label
    from propagator.timescales import Epoch

    epoch = Epoch.from_iso("2024-03-20T12:00:00 TT")  # equinox: a LEO passes the shadow each orbit
    y0 = kep_to_cart(np.array([7.0e6, 0.001, math.radians(20.0), 0.0, 0.0, 0.0]))
    res = propagate(epoch, y0, forces=[("central_gravity", {})], duration=4 * 3600.0,
                    events=[EventSpec(kind="penumbra"), EventSpec(kind="umbra")])
    labels = [_event_label(e) for e in res.events]
    assert {"penumbra_entry", "penumbra_exit", "umbra_entry", "umbra_exit"} <= set(labels), labels
    for e, label in zip(res.events, labels):
        nu = []
        for dt in (-20.0, 20.0):
            r = propagate(epoch, y0, forces=[("central_gravity", {})], duration=e.t_s + dt).state_final[:3]
            sun, _ = sun_moon_positions(epoch, np.array([e.t_s + dt]))
            nu.append(illumination_nb(r, sun[0]))
        assert (nu[1] < nu[0]) == label.endswith("_entry"), (label, nu)


# --------------------------------------------------------------------------------------
# throughput machinery, round 2: chunk rows, templates, reused worker store, TOML writer
# --------------------------------------------------------------------------------------
def test_short_cases_are_written_whole_and_long_ones_chunked_by_the_number_of_samples(inline_run, tmp_path):
    """A short case (time series <= SMALL_CASE_BYTES in all) is held in memory and written
    whole when it ends: contiguous, unfiltered, fixed-extent datasets.  Longer cases are
    streamed into chunked datasets whose chunks follow the announced number of samples;
    more rows than announced can still be appended, and a case that outgrows the limit
    (or is appended to after its samples were written whole) ends up chunked with the
    same numbers."""
    from propagator.study.hdf5_store import SMALL_CASE_BYTES, StudyStore

    _, _, path = inline_run
    with h5py.File(path, "r") as f:
        g = f["cases/leo-b"]  # 7200 s at 120 s: 61 samples (test_inline_run_file_contents)
        for name in ("time_s", "state_gcrf", "state_itrf", "elements_osculating", "acceleration/zonal_j2", "stm"):
            ds = g[name]
            assert ds.shape[0] == 61 and ds.chunks is None and ds.compression is None and not ds.shuffle, name
            assert ds.maxshape == ds.shape, name
        assert int(g.attrs["n_samples"]) == 61

    epoch = dict(epoch_iso="2024-01-01T00:00:00 TT", epoch_jd1=2460310.5, epoch_jd2=0.5, epoch_scale="TT",
                 case_config_toml="", force_models=[])
    rows = np.arange(150.0).reshape(25, 6)
    with StudyStore(tmp_path / "s.h5", study_name="x", small_case_bytes=0) as store:  # always streamed
        w = store.begin_case("c", **epoch, expected_rows=10)
        for a, b in ((0, 4), (4, 17), (17, 25)):
            w.append(np.arange(a, b) * 1.0, rows[a:b])
        w.finish({"nfev": 1})
    with h5py.File(tmp_path / "s.h5", "r") as f:
        g = f["cases/c"]
        assert g["state_gcrf"].chunks == (10, 6) and g["time_s"].chunks == (10,)
        assert np.array_equal(g["state_gcrf"][()], rows) and np.array_equal(g["time_s"][()], np.arange(25.0))

    n_long = SMALL_CASE_BYTES // (7 * 8) + 1  # time + 6 state columns: one row more than the limit
    big = np.arange(n_long * 6.0).reshape(n_long, 6)
    tb = np.arange(n_long) * 1.0
    with StudyStore(tmp_path / "d.h5", study_name="x") as store:
        w = store.begin_case("announced", **epoch, expected_rows=n_long)
        w.append(tb[:5], big[:5])
        assert "time_s" in store.file["cases/announced"]  # streamed from the first block
        w.append(tb[5:], big[5:])
        w.finish({})
        w = store.begin_case("outgrown", **epoch)  # not announced: held, then streamed
        w.append(tb[:100], big[:100])
        w.append(tb[100:], big[100:])
        w.finish({})
        w = store.begin_case("reopened", **epoch, expected_rows=20)
        w.append(tb[:20], big[:20])
        assert w.group["state_gcrf"].chunks is None  # written whole on access
        w.append(tb[20:30], big[20:30])  # then appended to: rewritten chunked
        w.finish({})
        w = store.begin_case("small", **epoch, expected_rows=30)
        for a in range(0, 30, 7):
            w.append(tb[a:min(a + 7, 30)], big[a:min(a + 7, 30)])
        w.finish({})
    with h5py.File(tmp_path / "d.h5", "r") as f:
        for name, n, chunk in (("announced", n_long, n_long), ("outgrown", n_long, 4096), ("reopened", 30, 20),
                               ("small", 30, None)):
            g = f["cases"][name]
            assert np.array_equal(g["state_gcrf"][()], big[:n]) and np.array_equal(g["time_s"][()], tb[:n]), name
            assert int(g.attrs["n_samples"]) == n and g.attrs["status"] == "complete", name
            if chunk is None:
                assert g["state_gcrf"].chunks is None and g["time_s"].maxshape == (n,), name
            else:
                assert g["state_gcrf"].chunks == (chunk, 6) and g["state_gcrf"].compression == "lzf", name
                assert g["time_s"].maxshape == (None,) and g["state_gcrf"].shuffle, name
            assert g["time_s"].attrs["units"] == "s" and list(g["state_gcrf"].attrs["units"]) == \
                ["m", "m", "m", "m/s", "m/s", "m/s"], name


def _same_attrs(a: h5py.HLObject, b: h5py.HLObject) -> None:
    assert sorted(a.attrs) == sorted(b.attrs)
    for k in a.attrs:
        ia, ib = a.attrs.get_id(k), b.attrs.get_id(k)
        assert ia.get_type().equal(ib.get_type()) and ia.shape == ib.shape, k
        va, vb = np.asarray(a.attrs[k]), np.asarray(b.attrs[k])
        assert type(a.attrs[k]) is type(b.attrs[k]) and va.dtype == vb.dtype, k
        assert (va.tolist() == vb.tolist()) if va.dtype.kind == "O" else va.tobytes() == vb.tobytes(), k


def test_template_copies_store_what_direct_creation_stores(tmp_path):
    """Case groups and time series copied from the per-process templates have the
    attributes (type, shape, value) and the creation properties of objects built one
    call at a time, also when the values differ from the template's (written in place)
    and for values that take h5py's general path."""
    from propagator.study.hdf5_store import (StudyStore, _append_rows, _create_group_with_attrs,
                                             _set_attrs)

    first = {"status": "running", "n": 3, "x": 1.5, "names": ["a", "b"], "v": [1.0, 2.0], "flag": True, "e": ""}
    second = {"status": "complete", "n": -7, "x": float("nan"), "names": ["c", "dé"], "v": [3.0, -0.0],
              "flag": False, "e": "long text " * 50}
    odd = {"json": {"k": [1, 2]}, "none": None, "s": "t"}
    series_attrs = {"frame": "GCRF", "columns": ["x", "y", "z"], "units": "m"}
    rows = np.arange(30.0).reshape(10, 3)
    with StudyStore(tmp_path / "s.h5", study_name="x") as store:
        f = store.file
        for i, values in enumerate((first, second, first, odd)):
            tpl = _create_group_with_attrs(f, f"tpl{i}", values)
            ref = f.create_group(f"ref{i}")
            _set_attrs(ref, values, new=True)
            _same_attrs(tpl, ref)
            assert tpl.id.get_create_plist().equal(ref.id.get_create_plist())
        for i, (hint, attrs) in enumerate(((None, series_attrs), (7, series_attrs), (7, {**series_attrs, "units": "km"}),
                                           (7, series_attrs))):
            g = f.create_group(f"series{i}")
            a = store._create_series_with_attrs(g, "tpl", (3,), attrs, rows_hint=hint)
            b = store._create_series(g, "ref", (3,), rows_hint=hint)
            _set_attrs(b, attrs, new=True)
            _same_attrs(a, b)
            assert a.chunks == b.chunks == ((4096 if hint is None else hint), 3)
            for ds in (a, b):
                _append_rows(ds, rows)
            assert np.array_equal(a[()], b[()])
        # overwriting an attribute with a value of another type replaces it (as h5py does)
        _set_attrs(f["tpl0"], {"x": "now a string", "n": 2.5})
        f["ref0"].attrs["x"], f["ref0"].attrs["n"] = "now a string", np.float64(2.5)
        _same_attrs(f["tpl0"], f["ref0"])
    with h5py.File(tmp_path / "s.h5", "r") as f:  # what is stored (an open id may hold more)
        for i in range(4):
            a, b = f[f"series{i}/tpl"], f[f"series{i}/ref"]
            assert a.id.get_create_plist().equal(b.id.get_create_plist()) and a.id.get_type().equal(b.id.get_type())
            for attr in ("chunks", "compression", "compression_opts", "shuffle", "maxshape", "fillvalue", "dtype"):
                assert getattr(a, attr) == getattr(b, attr), attr
            _same_attrs(a, b)
            assert np.array_equal(a[()], b[()])
        for i in range(4):
            _same_attrs(f[f"tpl{i}"], f[f"ref{i}"])
            assert f[f"tpl{i}"].id.get_create_plist().equal(f[f"ref{i}"].id.get_create_plist())


def test_whole_series_from_templates_store_what_direct_creation_stores(tmp_path):
    """A short case's series, copied from a template that holds their data, are the
    datasets h5py makes from the same data and attributes (contiguous, no filters)."""
    from propagator.study.hdf5_store import _GCRF_ATTRS, _TIME_ATTRS, StudyStore, _set_attrs

    rows = np.arange(60.0).reshape(10, 6)
    neg_zero = rows.copy()
    neg_zero[0, 0] = -0.0  # equal to rows as numbers, not as bytes: must be written
    cases = ((rows, _GCRF_ATTRS), (rows * -0.5, _GCRF_ATTRS), (rows[:4], _GCRF_ATTRS),
             (np.arange(7.0) * 1e9, _TIME_ATTRS), (rows, {"units": "km", "note": None}),
             (rows, _GCRF_ATTRS), (rows, _GCRF_ATTRS), (neg_zero, _GCRF_ATTRS), (rows, _GCRF_ATTRS))
    with StudyStore(tmp_path / "s.h5", study_name="x") as store:
        for i, (data, attrs) in enumerate(cases):
            g = store.file.create_group(f"g{i}")
            store._write_whole_series(g, "tpl", data, attrs)
            ref = g.create_dataset("ref", data=data)
            _set_attrs(ref, attrs, new=True)
    with h5py.File(tmp_path / "s.h5", "r") as f:
        for i, (data, _) in enumerate(cases):
            a, b = f[f"g{i}/tpl"], f[f"g{i}/ref"]
            assert a.id.get_create_plist().equal(b.id.get_create_plist()) and a.id.get_type().equal(b.id.get_type())
            assert a.chunks is None and a.maxshape == a.shape == data.shape and a.compression is None
            _same_attrs(a, b)
            assert a[()].tobytes() == data.tobytes() == b[()].tobytes()


def test_worker_store_is_reused_and_images_carry_one_case(inline_run, tmp_path):
    """Short cases of a worker are written into one in-memory file kept per thread;
    each image holds its own case only, imports to the numbers of an in-process run, and
    the file is replaced once its image has doubled."""
    import threading

    from propagator.study import runner
    from propagator.study.hdf5_store import StudyStore

    study, _, path = inline_run
    runner._MEMORY_STORES.clear()
    outs = [runner.run_case(study.case(n).to_toml(), n, None, "tiny", 86400.0, study.case(n))
            for n in ("leo-a", "leo-b", "leo-a")]
    held = runner._MEMORY_STORES[threading.get_ident()]
    for o in outs:
        with h5py.File(h5py.h5f.open_file_image(o.data)) as f:
            assert list(f["cases"]) == [o.name]
        out = tmp_path / f"{o.name}.h5"
        with StudyStore(out, study_name="tiny") as st:
            st.import_case_from(o.data, o.name)
        assert same_case(read_case(out, o.name), read_case(path, o.name))
    assert list(held[1].file["cases"]) == []  # every case deleted after its image was taken
    runner._image_taken(2 * held[2] + 1)  # grown to twice its first image: dropped and closed
    assert threading.get_ident() not in runner._MEMORY_STORES and not held[1].file.id.valid


@pytest.mark.parametrize("duration,step", [(7200.0, 120.0), (7200.0, 7.0), (-86400.0, 300.0), (-1000.3, 0.7)])
def test_segment_grid_count_is_the_number_of_samples(duration, step):
    from propagator.study.runner import _SegmentGrid, output_times

    s = parse_study(tomllib.loads(TINY.replace("duration_s = 7200.0", f"duration_s = {duration}")
                                  .replace("step_s = 120.0", f"step_s = {step}")))
    case = s.case("leo-a")
    assert _SegmentGrid(case, duration).count() == output_times(case, duration).size


def test_toml_values_read_back_bitwise():
    """The TOML writer's fast paths give text that tomllib (Python standard library)
    reads back to the very same value."""
    import struct

    from propagator.study.config import _toml_value

    for v in (0.1, -0.0, 1e300, 5e-324, -2.5e-17, 398600441800000.0, float("inf"), float("-inf")):
        back = tomllib.loads(f"x = {_toml_value(v)}")["x"]
        assert struct.pack("<d", back) == struct.pack("<d", v), v
    assert math.isnan(tomllib.loads(f"x = {_toml_value(float('nan'))}")["x"])
    for v in (0, -7, 2 ** 40, True, False, "", "a\"b\\c\n\té", np.float64(0.3), np.int64(-4), np.bool_(True)):
        back = tomllib.loads(f"x = {_toml_value(v)}")["x"]
        assert back == v and type(back) is type(v.item() if isinstance(v, np.generic) else v), v


def test_plain_attribute_values_from_templates_are_stored_bitwise(tmp_path):
    """Template groups compare plain values (str, int, float, bool) as Python values:
    -0.0 after 0.0, NaN, True after 1 and 1.0 after 1 are still stored as direct
    creation stores them; _overwrite_plain_attrs stores what _set_attrs stores."""
    from propagator.study.hdf5_store import (StudyStore, _create_group_with_attrs, _overwrite_plain_attrs,
                                             _set_attrs)

    seq = [{"x": 0.0, "n": 1, "b": True, "s": "a", "v": [1.0, 2.0]},
           {"x": -0.0, "n": 1, "b": True, "s": "a", "v": [1.0, 2.0]},
           {"x": float("nan"), "n": -2 ** 62, "b": False, "s": "é", "v": [1.0, -0.0]},
           {"x": 0.0, "n": True, "b": 1, "s": "", "v": [1.0, 2.0]},      # other types: other template
           {"x": 1, "n": 1.0, "b": 0.0, "s": None, "v": [1.0, 2.0]},
           {"x": -0.0, "n": 1, "b": True, "s": "a", "v": [1.0, 2.0]}]
    with StudyStore(tmp_path / "p.h5", study_name="x") as store:
        f = store.file
        for i, values in enumerate(seq):
            a = _create_group_with_attrs(f, f"tpl{i}", values)
            b = f.create_group(f"ref{i}")
            _set_attrs(b, values, new=True)
            _same_attrs(a, b)
        start = {"n_samples": 0, "status": "running", "finished_utc": "", "x": 0.0}
        end = {"n_samples": 289, "status": "complete", "finished_utc": "2026-01-01T00:00:00.000000Z",
               "x": -0.0, "new": 2.5, "arr": [1.0, 2.0], "flag": np.bool_(True)}
        a = _create_group_with_attrs(f, "fast", start)
        b = f.create_group("slow")
        _set_attrs(b, start, new=True)
        _overwrite_plain_attrs(a, end)
        _set_attrs(b, end)
        _same_attrs(a, b)
    with h5py.File(tmp_path / "p.h5", "r") as f:
        for i in range(len(seq)):
            _same_attrs(f[f"tpl{i}"], f[f"ref{i}"])
        _same_attrs(f["fast"], f["slow"])
        assert math.copysign(1.0, f["fast"].attrs["x"]) == -1.0


def test_stale_template_groups_are_remade_with_the_current_values(tmp_path):
    """A template whose value keeps differing from the groups made from it (they agree
    with each other) is remade after TEMPLATE_REFRESH_STREAK groups; every group still
    stores what direct creation stores."""
    from propagator.study import hdf5_store as hs

    key_names = {"only_here_a": 0.0, "only_here_b": "x", "n": 0}
    with hs.StudyStore(tmp_path / "r.h5", study_name="x") as store:
        f = store.file
        for i in range(12):
            values = dict(key_names) if i == 0 else {"only_here_a": 5.0, "only_here_b": "sweep", "n": i}
            a = hs._create_group_with_attrs(f, f"tpl{i}", values)
            b = f.create_group(f"ref{i}")
            hs._set_attrs(b, values, new=True)
            _same_attrs(a, b)
        made = [t for k, t in hs._templates().groups.items() if {e[0] for e in k} == set(key_names)]
        assert len(made) == 1 and made[0].remade == 1 and made[0].values["only_here_a"] == 5.0
    with h5py.File(tmp_path / "r.h5", "r") as f:
        for i in range(12):
            _same_attrs(f[f"tpl{i}"], f[f"ref{i}"])


def test_cached_setup_pieces_equal_direct_construction():
    """Settings, events and anomalies cached per process equal those made directly, and
    values that compare equal but differ (-0.0 and 0.0) do not share a cache entry."""
    from propagator import elements as el
    from propagator.integrators.settings import EventSpec, IntegratorSettings
    from propagator.study import runner as R

    s = parse_study(tomllib.loads(TINY.replace("[cases.leo-a]", "[cases.leo-a]\ninitial_state.mean_anomaly_deg = 33.0")))
    for case in s.cases:
        ic = case.config.integrator
        direct = IntegratorSettings(method=ic.method, rtol=ic.relative_tolerance, atol_pos_m=ic.absolute_tolerance_m,
                                    atol_vel_m_s=ic.absolute_tolerance_m_s, max_steps=ic.max_steps)
        assert R._integrator_settings(case) == direct and R._integrator_settings(case) is R._integrator_settings(case)
        evs, r_stop = R._events(case)
        expect = [EventSpec(kind=k) for k in case.config.output.record_events]
        assert evs[:len(expect)] == expect and evs is not R._events(case)[0]  # a new list each call
        assert (r_stop is None) == (case.config.stop.min_altitude_m is None)
    rng = np.random.default_rng(3)
    for M, e in [(0.0, 0.0), (-0.0, 0.0), (0.0, 0.3)] + [(float(m), float(x)) for m, x in
                                                         zip(rng.uniform(-7, 7, 20), rng.uniform(0, 0.95, 20))]:
        got, ref = R._mean_to_true(M, e), float(el.mean_to_true(M, e))
        assert got == ref and math.copysign(1.0, got) == math.copysign(1.0, ref), (M, e)
    assert R._exact_key(0.0) != R._exact_key(-0.0)
    # the first segment's output times are shared (read-only) by cases with the same grid
    a, b = s.case("leo-a"), s.case("low")
    ga, gb = R._SegmentGrid(a, 7200.0), R._SegmentGrid(b, 7200.0)
    sel_a, out_a = R._first_segment_output(ga, 0.0, 3600.0)
    sel_b, out_b = R._first_segment_output(gb, 0.0, 3600.0)
    sel_ref, out_ref = R._segment_output(ga, 0, 0.0, 3600.0)
    assert sel_a is sel_b and out_a is out_b and not sel_a.flags.writeable
    assert sel_a.tobytes() == sel_ref.tobytes() and out_a.times_s.tobytes() == out_ref.times_s.tobytes()
    assert R._first_segment_output(ga, 0.0, 7200.0)[0].size == 61  # another segment: its own entry


def test_setups_made_in_batches_give_the_same_file(inline_run, tmp_path, monkeypatch):
    """Cases set up in batches (several at once, a failing one among them) give the same
    numbers and attributes as the inline run, and a case whose setup fails still fails
    alone with its reason."""
    from propagator.study import runner as R

    study, _, path = inline_run
    monkeypatch.setattr(R, "SETUP_BATCH", 2)
    report = run_study(study, output=tmp_path / "b.h5", workers=1, progress=False)
    assert sorted(report.complete) == ["leo-a", "leo-b"] and list(report.failed) == ["low"]
    assert report.failed["low"] == read_case(path, "low")["attrs"]["error"]
    for c in study.cases:
        a, b = read_case(path, c.name), read_case(tmp_path / "b.h5", c.name)
        assert same_case(a, b), c.name
        for k in ("case_config_toml", "force_models_json", "sweep_values_json", "object_name", "case_origin",
                  "segment_length_s", "duration_s", "epoch_jd1", "epoch_jd2", "n_samples"):
            assert a["attrs"].get(k) == b["attrs"].get(k), (c.name, k)
        assert set(a["integrator_statistics"]) == set(b["integrator_statistics"])


def test_study_file_gets_a_fixed_metadata_cache(tmp_path):
    from propagator.study.hdf5_store import METADATA_CACHE_BYTES, StudyStore

    with StudyStore(tmp_path / "m.h5", study_name="x") as store:
        cfg = store.file.id.get_mdc_config()
        assert cfg.max_size == cfg.min_size == METADATA_CACHE_BYTES
        assert (cfg.incr_mode, cfg.flash_incr_mode, cfg.decr_mode) == (0, 0, 0)


def test_stopped_pool_does_not_hang_on_a_partial_result():
    """A pool worker killed while sending its result leaves a partial message in the result
    pipe.  After the runner's stop path (kill, join, _release_result_pipe) the executor's
    manager thread must end; before the fix it waited for the rest of the message forever
    and the CLI hung at interpreter exit (about 1 SIGTERM in 10).  The partial message is
    made here directly: a length header with no body."""
    import struct
    from concurrent.futures import ProcessPoolExecutor

    from propagator.study.runner import _pool_context, _release_result_pipe

    pool = ProcessPoolExecutor(max_workers=1, mp_context=_pool_context())
    assert pool.submit(abs, -1).result(timeout=60) == 1        # worker and manager thread up
    writer = pool._result_queue._writer
    thread = pool._executor_manager_thread
    try:
        os.write(writer.fileno(), struct.pack("!i", 1 << 16))   # header of 64 KiB, no body
        procs = list(pool._processes.values())
        for proc in procs:
            proc.kill()
        for proc in procs:
            proc.join(timeout=10)
        _release_result_pipe(pool)
        pool.shutdown(wait=False, cancel_futures=True)
        thread.join(timeout=20)
        assert not thread.is_alive(), "the executor's manager thread still waits on the result pipe"
    finally:
        if thread.is_alive() and not writer.closed:             # a regression: let this process exit
            os.write(writer.fileno(), b"\0" * (1 << 16))
            thread.join(timeout=20)
