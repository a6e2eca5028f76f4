"""Study files: validation messages, deep merge, sweeps, Monte Carlo, resolved TOML."""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np
import pytest

from propagator.study.config import (
    StudyConfigError,
    case_from_toml,
    dumps_toml,
    get_dotted,
    load_study,
    parse_study,
    set_dotted,
)

CONFIGS = Path(__file__).resolve().parents[1] / "configs"

BASE = """
[study]
name = "unit"

[defaults]
epoch = "2031-03-20T12:00:00 UTC"
duration_s = 7200.0

[defaults.initial_state]
kind = "keplerian"
semi_major_axis_m = 26560000.0
eccentricity = 0.001
inclination_deg = 55.0
raan_deg = 0.0
arg_perigee_deg = 0.0
mean_anomaly_deg = 0.0

[defaults.spacecraft]
mass_kg = 1000.0
srp_area_m2 = 20.0
cr = 1.3

[[defaults.forces]]
model = "central_gravity"

[[defaults.forces]]
model = "zonal_j2"
"""


def study(extra: str, base: str = BASE):
    return parse_study(tomllib.loads(base + extra), path=None)


def problems(extra: str, base: str = BASE) -> list[str]:
    with pytest.raises(StudyConfigError) as info:
        study(extra, base)
    assert isinstance(info.value, ValueError)
    return info.value.problems


def one_problem(extra: str, base: str = BASE) -> str:
    p = problems(extra, base)
    assert len(p) == 1, p
    return p[0]


# --------------------------------------------------------------------------------------
# valid studies, merge rules
# --------------------------------------------------------------------------------------
def test_minimal_study_resolves_defaults_and_merges_cases():
    s = study("""
[cases.nav-a1]
[cases.nav-b2]
initial_state.raan_deg = 120.0
spacecraft.cr = 1.1
""")
    assert [c.name for c in s.cases] == ["nav-a1", "nav-b2"]
    a, b = s.cases
    assert a.config.initial_state.raan_deg == 0.0 and b.config.initial_state.raan_deg == 120.0
    # deep merge keeps the other keys of the table
    assert b.config.initial_state.inclination_deg == 55.0 and b.config.spacecraft.mass_kg == 1000.0
    assert a.config.output.step_s == 60.0  # the documented default grid
    assert a.config.duration_seconds() == 7200.0
    assert [n for n, _ in a.forces] == ["central_gravity", "zonal_j2"]
    # every parameter filled with the model's default
    assert a.forces[0][1]["gm_m3_s2"] == pytest.approx(3.986004418e14)


def test_exclusive_alternatives_and_kind_switch_replace_inherited_keys():
    s = study("""
[cases.days]
duration_days = 2.0
[cases.true-anomaly]
initial_state.true_anomaly_deg = 10.0
[cases.cartesian]
initial_state = { kind = "cartesian", frame = "ITRF", position_m = [7000e3, 0, 0], velocity_m_s = [0, 7.5e3, 0] }
""")
    days, tru, cart = s.cases
    assert days.config.duration_s is None and days.config.duration_seconds() == 2 * 86400.0
    assert tru.config.initial_state.true_anomaly_deg == 10.0
    assert tru.config.initial_state.mean_anomaly_deg is None
    assert cart.config.initial_state.kind == "cartesian" and cart.config.initial_state.frame == "ITRF"


def test_spacecraft_feeds_solar_radiation_unless_the_entry_gives_the_value():
    s = study("""
[cases.a]
forces = [{ model = "central_gravity" }, { model = "solar_radiation" }]
[cases.b]
forces = [{ model = "central_gravity" }, { model = "solar_radiation", cr = 1.8 }]
""")
    a, b = (dict(c.forces)["solar_radiation"] for c in s.cases)
    assert (a["cr"], a["area_m2"], a["mass_kg"]) == (1.3, 20.0, 1000.0)
    assert b["cr"] == 1.8 and b["area_m2"] == 20.0


