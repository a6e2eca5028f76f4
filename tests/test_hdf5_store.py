"""Tests of the HDF5 study store (propagator.study.hdf5_store) and the study summary.

The trajectory is a synthetic circular two-body orbit built with numpy (r = a, rate
n = sqrt(GM/a^3), rotated by inclination and RAAN), so every stored value is known.
Files are read back with h5py directly, not through the store.
"""

from __future__ import annotations

import datetime as dt
import importlib.metadata
import json
import math
import signal
import subprocess
import sys
import textwrap
import time
import tomllib
from pathlib import Path

import h5py
import numpy as np
import pytest

from propagator import constants
from propagator.study import hdf5_store as hs
from propagator.study.summary import render_summary, summarize

A = 7.0e6  # semi-major axis [m] (invented LEO case)
INC = math.radians(51.6)
RAAN = math.radians(30.0)
N = math.sqrt(constants.GM_EARTH / A**3)  # mean motion of a circular orbit [rad/s] (Kepler's third law)
# 2020-03-01T00:00:00 UTC = JD 2458909.5 UTC; TT - UTC = 32.184 s + 37 s = 69.184 s (TAI-UTC = 37 s
# since 2017-01-01, IERS Bulletin C 52 / Leap_Second.dat)
EPOCH = dict(epoch_iso="2020-03-01T00:00:00.000000 UTC", epoch_jd1=2458909.5,
             epoch_jd2=69.184 / 86400.0, epoch_scale="TT")
CONFIG_TOML = 'name = "leo-a"\nduration_days = 1.0\n[initial_state]\nsemi_major_axis_km = 7000.0\n'
FORCE_MODELS = [{"model": "central_gravity", "gm": constants.GM_EARTH, "gravity_field": "point mass",
                 "tide_system": "n/a"}]


def _rot(inc: float, raan: float) -> np.ndarray:
    """Perifocal -> inertial rotation R3(-raan) R1(-inc) (argument of perigee 0)."""
    ci, si, co, so = math.cos(inc), math.sin(inc), math.cos(raan), math.sin(raan)
    r1 = np.array([[1, 0, 0], [0, ci, -si], [0, si, ci]])
    r3 = np.array([[co, -so, 0], [so, co, 0], [0, 0, 1]])
    return r3 @ r1


def circular_arc(t: np.ndarray, phase: float = 0.0) -> np.ndarray:
    """GCRF states (n, 6) [m, m/s] of the circular orbit at times t [s]."""
    u = N * t + phase
    plane = np.column_stack([A * np.cos(u), A * np.sin(u), 0 * u,
                             -A * N * np.sin(u), A * N * np.cos(u), 0 * u])
    m = _rot(INC, RAAN)
    return np.hstack([plane[:, :3] @ m.T, plane[:, 3:] @ m.T])


def arc_extras(t: np.ndarray) -> dict:
    st = circular_arc(t)
    r = st[:, :3]
    rn = np.linalg.norm(r, axis=1)[:, None]
    el = np.column_stack([np.full_like(t, A), np.zeros_like(t), np.full_like(t, INC), np.full_like(t, RAAN),
                          np.zeros_like(t), np.mod(N * t, 2 * math.pi)])
    stm = np.broadcast_to(np.eye(6), (t.size, 6, 6)).copy()
    stm[:, 0, 3] = t  # d x / d vx0 of free motion, just to have varying numbers
    sens = np.stack([st * 1e-3, st * 2e-3], axis=2)  # (n, 6, 2)
    return dict(states_itrf=st[:, [1, 0, 2, 4, 3, 5]], elements=el,
                accelerations={"central_gravity": -constants.GM_EARTH * r / rn**3,
                               "srp": np.tile([1e-8, 2e-8, -3e-9], (t.size, 1))},
                stm=stm, sensitivity=sens, sensitivity_names=["cr", "area_to_mass"])


