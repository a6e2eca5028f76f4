"""The composed force-model dispatch (forcemodels/compose.py).

Checks that the generated ``accel_total`` / ``model_accel`` / ``partials_total`` agree
with the model kernels called directly and with central differences, that ``build_forces``
rejects bad configurations with clear messages, and that the generated module is
deterministic, renamed on any source change, and loaded from numba's disk cache by a new
process.  Internal-consistency checks: no outside reference values are involved.
"""

from __future__ import annotations

import math
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from forcemodels import compose, registry
from forcemodels.ephemeris import build_sun_moon_table
from propagator.rotation_table import build_rotation_table
from propagator.timescales import Epoch

ROOT = Path(__file__).resolve().parents[1]
EPOCH = Epoch.from_iso("2024-03-20T06:00:00 TT")
T = 300.0  # evaluation time [s since epoch]
CASE = registry.CaseSetup(epoch=EPOCH, t_start=0.0, t_end=600.0)

PARAMS = {
    "central_gravity": {},
    "zonal_j2": {},
    "gravity_field": {"degree": 8},  # shipped EGM96 8x8 file
    "sun_gravity": {},
    "moon_gravity": {},
    "solar_radiation": {"cr": 1.3, "area_m2": 20.0, "mass_kg": 1000.0},
    "relativity": {},
}
SET_J2 = ["central_gravity", "zonal_j2", "sun_gravity", "moon_gravity", "solar_radiation", "relativity"]
SET_FIELD = ["central_gravity", "gravity_field", "sun_gravity", "moon_gravity", "solar_radiation", "relativity"]


@pytest.fixture(scope="module")
def tables():
    return build_rotation_table(EPOCH, 0.0, 600.0), build_sun_moon_table(EPOCH, 0.0, 600.0)


@pytest.fixture(scope="module")
def mod():
    return compose.composed()


def _forces(names, tables, sens=()):
    prepared = [registry.prepare(n, PARAMS[n], CASE) for n in names]
    return compose.build_forces(prepared, tables[0], tables[1], sens), prepared


@pytest.fixture(scope="module")
def state(tables, mod):
    """A sunlit LEO state (7000 km radius, on the Sun side of the Earth) at T."""
    f, _ = _forces(["sun_gravity"], tables)
    mod.env_fill(T, f)
    s = f[8][9:12] / np.linalg.norm(f[8][9:12])
    perp = np.cross(s, [0.0, 0.0, 1.0])
    perp /= np.linalg.norm(perp)
    u = (s + 0.3 * perp + 0.2 * np.cross(s, perp))
    u /= np.linalg.norm(u)
    r = 7.0e6 * u
    w = np.cross(u, perp)
    v = math.sqrt(3.986004418e14 / 7.0e6) * w / np.linalg.norm(w) + np.array([10.0, -20.0, 5.0])
    return r, v


def _accel(mod, f, r, v):
    acc = np.zeros(3)
    mod.accel_total(T, r, v, f, acc)
    return acc


@pytest.mark.parametrize("names", [SET_J2, SET_FIELD], ids=["with_j2", "with_field"])
def test_accel_total_is_sum_of_model_accel(mod, tables, state, names):
    r, v = state
    f, _ = _forces(names, tables)
    total = _accel(mod, f, r, v)
    parts = []
    for m in range(len(names)):
        a = np.zeros(3)
        mod.env_fill(T, f)
        mod.model_accel(m, T, r, v, f, a)
        assert np.linalg.norm(a) > 0.0, names[m]
        parts.append(a)
    np.testing.assert_allclose(total, np.sum(parts, axis=0), rtol=1e-15, atol=1e-22)