def test_resolved_toml_round_trips():
    s = study("""
[cases.x]
description = "quotes \\" and unicode é"
output = { times_s = [0.0, 600.5, 7200.0], itrf = true }
[[sweeps]]
name = "mc"
base = "x"
samples = 2
seed = 7
dispersions."spacecraft.cr" = { distribution = "normal", sigma = 0.05 }
""")
    for case in s.cases:
        text = case.to_toml()
        back = case_from_toml(case.name, text)
        assert back.config == case.config
        assert back.forces == case.forces
        assert back.sweep_values == case.sweep_values
        assert tomllib.loads(text)["output"]["itrf"] is True


def test_toml_writer_handles_nested_tables_arrays_and_special_values():
    data = {"a": 1, "b": -0.0, "c": float("inf"), "s": "x\ny\t\"z\"", "key with space": True,
            "t": {"u": [1, 2.5], "v": {"w": "deep"}}, "arr": [{"m": "one", "sub": {"k": 1}}, {"m": "two"}],
            "none": None}
    back = tomllib.loads(dumps_toml(data))
    expect = {k: v for k, v in data.items() if k != "none"}
    assert back == expect and str(back["b"]) == "-0.0"


def test_dotted_paths_address_tables_and_force_models_by_name():
    d = {"initial_state": {"raan_deg": 1.0}, "forces": [{"model": "central_gravity"}, {"model": "zonal_j2"}]}
    assert set_dotted(d, "initial_state.raan_deg", 5.0) == ("initial_state", "raan_deg")
    assert set_dotted(d, "forces.zonal_j2.j2", 1e-3) == ("forces", 1, "j2")
    assert get_dotted(d, "forces.1.j2") == 1e-3
    with pytest.raises(ValueError, match="no force model 'zonal_j3'.*did you mean 'zonal_j2'"):
        set_dotted(d, "forces.zonal_j3.j2", 1.0)


# --------------------------------------------------------------------------------------
# sweeps
# --------------------------------------------------------------------------------------
def test_grid_product_zip_and_ranges_expand_to_the_right_counts():
    s = study("""
[cases.ref]
[[sweeps]]
name = "grid"
base = "ref"
grid."initial_state.raan_deg" = { first = 0, last = 330, step = 30 }
grid."initial_state.inclination_deg" = [50.0, 55.0, 60.0]
[[sweeps]]
name = "pairs"
combine = "zip"
grid."initial_state.raan_deg" = { first = 0.0, last = 240.0, count = 3 }
grid."initial_state.mean_anomaly_deg" = [0.0, 40.0, 80.0]
""")
    names = [c.name for c in s.cases]
    assert names[0] == "ref" and len(names) == 1 + 12 * 3 + 3
    grid = [c for c in s.cases if c.name.startswith("grid-")]
    got = {(c.config.initial_state.raan_deg, c.config.initial_state.inclination_deg) for c in grid}
    assert got == {(float(r), i) for r in range(0, 331, 30) for i in (50.0, 55.0, 60.0)}
    assert grid[0].name == "grid-00" and grid[-1].name == "grid-35"
    assert grid[5].sweep_values == {"initial_state.raan_deg": 30, "initial_state.inclination_deg": 60.0}
    pairs = [(c.config.initial_state.raan_deg, c.config.initial_state.mean_anomaly_deg)
             for c in s.cases if c.name.startswith("pairs-")]
    assert pairs == [(0.0, 0.0), (120.0, 40.0), (240.0, 80.0)]


MC = """
[cases.ref]
template = true
[[sweeps]]
name = "mc"
base = "ref"
samples = 50
seed = 20310320
dispersions."spacecraft.cr" = { distribution = "normal", sigma = 0.1 }
dispersions."initial_state.semi_major_axis_m" = { distribution = "uniform", half_width = 500.0 }
dispersions."initial_state.raan_deg" = { distribution = "uniform", low = 10.0, high = 20.0 }
"""