def slice_extras(ex: dict, sl: slice) -> dict:
    """The optional append() arguments of arc_extras restricted to rows ``sl``."""
    out = {}
    for k, v in ex.items():
        if k == "accelerations":
            out[k] = {m: a[sl] for m, a in v.items()}
        elif k == "sensitivity_names":
            out[k] = v
        else:
            out[k] = v[sl]
    return out


def write_case(store: hs.StudyStore, name: str, t: np.ndarray, pieces: list[int] | None = None,
               extras: bool = True, finish: bool = True):
    w = store.begin_case(name, **EPOCH, case_config_toml=CONFIG_TOML, force_models=FORCE_MODELS,
                         extra_attrs={"object_name": "LEO-A", "area_to_mass": 0.01})
    st = circular_arc(t)
    ex = arc_extras(t) if extras else {}
    bounds = np.cumsum([0] + (pieces or [t.size]))
    assert bounds[-1] == t.size
    for i0, i1 in zip(bounds[:-1], bounds[1:]):
        sl = slice(i0, i1)
        w.append(t[sl], st[sl], **slice_extras(ex, sl))
    if extras:
        period = 2 * math.pi / N
        tn = np.arange(1, 3) * period  # ascending node (u = 0 mod 2 pi)
        w.add_events(tn, ["ascending_node"] * 2, circular_arc(tn))
        w.add_events([tn[0] + period / 2], ["descending_node"], circular_arc(np.array([tn[0] + period / 2])))
        ric = np.column_stack([np.sin(t / 1000.0), np.cos(t / 700.0), 0.1 * np.ones_like(t)])
        w.add_fit("osculating", {"a": A, "e": 0.0, "i": INC}, residuals_ric=ric, residual_times=t,
                  table={"component": np.array(["radial", "in_track", "cross_track"]),
                         "rms_m": np.sqrt(np.mean(ric**2, axis=0))},
                  attrs={"reference_epoch_s": 0.0, "element_units": ["m", "1", "rad"], "window_s": [0, 86400.0],
                         "nested": {"k": [1, 2]}})
    if finish:
        w.finish({"nfev": 12345, "accepted": 1000, "rejected": 17, "min_step_s": 1.5, "max_step_s": 300.0,
                  "status": "ok", "message": "reached end of arc"})
    return w


T = np.arange(0.0, 86400.0 + 1.0, 10.0)  # one day at 10 s: 8641 samples


@pytest.fixture()
def study_file(tmp_path: Path) -> Path:
    path = tmp_path / "study.h5"
    with hs.StudyStore(path, study_name="unit-test study") as store:
        write_case(store, "leo-a", T)
    return path