@pytest.mark.parametrize("names", [SET_J2, SET_FIELD], ids=["with_j2", "with_field"])
def test_accel_total_equals_direct_kernel_calls(mod, tables, state, names):
    """Same numbers as calling every registered kernel by hand, env filled independently."""
    from forcemodels.environment import ENV_POLE
    from forcemodels.ephemeris import sun_moon_positions
    from propagator.rotation_table import rotation_matrices

    r, v = state
    f, prepared = _forces(names, tables)
    env = np.zeros(f[8].size)
    env[0:9] = rotation_matrices(tables[0], [T])[0].ravel()
    env[ENV_POLE:ENV_POLE + 3] = env[6:9]  # the pole: third row of R (zonal_j2 reads it)
    sun, moon = sun_moon_positions(EPOCH, np.array([T]))
    env[9:12] = sun[0]
    env[12:15] = moon[0]
    direct = np.zeros(3)
    for pm in prepared:
        registry.get(pm.name).accel(T, r, v, env, pm.p, pm.d, direct)
    total = _accel(mod, f, r, v)
    # the Sun/Moon table of sun_moon_positions spans other nodes: same Chebyshev sets,
    # so agreement to rounding is expected
    np.testing.assert_allclose(total, direct, rtol=1e-13, atol=0.0)


def _fd_jacobian(mod, f, r, v, hr=2.0, hv=2e-3):
    """Central differences of accel_total w.r.t. r [m] and v [m/s]."""
    dadr = np.zeros((3, 3))
    dadv = np.zeros((3, 3))
    for j in range(3):
        e = np.zeros(3)
        e[j] = hr
        dadr[:, j] = (_accel(mod, f, r + e, v) - _accel(mod, f, r - e, v)) / (2 * hr)
        e[j] = hv
        e_r = np.zeros(3)
        e_r[j] = hv
        dadv[:, j] = (_accel(mod, f, r, v + e_r) - _accel(mod, f, r, v - e_r)) / (2 * hv)
    return dadr, dadv


@pytest.mark.parametrize("name", list(PARAMS))
def test_partials_total_agrees_with_central_differences(mod, tables, state, name):
    """Each model alone: analytic partials (or the dispatcher's own differences for models
    without them) against central differences of accel_total taken here."""
    r, v = state
    f, _ = _forces([name], tables)
    _accel(mod, f, r, v)
    dadr = np.zeros((3, 3))
    dadv = np.zeros((3, 3))
    mod.partials_total(T, r, v, f, dadr, dadv, np.zeros((3, 0)))
    fd_r, fd_v = _fd_jacobian(mod, f, r, v)
    scale = np.abs(fd_r).max()
    assert scale > 0.0
    # rounding error of central differences ~ eps |a| / h (h >= 0.7 m in the dispatcher)
    rounding = 8.0 * np.finfo(float).eps * np.linalg.norm(_accel(mod, f, r, v)) / 0.7
    np.testing.assert_allclose(dadr, fd_r, rtol=0.0, atol=1e-6 * scale + rounding)
    if registry.get(name).uses_velocity:
        scale_v = np.abs(fd_v).max()
        assert scale_v > 0.0
        np.testing.assert_allclose(dadv, fd_v, rtol=0.0, atol=1e-6 * scale_v)
    else:
        assert np.all(dadv == 0.0) and np.all(fd_v == 0.0)


def test_partials_total_of_a_set_is_the_sum(mod, tables, state):
    r, v = state
    f, _ = _forces(SET_FIELD, tables)
    _accel(mod, f, r, v)
    dadr = np.zeros((3, 3))
    dadv = np.zeros((3, 3))
    mod.partials_total(T, r, v, f, dadr, dadv, np.zeros((3, 0)))
    sr = np.zeros((3, 3))
    sv = np.zeros((3, 3))
    for name in SET_FIELD:
        g, _ = _forces([name], tables)
        _accel(mod, g, r, v)
        a = np.zeros((3, 3))
        b = np.zeros((3, 3))
        mod.partials_total(T, r, v, g, a, b, np.zeros((3, 0)))
        sr += a
        sv += b
    np.testing.assert_allclose(dadr, sr, rtol=1e-12, atol=1e-12 * np.abs(sr).max())
    np.testing.assert_allclose(dadv, sv, rtol=1e-12, atol=1e-30)