def test_monte_carlo_is_reproducible_from_the_seed_and_follows_the_spec():
    s1, s2 = study(MC), study(MC)
    assert [c.name for c in s1.cases] == [f"mc-{i:02d}" for i in range(50)]  # template not run
    v1 = np.array([[c.config.spacecraft.cr, c.config.initial_state.semi_major_axis_m,
                    c.config.initial_state.raan_deg] for c in s1.cases])
    v2 = np.array([[c.config.spacecraft.cr, c.config.initial_state.semi_major_axis_m,
                    c.config.initial_state.raan_deg] for c in s2.cases])
    assert np.array_equal(v1, v2)
    # The documented draw order: one Generator(PCG64(seed)), each dispersion in file order
    # draws all its samples (numpy is the reference for the generator).
    rng = np.random.Generator(np.random.PCG64(20310320))
    expect = np.column_stack([rng.normal(1.3, 0.1, 50), rng.uniform(26560000.0 - 500, 26560000.0 + 500, 50),
                              rng.uniform(10.0, 20.0, 50)])
    assert np.array_equal(v1, expect)
    assert np.all(np.abs(v1[:, 1] - 26560000.0) <= 500.0) and np.all((v1[:, 2] >= 10) & (v1[:, 2] < 20))
    # a different seed gives different draws
    v3 = [c.config.spacecraft.cr for c in study(MC.replace("20310320", "1")).cases]
    assert not np.array_equal(v1[:, 0], v3)


def test_grid_times_samples_and_sweep_overrides():
    s = study("""
[[sweeps]]
name = "both"
grid."initial_state.raan_deg" = [0.0, 90.0]
samples = 3
seed = 1
dispersions."spacecraft.cr" = { distribution = "normal", mean = 1.5, sigma = 0.01 }
overrides = { duration_s = 600.0, output = { step_s = 30.0 } }
""")
    assert len(s.cases) == 6
    assert all(c.config.duration_s == 600.0 and c.config.output.step_s == 30.0 for c in s.cases)
    assert [c.config.initial_state.raan_deg for c in s.cases] == [0.0] * 3 + [90.0] * 3
    assert all(abs(c.config.spacecraft.cr - 1.5) < 0.1 for c in s.cases)


# --------------------------------------------------------------------------------------
# one test per class of validation error: the message names the key path and the value
# --------------------------------------------------------------------------------------
def test_unknown_key_names_path_and_suggests():
    msg = one_problem("[cases.nav-b2]\ninitial_state.raan_dg = 3.0\n")
    assert msg.startswith("cases.nav-b2.initial_state.raan_dg: unknown key")
    assert "did you mean 'raan_deg'" in msg
    msg = one_problem("[cases.a]\n[studdy]\nname = 'x'\n")
    assert msg.startswith("studdy: unknown top-level table") and "did you mean 'study'" in msg
    msg = one_problem("[cases.a]\n", BASE.replace('name = "unit"', 'name = "unit"\nworkerz = 2'))
    assert msg.startswith("study.workerz: unknown key") and "did you mean 'workers'" in msg


def test_unknown_key_in_defaults_is_reported_once_with_the_cases_it_hits():
    p = problems("[cases.a]\n[cases.b]\n", BASE.replace("inclination_deg", "inclinaton_deg"))
    assert len([m for m in p if "inclinaton_deg" in m]) == 1
    msg = next(m for m in p if "inclinaton_deg" in m)
    assert msg.startswith("defaults.initial_state.inclinaton_deg: unknown key")
    assert "did you mean 'inclination_deg'" in msg and "(cases a, b)" in msg


def test_wrong_type_names_path_and_value():
    msg = one_problem('[cases.c1]\nspacecraft.mass_kg = "heavy"\n')
    assert msg.startswith('cases.c1.spacecraft.mass_kg = "heavy"') and "valid number" in msg
    msg = one_problem("[cases.c1]\noutput.itrf = 1\n")
    assert msg.startswith("cases.c1.output.itrf = 1") and "boolean" in msg