# --------------------------------------------------------------------------------------
def test_values_and_attributes_read_back_with_h5py(study_file: Path) -> None:
    st = circular_arc(T)
    ex = arc_extras(T)
    with h5py.File(study_file, "r") as f:
        # root attributes
        assert f.attrs["schema_name"] == "longarc-study-trajectories"
        assert int(f.attrs["schema_version"]) == 1
        assert f.attrs["software_version"] == importlib.metadata.version("longarc")
        created = dt.datetime.strptime(f.attrs["created_utc"], "%Y-%m-%dT%H:%M:%S.%fZ")
        assert abs((dt.datetime.now(dt.timezone.utc).replace(tzinfo=None) - created).total_seconds()) < 600
        assert f.attrs["study_name"] == "unit-test study"
        g = f["cases/leo-a"]
        # time series, bit for bit
        assert np.array_equal(g["time_s"][()], T)
        assert np.array_equal(g["state_gcrf"][()], st)
        assert np.array_equal(g["state_itrf"][()], ex["states_itrf"])
        assert np.array_equal(g["elements_osculating"][()], ex["elements"])
        assert np.array_equal(g["acceleration/central_gravity"][()], ex["accelerations"]["central_gravity"])
        assert np.array_equal(g["acceleration/srp"][()], ex["accelerations"]["srp"])
        assert np.array_equal(g["stm"][()], ex["stm"])
        assert np.array_equal(g["sensitivity"][()], ex["sensitivity"])
        assert list(g["sensitivity"].attrs["parameter_names"]) == ["cr", "area_to_mass"]
        assert list(g["state_gcrf"].attrs["units"]) == ["m", "m", "m", "m/s", "m/s", "m/s"]
        assert list(g["elements_osculating"].attrs["columns"]) == list(hs.ELEMENT_COLUMNS)
        assert g["time_s"].attrs["time_scale"] == "TT"
        assert g["acceleration/srp"].attrs["units"] == "m/s^2"
        # the synthetic orbit itself: |r| = a and |v| = sqrt(GM/a) (vis-viva, circular orbit)
        assert np.allclose(np.linalg.norm(g["state_gcrf"][:, :3], axis=1), A, rtol=1e-14)
        assert np.allclose(np.linalg.norm(g["state_gcrf"][:, 3:], axis=1), math.sqrt(constants.GM_EARTH / A),
                           rtol=1e-14)
        # case attributes
        a = g.attrs
        assert a["status"] == "complete" and a["error"] == "" and a["traceback"] == ""
        assert a["epoch_iso"] == EPOCH["epoch_iso"] and a["epoch_scale"] == "TT"
        assert a["epoch_jd1"] == EPOCH["epoch_jd1"] and a["epoch_jd2"] == EPOCH["epoch_jd2"]
        assert tomllib.loads(a["case_config_toml"]) == tomllib.loads(CONFIG_TOML)
        assert json.loads(a["force_models_json"]) == FORCE_MODELS
        consts = json.loads(a["constants_json"])
        for name in ("GM_EARTH", "R_EARTH_EQ", "WGS84_A", "C_LIGHT", "AU", "GM_SUN", "GM_MOON"):
            assert consts[name]["value"] == getattr(constants, name)
        assert "IERS Conventions 2010" in consts["GM_EARTH"]["description"]
        assert a["software_version"] == importlib.metadata.version("longarc")
        assert a["object_name"] == "LEO-A" and a["area_to_mass"] == 0.01
        assert int(a["n_samples"]) == T.size
        stats = g["integrator_statistics"].attrs
        assert (stats["nfev"], stats["accepted"], stats["rejected"]) == (12345, 1000, 17)
        assert stats["min_step_s"] == 1.5 and stats["max_step_s"] == 300.0
        assert stats["status"] == "ok" and stats["message"] == "reached end of arc"
        # events (parallel datasets, appended in two calls)
        ev = g["events"]
        assert [k.decode() for k in ev["kind"][()]] == ["ascending_node", "ascending_node", "descending_node"]
        assert ev["state_gcrf"].shape == (3, 6)
        assert np.allclose(ev["state_gcrf"][:2, 2], 0.0, atol=1e-6)  # z = 0 at the nodes
        # fit
        fg = g["fits/osculating"]
        assert [s.decode() for s in fg["element_names"][()]] == ["a", "e", "i"]
        assert np.array_equal(fg["element_values"][()], [A, 0.0, INC])
        assert np.array_equal(fg["residual_time_s"][()], T)
        assert fg["residual_ric"].shape == (T.size, 3)
        assert list(fg["table"].attrs["columns"]) == ["component", "rms_m"]
        assert [s.decode() for s in fg["table/component"][()]] == ["radial", "in_track", "cross_track"]
        assert list(fg.attrs["element_units"]) == ["m", "1", "rad"]  # list of str -> string array
        assert fg.attrs["window_s"].dtype == np.float64 and list(fg.attrs["window_s"]) == [0.0, 86400.0]
        assert json.loads(fg.attrs["nested"]) == {"k": [1, 2]}