def test_srp_cr_sensitivity_is_acceleration_over_cr(mod, tables, state):
    """SRP is linear in Cr (Montenbruck & Gill 2000, sec. 3.4): d a / d Cr = a / Cr."""
    r, v = state
    f, prepared = _forces(SET_J2, tables, sens=[("solar_radiation", "cr")])
    _accel(mod, f, r, v)
    dadp = np.zeros((3, 1))
    mod.partials_total(T, r, v, f, np.zeros((3, 3)), np.zeros((3, 3)), dadp)
    m = SET_J2.index("solar_radiation")
    a_srp = np.zeros(3)
    mod.env_fill(T, f)
    mod.model_accel(m, T, r, v, f, a_srp)
    assert np.linalg.norm(a_srp) > 1e-8  # sunlit
    np.testing.assert_allclose(dadp[:, 0], a_srp / PARAMS["solar_radiation"]["cr"], rtol=1e-8)
    assert f[2][f[3][m]] == PARAMS["solar_radiation"]["cr"]  # parameter restored exactly


def test_j2_sensitivity_is_acceleration_over_j2(mod, tables, state):
    r, v = state
    f, _ = _forces(["central_gravity", "zonal_j2"], tables, sens=[("zonal_j2", "j2")])
    _accel(mod, f, r, v)
    dadp = np.zeros((3, 1))
    mod.partials_total(T, r, v, f, np.zeros((3, 3)), np.zeros((3, 3)), dadp)
    a = np.zeros(3)
    mod.model_accel(1, T, r, v, f, a)
    np.testing.assert_allclose(dadp[:, 0], a / registry.get("zonal_j2").params().j2, rtol=1e-8)


@pytest.mark.parametrize("name", registry.known_names())
def test_every_kernel_compiles_without_reference_counting(name):
    """The dispatch is compiled with _nrt=False and kernels inherit it (compose docstring,
    "Speed"): a kernel that allocates would fail to compile inside the composed module."""
    if not compose._NO_NRT:
        pytest.skip("this numba has no _nrt option: dispatch compiled with NRT")
    from numba import njit, types

    arr = types.float64[::1]
    model = registry.get(name)
    try:
        njit(_nrt=False)(model.accel.py_func).compile((types.float64, arr, arr, arr, arr, arr, arr))
        if model.partials is not None:
            mat = types.float64[:, ::1]
            njit(_nrt=False)(model.partials.py_func).compile((types.float64, arr, arr, arr, arr, arr, mat, mat))
    except Exception as exc:  # numba's typing errors
        pytest.fail(f"kernel of {name!r} does not compile without NRT (does it allocate? use scratch "
                    f"space in d instead): {str(exc)[:300]}")


# ---- configuration errors -------------------------------------------------------------------
def _prep(names):
    return [registry.prepare(n, PARAMS[n], CASE) for n in names]


def test_unknown_sensitivity_parameter(tables):
    with pytest.raises(ValueError, match=r"solar_radiation\.area_m2: not an estimable parameter; estimable: \['cr'\]"):
        compose.build_forces(_prep(SET_J2), *tables, [("solar_radiation", "area_m2")])
    with pytest.raises(ValueError, match=r"central_gravity\.gm_m3_s2: not an estimable parameter; estimable: none"):
        compose.build_forces(_prep(SET_J2), *tables, [("central_gravity", "gm_m3_s2")])


def test_sensitivity_of_unselected_model(tables):
    msg = r"model 'solar_radiation' is not selected \(selected: \['central_gravity'\]\)"
    with pytest.raises(ValueError, match=msg):
        compose.build_forces(_prep(["central_gravity"]), *tables, [("solar_radiation", "cr")])


def test_missing_tables_name_the_model():
    with pytest.raises(ValueError, match=r"zonal_j2 need the Earth orientation.*build_rotation_table"):
        compose.build_forces(_prep(["central_gravity", "zonal_j2"]), None, None)
    with pytest.raises(ValueError, match=r"sun_gravity, solar_radiation need Sun/Moon positions.*build_sun_moon_table"):
        compose.build_forces(_prep(["central_gravity", "sun_gravity", "solar_radiation"]), None, None)
    compose.build_forces(_prep(["central_gravity", "relativity"]), None, None)  # needs no table


def test_j2_and_gravity_field_conflict(tables):
    for names in (["central_gravity", "zonal_j2", "gravity_field"], ["gravity_field", "zonal_j2"]):
        with pytest.raises(ValueError, match=r"cannot be selected together: .*C20.*counted twice"):
            compose.build_forces(_prep(names), *tables)
    with pytest.raises(ValueError, match="counted twice"):
        registry.check_conflicts(["gravity_field", "central_gravity", "zonal_j2"])
    registry.check_conflicts(SET_J2)
    registry.check_conflicts(SET_FIELD)