def test_out_of_range_names_path_value_and_limit():
    msg = one_problem("[cases.nav-b2]\ninitial_state.eccentricity = 1.2\n")
    assert msg.startswith("cases.nav-b2.initial_state.eccentricity = 1.2")
    assert "less than 1" in msg
    msg = one_problem("[cases.c]\nspacecraft.cr = 2.5\n")
    assert msg.startswith("cases.c.spacecraft.cr = 2.5") and "less than or equal to 2" in msg
    msg = one_problem("[cases.c]\nforces = [{ model = 'gravity_field', degree = 1 }]\n")
    assert msg.startswith("cases.c.forces[0].degree = 1") and "greater than or equal to 2" in msg


def test_unknown_force_model_lists_known_models():
    from forcemodels import registry

    msg = one_problem("[cases.c]\nforces = [{ model = 'central_gravty' }]\n")
    assert msg.startswith('cases.c.forces[0].model = "central_gravty": unknown force model')
    assert "did you mean 'central_gravity'" in msg
    for name in registry.known_names():
        assert name in msg
    msg = one_problem("[cases.c]\nforces = [{ model = 'zonal_j2', jj2 = 1e-3 }]\n")
    assert msg.startswith("cases.c.forces[0].jj2: unknown parameter") and "did you mean 'j2'" in msg


def test_bad_epoch_text_names_path_and_value():
    msg = one_problem('[cases.c]\nepoch = "2031-02-30T00:00:00 UTC"\n')
    assert msg.startswith('cases.c.epoch = "2031-02-30T00:00:00 UTC"') or msg.startswith("cases.c.epoch:")
    assert "2031-02-30" in msg and "calendar" in msg
    msg = one_problem('[cases.c]\nepoch = "2031-03-20T12:00:00"\n')
    assert msg.startswith("cases.c.epoch") and "no time scale" in msg


def test_bad_sweeps_name_the_sweep_key():
    msg = one_problem("""
[[sweeps]]
name = "raan"
grid."initial_state.raan_deg" = { first = 0, last = 330, step = -30 }
""")
    assert msg.startswith("sweeps[0] (raan).grid.\"initial_state.raan_deg\"") and "does not lead" in msg
    msg = one_problem("""
[[sweeps]]
name = "raan"
grid."initial_state.raan_dg" = [1.0, 2.0]
""")
    assert msg.startswith('sweeps[0] (raan).grid."initial_state.raan_deg"') is False
    assert 'sweeps[0] (raan).grid."initial_state.raan_dg"' in msg and "did you mean 'raan_deg'" in msg
    assert "(cases raan-00, raan-01)" in msg
    msg = one_problem("""
[[sweeps]]
name = "mc"
samples = 4
dispersions."spacecraft.cr" = { distribution = "normal", sigma = 0.1 }
""")
    assert msg.startswith("sweeps[0] (mc):") and "seed" in msg
    msg = one_problem("""
[[sweeps]]
name = "mc"
samples = 4
seed = 1
dispersions."spacecraft.cr" = { distribution = "gaussian", sigma = 0.1 }
""")
    assert 'sweeps[0] (mc).dispersions."spacecraft.cr".distribution = "gaussian"' in msg
    msg = one_problem("""
[[sweeps]]
name = "mc"
base = "nope"
grid."spacecraft.cr" = [1.0]
""")
    assert msg.startswith('sweeps[0] (mc).base = "nope": no such case')
    msg = one_problem("""
[[sweeps]]
name = "z"
combine = "zip"
grid."initial_state.raan_deg" = [1.0, 2.0]
grid."initial_state.inclination_deg" = [1.0]
""")
    assert "equal lengths" in msg


def test_sweep_value_out_of_range_points_at_the_sweep():
    msg = one_problem("""
[[sweeps]]
name = "ecc"
grid."initial_state.eccentricity" = [0.1, 1.5]
""")
    assert msg.startswith('sweeps[0] (ecc).grid."initial_state.eccentricity" = 1.5') and "(case ecc-01)" in msg