def test_read_case_matches(study_file: Path) -> None:
    c = hs.read_case(study_file, "leo-a")
    assert c["status"] == "complete"
    assert np.array_equal(c["state_gcrf"], circular_arc(T))
    assert c["sensitivity_names"] == ["cr", "area_to_mass"]
    assert set(c["accelerations"]) == {"central_gravity", "srp"}
    assert c["events"]["kind"][-1] == "descending_node"
    fit = c["fits"]["osculating"]
    assert fit["values"] == {"a": A, "e": 0.0, "i": INC}
    assert fit["table"]["component"] == ["radial", "in_track", "cross_track"]
    assert c["integrator_statistics"]["nfev"] == 12345
    assert c["force_models"] == FORCE_MODELS
    assert c["epoch"]["scale"] == "TT"
    blocks = list(hs.iter_case_rows(study_file, "leo-a", ("time_s", "state_gcrf"), block_rows=1000))
    assert len(blocks) == 9
    assert np.array_equal(np.concatenate([b["state_gcrf"] for b in blocks]), c["state_gcrf"])
    rev = list(hs.iter_case_rows(study_file, "leo-a", ("time_s",), block_rows=1000, reverse=True))
    assert np.array_equal(np.concatenate([b["time_s"] for b in rev]), T[::-1])