def test_scratch_is_appended_after_the_documented_members(tables):
    f, _ = _forces(SET_J2, tables)
    from forcemodels.environment import ENV_SIZE
    assert len(f) == 13                      # ..., scratch (11), pole_table (12, appended)
    assert f[8].size == ENV_SIZE and f[11].size == compose.SCRATCH_SIZE
    assert f[0].dtype == np.int64 and f[9].dtype == np.int64 and f[10].dtype == np.int64


# ---- generated source and cache ----------------------------------------------------------------
def test_generated_source_is_deterministic_and_complete():
    a = compose.generate_source()
    b = compose.generate_source()
    assert a == b
    for k, name in enumerate(registry.known_names()):
        m = registry.get(name)
        if m.inline:                         # recompiled from the Python source, inlined
            assert f"from {m.module} import accel as _accel_src_{k}" in a
            assert f"_accel_{k} = njit(" in a and f"(_accel_src_{k}.py_func)" in a
        else:
            assert f"from {m.module} import accel as _accel_{k}" in a
        assert f"        _accel_{k}(t, r, v, env, p, d, acc)" in a
    for fn in ("def accel_total(", "def partials_total(", "def env_fill(", "def model_accel(",
               "def integrate("):
        assert a.count(fn) == 1, fn
    compile(a, "<composed>", "exec")


def test_source_hash_follows_every_source_file(tmp_path, monkeypatch):
    files = []
    for i in range(3):
        p = tmp_path / f"m{i}.py"
        p.write_text(f"X = {i}\n")
        files.append(p)
    monkeypatch.setattr(compose, "_source_files", lambda: list(files))
    h0 = compose._source_hash("text")
    assert compose._source_hash("text") == h0
    assert compose._source_hash("text2") != h0
    files[1].write_text("X = 1  # edited\n")
    h1 = compose._source_hash("text")
    assert h1 != h0 and len(h1) == 16
    files[1].write_text("X = 1\n")
    assert compose._source_hash("text") == h0


def test_real_source_files_cover_models_and_stepper():
    names = {p.relative_to(ROOT).as_posix() for p in compose._source_files()}
    assert "forcemodels/compose.py" in names
    assert "propagator/integrators/stepper.py" in names
    for name in registry.known_names():
        assert registry.get(name).module.replace(".", "/") + ".py" in names


_CHILD = textwrap.dedent("""
    import sys
    sys.path.insert(0, {root!r})
    import numpy as np
    from forcemodels import compose, registry
    from propagator.timescales import Epoch
    case = registry.CaseSetup(epoch=Epoch.from_iso("2024-03-20T06:00:00 TT"), t_start=0.0, t_end=60.0)
    f = compose.build_forces([registry.prepare("central_gravity", {{}}, case)], None, None)
    m = compose.composed()
    acc = np.zeros(3)
    m.accel_total(0.0, np.array([7e6, 0.0, 0.0]), np.zeros(3), f, acc)
    st = m.accel_total.stats
    print("RESULT", m.__name__, sum(st.cache_hits.values()), sum(st.cache_misses.values()), acc[0])
""")


def test_new_process_loads_the_composed_module_from_the_cache(tmp_path):
    """A second process finds accel_total in numba's disk cache (no recompilation)."""
    code = _CHILD.format(root=str(ROOT))

    def run(cache):
        env = dict(os.environ, LONGARC_CACHE_DIR=str(cache))
        out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=600)
        assert out.returncode == 0, out.stderr
        name, hits, misses, acc = out.stdout.split("RESULT")[-1].split()
        return name, int(hits), int(misses), float(acc)

    for attempt in range(3):
        cache = tmp_path / f"cache{attempt}"
        name0, hits0, misses0, a0 = run(cache)
        name1, hits1, misses1, a1 = run(cache)
        if name0 == name1:  # else a source file was edited in between (shared tree): retry
            break
    assert name0 == name1
    assert misses0 >= 1 and hits0 == 0  # empty cache: compiled
    assert hits1 >= 1 and misses1 == 0  # loaded from the cache
    assert a0 == a1 == pytest.approx(-3.986004418e14 / 7e6 ** 2, rel=1e-15)