def test_missing_keys_and_exclusive_choices():
    p = problems("[cases.c]\n", BASE.replace('epoch = "2031-03-20T12:00:00 UTC"', ""))
    assert any(m.startswith("cases.c.epoch: required key is missing") for m in p)
    msg = one_problem("[cases.c]\n", BASE.replace("[defaults.initial_state]",
                                                                       "duration_days = 1.0\n[defaults.initial_state]"))
    assert msg.startswith("cases.c:") and "exactly one of duration_s, duration_days, end_epoch" in msg
    assert "got duration_s, duration_days" in msg
    msg = one_problem("[cases.c]\ninitial_state.kind = 'kepler'\n")
    assert 'cases.c.initial_state.kind = "kepler"' in msg and "did you mean 'keplerian'" in msg


def test_several_problems_are_reported_together_and_no_cases_is_an_error():
    p = problems("[cases.a]\nspacecraft.cr = -1.0\n[cases.b]\nintegrator.relative_tolerance = 0.0\n")
    assert len(p) == 2
    assert any(m.startswith("cases.a.spacecraft.cr = -1.0") for m in p)
    assert any(m.startswith("cases.b.integrator.relative_tolerance = 0.0") for m in p)
    assert "no cases" in one_problem("")


def test_impossible_orbit_is_not_a_config_error():
    # perigee below the surface: a run-time failure, not a configuration problem
    s = study("[cases.low]\ninitial_state.semi_major_axis_m = 6500000.0\ninitial_state.eccentricity = 0.1\n")
    assert s.cases[0].name == "low"


def test_bad_toml_and_missing_file(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[study\nname = 1\n")
    with pytest.raises(StudyConfigError, match="not valid TOML"):
        load_study(bad)
    with pytest.raises(StudyConfigError, match="cannot read"):
        load_study(tmp_path / "absent.toml")


def test_output_path_rules(tmp_path, monkeypatch):
    f = tmp_path / "sub" / "my-study.toml"
    f.parent.mkdir()
    f.write_text(BASE.replace('name = "unit"', "") + "[cases.a]\n")
    monkeypatch.chdir(tmp_path)
    s = load_study(f)
    assert s.name == "my-study"  # from the file name when [study] name is absent
    assert s.output_path() == tmp_path / "longarc-output" / "my-study.h5"
    text = BASE.replace('name = "unit"', 'name = "unit"\noutput = "results/out.h5"') + "[cases.a]\n"
    f.write_text(text)
    assert load_study(f).output_path() == f.parent / "results" / "out.h5"
    assert load_study(f).output_path("/x/y.h5") == Path("/x/y.h5")


@pytest.mark.parametrize("path", sorted(CONFIGS.glob("*.toml")), ids=lambda p: p.name)
def test_shipped_configs_are_valid(path):
    s = load_study(path)
    assert s.cases
    for c in s.cases:
        assert case_from_toml(c.name, c.to_toml()).config == c.config
        _check_toml_is_resolved_dict(c)


def _check_toml_is_resolved_dict(case) -> None:
    """to_toml() is its comment lines followed by dumps_toml(resolved_dict()) byte for
    byte (it skips resolved_dict's copies) and leaves the case's force parameters alone."""
    import copy

    forces = copy.deepcopy(case.forces)
    text = case.to_toml()
    head = [ln for ln in text.split("\n") if ln.startswith("# ")]
    assert head[0] == f"# longarc case {case.name!r}, fully resolved"
    assert text == "\n".join(head) + "\n" + dumps_toml(case.resolved_dict())
    assert case.forces == forces


def test_resolved_toml_is_header_and_resolved_dict():
    s = study("""
[cases.x]
description = "quotes \\" and unicode é"
[cases.x.initial_state]
raan_deg = -0.0
[[sweeps]]
name = "g"
base = "x"
grid."initial_state.raan_deg" = [0.0, 90.0]
""")
    assert len(s.cases) == 3
    for c in s.cases:
        _check_toml_is_resolved_dict(c)