@pytest.mark.parametrize("compression", ["lzf", "gzip"])
def test_filters_chunks_and_resizable(tmp_path: Path, compression: str) -> None:
    path = tmp_path / f"{compression}.h5"
    with hs.StudyStore(path, compression=compression, gzip_level=6) as store:
        write_case(store, "c", T)
    series = ["time_s", "state_gcrf", "state_itrf", "elements_osculating", "acceleration/srp", "stm",
              "sensitivity", "fits/osculating/residual_ric", "events/time_s", "events/state_gcrf"]
    with h5py.File(path, "r") as f:
        g = f["cases/c"]
        for name in series:
            ds = g[name]
            assert ds.shuffle, name
            assert ds.compression == compression, name
            if compression == "gzip":
                assert ds.compression_opts == 6
            assert ds.maxshape[0] is None and ds.maxshape[1:] == ds.shape[1:], name
            assert ds.chunks[1:] == ds.shape[1:], name
            row_bytes = 8 * int(np.prod(ds.shape[1:], dtype=int))
            assert ds.chunks[0] == min(4096, hs.MAX_CHUNK_BYTES // row_bytes), name
        assert g["state_gcrf"].chunks == (4096, 6)
        assert g["stm"].chunks == (910, 6, 6)  # 256 KiB / (36 * 8 B)
        ratio = g["state_gcrf"].nbytes / g["state_gcrf"].id.get_storage_size()
        # the same states without shuffle, written here for comparison (DESIGN.md: float
        # states barely compress without shuffle)
        tmp = h5py.File(tmp_path / "noshuffle.h5", "w")
        ds_ns = tmp.create_dataset("s", data=g["state_gcrf"][()], chunks=(4096, 6), compression=compression)
        ratio_ns = ds_ns.nbytes / ds_ns.id.get_storage_size()
        tmp.close()
    print(f"{compression}: state_gcrf compression ratio {ratio:.3f} with shuffle, {ratio_ns:.3f} without")
    assert ratio > ratio_ns


def test_append_in_pieces_equals_one_shot(tmp_path: Path) -> None:
    path = tmp_path / "pieces.h5"
    pieces = [1, 999, 4096, 3000, T.size - 8096]
    with hs.StudyStore(path) as store:
        write_case(store, "whole", T)
        write_case(store, "pieces", T, pieces=pieces)
    with h5py.File(path, "r") as f:
        a, b = f["cases/whole"], f["cases/pieces"]
        names = []
        a.visit(lambda n: names.append(n) if isinstance(a[n], h5py.Dataset) else None)
        assert len(names) >= 15
        for n in names:
            assert a[n].shape == b[n].shape and a[n].chunks == b[n].chunks, n
            assert np.array_equal(a[n][()], b[n][()]), n


def test_status_lifecycle_failures_and_import(tmp_path: Path) -> None:
    main, worker = tmp_path / "main.h5", tmp_path / "worker-1.h5"
    t = T[:500]
    with hs.StudyStore(main, study_name="s") as store:
        assert store.case_names() == [] and store.case_status("x") is None
        write_case(store, "done", t)
        w = write_case(store, "stale", t, finish=False)
        assert store.case_status("stale") == "running"
        assert store.completed_cases() == {"done"}
        store.mark_failed("never-started", "ValueError: perigee below the surface\nmore", "Traceback ...")
        w.append(t[:3], circular_arc(t[:3]), **slice_extras(arc_extras(t), slice(0, 3)))
    # a later run: the stale case begins anew (old group deleted), others untouched
    with hs.StudyStore(main) as store:
        assert store.case_status("stale") == "running"
        w = store.begin_case("stale", **EPOCH, case_config_toml="", force_models=[])
        w.append(t[:10], circular_arc(t[:10]))
        assert store.file["cases/stale/time_s"].shape == (10,)
        assert "stm" not in store.file["cases/stale"]
        store.mark_failed("stale", "RuntimeError: step size underflow", "Traceback (most recent call last): ...")
        with pytest.raises(RuntimeError):
            w.append(t[10:12], circular_arc(t[10:12]))
        assert store.case_status("stale") == "failed"
    with h5py.File(main, "r") as f:
        assert f["cases/stale"].attrs["traceback"].startswith("Traceback")
        assert f["cases/never-started"].attrs["status"] == "failed"
        assert f["cases/never-started"].attrs["error"].startswith("ValueError")
    # per-worker file imported into the main file
    with hs.StudyStore(worker, study_name="s") as store:
        write_case(store, "from-worker", t)
        write_case(store, "running-in-worker", t[:50], finish=False)
    with hs.StudyStore(main) as store:
        store.import_case_from(worker, "from-worker")
        store.import_case_from(worker, "running-in-worker")
        with pytest.raises(KeyError):
            store.import_case_from(worker, "no-such-case")
        assert store.completed_cases() == {"done", "from-worker"}
    with h5py.File(main, "r") as f, h5py.File(worker, "r") as fw:
        a, b = f["cases/from-worker"], fw["cases/from-worker"]
        assert dict(a.attrs) == dict(b.attrs)
        assert np.array_equal(a["stm"][()], b["stm"][()])
        assert a["stm"].shuffle and a["stm"].compression == "lzf" and a["stm"].chunks == b["stm"].chunks
        assert a["integrator_statistics"].attrs["nfev"] == 12345
    assert hs.mark_unfinished_as_interrupted(main) == ["running-in-worker"]
    with hs.StudyStore(main, mode="r") as store:
        assert store.case_status("running-in-worker") == "interrupted"
        with pytest.raises(PermissionError):
            store.mark_failed("done", "x")


def test_mark_interrupted_keeps_committed_samples_and_is_not_complete(tmp_path: Path) -> None:
    path = tmp_path / "stop.h5"
    t = T[:700]
    ex = arc_extras(t)
    with hs.StudyStore(path, study_name="s") as store:
        write_case(store, "done", t)
        w = store.begin_case("stopped", **EPOCH, case_config_toml=CONFIG_TOML, force_models=FORCE_MODELS)
        w.append(t[:300], circular_arc(t[:300]), **slice_extras(ex, slice(0, 300)))
        w.append(t[300:500], circular_arc(t[300:500]), **slice_extras(ex, slice(300, 500)))
        w.add_events(t[[10, 20]], ["ascending_node", "descending_node"], circular_arc(t[[10, 20]]))
        # a signal inside the next append / add_events: some datasets already grew, others not
        g = store.file["cases/stopped"]
        for key in ("time_s", "state_gcrf", "stm", "acceleration/srp"):
            g[key].resize(503, axis=0)
        g["events/time_s"].resize(3, axis=0)
        store.mark_interrupted("stopped", "interrupted by SIGINT")
        with pytest.raises(RuntimeError):  # the writer is closed
            w.append(t[500:510], circular_arc(t[500:510]), **slice_extras(ex, slice(500, 510)))
        store.mark_interrupted("never-started", "stop requested before the case began")
        assert store.case_status("stopped") == "interrupted"
        assert store.completed_cases() == {"done"}
    d = hs.read_case(path, "stopped")
    assert d["status"] == "interrupted"
    assert d["attrs"]["error"] == "interrupted by SIGINT" and d["attrs"]["traceback"] == ""
    assert d["attrs"]["finished_utc"].endswith("Z") and d["attrs"]["n_samples"] == 500
    assert np.array_equal(d["time_s"], t[:500])
    assert np.array_equal(d["state_gcrf"], circular_arc(t[:500]))
    refs = {"state_itrf": ex["states_itrf"], "elements_osculating": ex["elements"], "stm": ex["stm"],
            "sensitivity": ex["sensitivity"]}
    for key, ref in refs.items():
        assert np.array_equal(d[key], ref[:500]), key
    assert {m: a.shape for m, a in d["accelerations"].items()} == {"central_gravity": (500, 3), "srp": (500, 3)}
    assert d["events"]["kind"] == ["ascending_node", "descending_node"]
    assert np.array_equal(d["events"]["time_s"], t[[10, 20]])
    bare = hs.read_case(path, "never-started")
    assert bare["status"] == "interrupted" and bare["attrs"]["n_samples"] == 0 and bare["time_s"] is None
    assert bare["attrs"]["error"] == "stop requested before the case began"
    # no open writer (a later process): only the label changes; read-only files refuse
    with hs.StudyStore(path) as store:
        store.mark_interrupted("done", "stopped while re-running it")
        assert store.completed_cases() == set()
    assert np.array_equal(hs.read_case(path, "done")["state_gcrf"], circular_arc(t))
    with hs.StudyStore(path, mode="r") as store:
        with pytest.raises(PermissionError):
            store.mark_interrupted("done", "x")


def test_bad_input_is_rejected(tmp_path: Path) -> None:
    with hs.StudyStore(tmp_path / "bad.h5") as store:
        w = store.begin_case("c", **EPOCH, case_config_toml="", force_models=[])
        t = T[:5]
        with pytest.raises(ValueError, match="state_gcrf has shape"):
            w.append(t, circular_arc(t)[:, :3])
        with pytest.raises(ValueError, match="sensitivity_names"):
            w.append(t, circular_arc(t), sensitivity=np.zeros((5, 6, 2)), sensitivity_names=["cr"])
        w.append(t, circular_arc(t), stm=np.zeros((5, 6, 6)))
        with pytest.raises(ValueError, match="same quantities"):
            w.append(t, circular_arc(t))  # stm missing in the second block
        with pytest.raises(ValueError, match="clashes"):
            store.begin_case("d", **EPOCH, case_config_toml="", force_models=[], extra_attrs={"status": "x"})
        with pytest.raises(ValueError, match="case name"):
            store.begin_case("a/b", **EPOCH, case_config_toml="", force_models=[])
        w.finish({})
        with pytest.raises(RuntimeError):
            w.append(t, circular_arc(t), stm=np.zeros((5, 6, 6)))
    with h5py.File(tmp_path / "other.h5", "w") as f:
        f.attrs["schema_name"] = "something-else"
    with pytest.raises(ValueError, match="schema"):
        hs.StudyStore(tmp_path / "other.h5")


# --------------------------------------------------------------------------------------
# Crash robustness (subprocesses)
# --------------------------------------------------------------------------------------
_CHILD = textwrap.dedent("""
    import sys, time
    sys.path[:0] = [{tests!r}, {root!r}]
    import numpy as np
    import test_hdf5_store as T
    from propagator.study import hdf5_store as hs
    path, flush_s = sys.argv[1], float(sys.argv[2])
    with hs.StudyStore(path, study_name="crash", flush_interval_s=flush_s) as store:
        T.write_case(store, "done", T.T)
        w = store.begin_case("partial", **T.EPOCH, case_config_toml="", force_models=[])
        k = 0
        while True:
            t = np.arange(k * 1000, (k + 1) * 1000) * 10.0
            w.append(t, T.circular_arc(t), stm=np.zeros((t.size, 6, 6)))
            k += 1
            if k == 3:
                print("appending", flush=True)
""")


def _run_child_until_appending(tmp_path: Path, flush_s: float) -> tuple[subprocess.Popen, Path]:
    path = tmp_path / "crash.h5"
    script = tmp_path / "child.py"
    script.write_text(_CHILD.format(tests=str(Path(__file__).parent), root=str(Path(__file__).parents[1])))
    proc = subprocess.Popen([sys.executable, str(script), str(path), str(flush_s)], stdout=subprocess.PIPE,
                            text=True)
    line = proc.stdout.readline()
    if line.strip() != "appending":
        proc.kill()
        proc.wait()
        pytest.fail(f"child did not start appending (said {line!r})")
    time.sleep(0.3)
    return proc, path


def _stop(proc: subprocess.Popen, sig: int) -> int:
    """Send ``sig`` and wait; a child that does not end within 30 s is killed (test fails)."""
    proc.send_signal(sig)
    try:
        return proc.wait(timeout=30)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()
        pytest.fail(f"child ignored signal {sig}")


def _check_done_case(path: Path) -> None:
    with h5py.File(path, "r") as f:
        g = f["cases/done"]
        assert g.attrs["status"] == "complete"
        assert np.array_equal(g["time_s"][()], T)
        assert np.array_equal(g["state_gcrf"][()], circular_arc(T))
        assert np.array_equal(g["stm"][()], arc_extras(T)["stm"])
        assert f["cases/partial"].attrs["status"] == "running"


@pytest.mark.parametrize("flush_s", [0.0, 10.0])
def test_sigkill_mid_case_keeps_completed_cases(tmp_path: Path, flush_s: float) -> None:
    proc, path = _run_child_until_appending(tmp_path, flush_s)
    assert _stop(proc, signal.SIGKILL) == -signal.SIGKILL
    _check_done_case(path)
    with hs.StudyStore(path, mode="r") as store:
        assert store.completed_cases() == {"done"}
        assert store.case_status("partial") == "running"
    # the next run rewrites the unfinished case in place
    with hs.StudyStore(path) as store:
        w = store.begin_case("partial", **EPOCH, case_config_toml="", force_models=[])
        w.append(T[:5], circular_arc(T[:5]))
        w.finish({"nfev": 1})
        assert store.completed_cases() == {"done", "partial"}
    assert hs.read_case(path, "partial")["time_s"].shape == (5,)
    _check_done = hs.read_case(path, "done")
    assert np.array_equal(_check_done["state_gcrf"], circular_arc(T))


def test_sigterm_closes_file_cleanly(tmp_path: Path) -> None:
    proc, path = _run_child_until_appending(tmp_path, 1e9)  # no flush while appending
    # the summary reads a file another process is writing (HDF5 file locking refuses a
    # plain open; the reader falls back to an unlocked open and sees the last flush)
    rows = {r["case"]: r for r in summarize(path)}
    assert rows["done"]["status"] == "complete" and rows["done"]["samples"] == T.size
    assert rows["partial"]["status"] == "running"
    assert _stop(proc, signal.SIGTERM) == 128 + signal.SIGTERM  # SystemExit raised by the store's handler
    _check_done_case(path)
    with h5py.File(path, "r") as f:  # closed cleanly: the partial case is whole up to its last block
        g = f["cases/partial"]
        n = int(g.attrs["n_samples"])
        assert n >= 3000 and n % 1000 == 0
        assert g["time_s"].shape == (n,) and g["stm"].shape == (n, 6, 6)
        assert np.array_equal(g["state_gcrf"][()], circular_arc(np.arange(n) * 10.0))


# --------------------------------------------------------------------------------------
# Summary
# --------------------------------------------------------------------------------------
def test_summary_rows_and_table(tmp_path: Path) -> None:
    from rich.console import Console

    path = tmp_path / "sum.h5"
    with hs.StudyStore(path, study_name="sum") as store:
        write_case(store, "leo-a", T)
        w = write_case(store, "leo-b", T[:100], extras=False, finish=False)
        w.finish({"evaluations": 77, "accepted_steps": 6, "rejected_steps": 1})  # the runner's key names
        store.mark_failed("leo-c", "ValueError: [initial_state] perigee below the surface\ndetails", "tb")
    rows = summarize(path)
    assert [r["case"] for r in rows] == ["leo-a", "leo-b", "leo-c"]
    a, b, c = rows
    assert a["status"] == "complete" and a["samples"] == T.size
    assert a["span_days"] == pytest.approx(1.0, abs=1e-12)
    assert (a["nfev"], a["accepted"], a["rejected"]) == (12345, 1000, 17)
    assert a["epoch"] == EPOCH["epoch_iso"]
    assert b["span_days"] == pytest.approx(990.0 / 86400.0, rel=1e-12)
    assert (b["nfev"], b["accepted"], b["rejected"]) == (77, 6, 1)
    assert c["status"] == "failed" and c["samples"] == 0 and c["nfev"] is None
    assert c["error"] == "ValueError: [initial_state] perigee below the surface"
    console = Console(record=True, width=200)
    render_summary(rows, console)
    text = console.export_text()
    for word in ("leo-a", "leo-b", "leo-c", "complete", "failed", "12345", "[initial_state]", "1.000"):
        assert word in text, word


def test_held_samples_of_a_short_case_reach_the_file_however_it_ends(tmp_path: Path) -> None:
    """A short case is held in memory until it ends (written whole then); a stop, a
    failure or closing the file with the case unfinished writes what was appended."""
    path = tmp_path / "held.h5"
    t = T[:50]
    st = circular_arc(t)
    with hs.StudyStore(path, study_name="s") as store:
        for name in ("stopped", "failed", "open"):
            w = store.begin_case(name, **EPOCH, case_config_toml=CONFIG_TOML, force_models=FORCE_MODELS)
            w.append(t[:20], st[:20], elements=st[:20])
            w.append(t[20:], st[20:], elements=st[20:])
            assert w._pending and "time_s" not in store._f[f"cases/{name}"]  # held, not written yet
        store.mark_interrupted("stopped", "interrupted by SIGINT")
        store.mark_failed("failed", "RuntimeError: boom")
    for name, status in (("stopped", "interrupted"), ("failed", "failed"), ("open", "running")):
        d = hs.read_case(path, name)
        assert d["status"] == status and d["attrs"]["n_samples"] == 50, name
        assert np.array_equal(d["time_s"], t) and np.array_equal(d["state_gcrf"], st), name
        assert np.array_equal(d["elements_osculating"], st), name
    with h5py.File(path, "r") as f:
        ds = f["cases/stopped/state_gcrf"]
        assert ds.chunks is None and ds.compression is None and ds.maxshape == (50, 6)
        assert list(ds.attrs["columns"]) == list(hs.STATE_COLUMNS) and ds.attrs["frame"] == "GCRF"


def test_closing_with_a_case_unfinished_cuts_an_append_stopped_part_way(tmp_path: Path) -> None:
    """An append stopped between its datasets (as by a signal) leaves a longer time_s;
    closing the store keeps the rows of completed appends only (n_samples)."""
    path = tmp_path / "cut.h5"
    t = T[:300]
    st = circular_arc(t)
    with hs.StudyStore(path, study_name="s", small_case_bytes=0) as store:
        w = store.begin_case("open", **EPOCH, case_config_toml=CONFIG_TOML, force_models=FORCE_MODELS)
        w.append(t[:200], st[:200], elements=st[:200])
        hs._append_rows(w._grp["time_s"], t[200:])  # the next append got this far
        assert store._f["cases/open/time_s"].shape == (300,)
    d = hs.read_case(path, "open")
    assert d["status"] == "running" and d["attrs"]["n_samples"] == 200
    for k in ("time_s", "state_gcrf", "elements_osculating"):
        assert d[k].shape[0] == 200, k
    assert np.array_equal(d["time_s"], t[:200]) and np.array_equal(d["state_gcrf"], st[:200])


def test_utc_time_stamps(tmp_path: Path) -> None:
    import re

    before = dt.datetime.now(dt.timezone.utc)
    stamp = hs._utc_now()
    after = dt.datetime.now(dt.timezone.utc)
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{6}Z", stamp)
    got = dt.datetime.strptime(stamp, "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=dt.timezone.utc)
    assert before - dt.timedelta(microseconds=1) <= got <= after
