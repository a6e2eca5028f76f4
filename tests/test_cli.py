"""The ``longarc`` command line: every subcommand, its output and its exit status."""

from __future__ import annotations

import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest

from propagator import cli
from propagator.study.hdf5_store import read_case

ROOT = Path(__file__).resolve().parents[1]

STUDY = """
[study]
name = "cli-demo"
output = "cli-demo.h5"
workers = 1
plot_cases = ["leo-b"]

[defaults]
epoch = "2024-03-20T12:00:00 UTC"
duration_s = 7200.0
initial_state = { kind = "keplerian", semi_major_axis_m = 7000000.0, eccentricity = 0.001, inclination_deg = 98.0, raan_deg = 10.0, arg_perigee_deg = 0.0, mean_anomaly_deg = 0.0 }
forces = [{ model = "central_gravity" }, { model = "zonal_j2" }]
output = { step_s = 120.0 }

[cases.leo-a]

[cases.leo-b]
initial_state.raan_deg = 50.0
spacecraft.name = "KESTREL-T1"
output = { step_s = 60.0, itrf = true, accelerations = true }
fitting = { element_sets = ["keplerian"], window_hours = 1.0, max_windows = 2 }

[cases.low]
initial_state.eccentricity = 0.1
initial_state.mean_anomaly_deg = 180.0
"""


def run(capsys, *argv: str) -> tuple[int, str, str]:
    code = cli.main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, out.out, out.err


@pytest.fixture(scope="module")
def ran(tmp_path_factory):
    """The study run once through ``longarc run`` (in this process)."""
    tmp = tmp_path_factory.mktemp("cli")
    study = tmp / "cli-demo.toml"
    study.write_text(STUDY)
    code = cli.main(["run", str(study), "--quiet"])
    return tmp, study, tmp / "cli-demo.h5", code


def test_help_documents_every_exit_code(capsys):
    code, out, _ = run(capsys, "--help")
    assert code == 0 and "exit status" in out
    for k, meaning in cli.EXIT_CODES.items():
        assert f"{k:>3}  {meaning.split()[0]}" in out
    assert cli.CAUTION.split(";")[0] in out.replace("\n", " ")


def test_usage_errors_exit_2(capsys):
    assert run(capsys, "frobnicate")[0] == 2
    assert run(capsys, "run")[0] == 2
    code, _, err = run(capsys, "run", "x.toml", "--workers", "0")
    assert code == 2 and "--workers" in err


def test_check_lists_cases_and_shows_a_resolved_case(tmp_path, capsys):
    study = tmp_path / "s.toml"
    study.write_text(STUDY)
    code, out, _ = run(capsys, "check", study)
    assert code == 0 and "valid; nothing was run" in out
    for name in ("leo-a", "leo-b", "low"):
        assert name in out
    assert str(tmp_path / "cli-demo.h5") in out
    code, out, _ = run(capsys, "check", study, "--show", "leo-b")
    assert code == 0
    data = tomllib.loads(out)
    assert data["initial_state"]["raan_deg"] == 50.0 and data["output"]["itrf"] is True
    assert run(capsys, "check", study, "--show", "leo-c")[0] == cli.EXIT_BAD_INPUT


def test_check_reports_config_errors_with_key_paths(tmp_path, capsys):
    study = tmp_path / "bad.toml"
    study.write_text(STUDY.replace("initial_state.eccentricity = 0.1", "initial_state.eccentricity = 1.5")
                     .replace('model = "zonal_j2"', 'model = "zonal_j3"'))
    code, out, err = run(capsys, "check", study)
    assert code == cli.EXIT_BAD_CONFIG and not out
    assert "cases.low.initial_state.eccentricity = 1.5" in err
    assert 'defaults.forces[1].model = "zonal_j3"' in err and "did you mean 'zonal_j2'" in err
    assert run(capsys, "run", study, "--quiet")[0] == cli.EXIT_BAD_CONFIG
    assert run(capsys, "check", tmp_path / "missing.toml")[0] == cli.EXIT_BAD_CONFIG


def test_check_prepares_force_models_per_case(tmp_path, capsys):
    """A missing .gfc file, a degree above the file's maximum, zonal_j2 + gravity_field,
    and an epoch outside every ephemeris are found by `check`, before any run."""
    from forcemodels.gfc import DEFAULT_FIELD_FILE, read_gfc

    nmax = read_gfc(DEFAULT_FIELD_FILE).max_degree
    study = tmp_path / "s.toml"
    study.write_text(STUDY.replace('forces = [{ model = "central_gravity" }, { model = "zonal_j2" }]',
                                   'forces = [{ model = "central_gravity" }, { model = "gravity_field", degree = 4 }]')
                     + '\n[cases.nofile]\nforces = [{ model = "central_gravity" }, '
                       '{ model = "gravity_field", degree = 4, field_file = "no/such/field.gfc" }]\n'
                     + f'\n[cases.toohigh]\nforces = [{{ model = "gravity_field", degree = {nmax + 1} }}]\n'
                     + '\n[cases.future]\nepoch = "2600-01-01T00:00:00 TT"\n'
                     + 'forces = [{ model = "central_gravity" }, { model = "moon_gravity" }]\n')
    code, out, err = run(capsys, "check", study)
    assert code == cli.EXIT_BAD_INPUT, err
    assert "case 'nofile', force model 'gravity_field'" in err and "field.gfc" in err
    assert "case 'toohigh', force model 'gravity_field'" in err and str(nmax + 1) in err and str(nmax) in err
    assert "case 'future', force model 'moon_gravity'" in err
    for fine in ("'leo-a'", "'leo-b'", "'low'"):
        assert f"case {fine}" not in err
    study.write_text(STUDY.replace('{ model = "zonal_j2" }', '{ model = "zonal_j2" }, { model = "gravity_field", degree = 4 }'))
    code, _, err = run(capsys, "check", study)
    assert code == cli.EXIT_BAD_CONFIG and "cannot be selected together" in err


def test_models_lists_registered_models_and_parameters(capsys):
    from forcemodels import registry

    code, out, _ = run(capsys, "models")
    assert code == 0
    for name in registry.known_names():
        assert name in out
        for p in registry.get(name).params.model_fields:
            assert p in out


def test_run_exit_status_summary_caution_and_plots(ran, capsys):
    tmp, study, h5, code = ran
    assert code == cli.EXIT_CASES_FAILED  # 'low' reaches the surface
    assert read_case(h5, "leo-a")["status"] == "complete" and read_case(h5, "low")["status"] == "failed"
    pngs = sorted(p.name for p in tmp.glob("*.png"))
    assert "cli-demo_leo-b_elements.png" in pngs and "cli-demo_leo-b_ground-track.png" in pngs
    assert "cli-demo_leo-b_accelerations.png" in pngs and "cli-demo_leo-b_fit-residuals-keplerian.png" in pngs
    # a rerun computes only the failed case and says where the output is
    code2, out, _ = run(capsys, "run", study, "--quiet", "--no-plots")
    assert code2 == cli.EXIT_CASES_FAILED
    assert "2 already complete (skipped)" in out and "FAILED low" in out
    assert f"output file: {h5}" in out.replace("\n", "")
    assert cli.CAUTION.split(";")[0] in out.replace("\n", " ")


def test_summary_table(ran, capsys):
    _, _, h5, _ = ran
    code, out, _ = run(capsys, "summary", h5)
    assert code == 0
    for name in ("leo-a", "leo-b", "low", "complete", "failed", "fell below"):
        assert name in out
    assert run(capsys, "summary", h5.with_name("nope.h5"))[0] == cli.EXIT_BAD_INPUT
    not_h5 = h5.with_name("text.h5")
    not_h5.write_text("not hdf5")
    assert run(capsys, "summary", not_h5)[0] == cli.EXIT_BAD_INPUT


@pytest.mark.parametrize("kind,extra", [("elements", []), ("ground-track", []), ("accelerations", []),
                                        ("fit-residuals", ["--fit", "keplerian"]),
                                        ("ric-difference", ["--versus", "leo-a"])])
def test_plot_kinds_write_png(ran, capsys, kind, extra, tmp_path):
    _, _, h5, _ = ran
    out_png = tmp_path / f"{kind}.png"
    code, out, err = run(capsys, "plot", h5, "--case", "leo-b", "--kind", kind, *extra, "--out", out_png)
    assert code == 0, err
    assert out_png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_plot_errors(ran, capsys):
    _, _, h5, _ = ran
    code, _, err = run(capsys, "plot", h5, "--case", "leo-c", "--kind", "elements")
    assert code == cli.EXIT_BAD_INPUT and "did you mean 'leo-b'" in err and "cases: leo-a, leo-b, low" in err
    assert run(capsys, "plot", h5, "--case", "leo-b", "--kind", "ric-difference")[0] == cli.EXIT_BAD_CONFIG
    code, _, err = run(capsys, "plot", h5, "--case", "leo-a", "--kind", "accelerations")
    assert code == cli.EXIT_BAD_INPUT and "accelerations" in err


def test_export_oem_parses_back_to_the_stored_states(ran, capsys, tmp_path):
    from propagator.study.oem import read_oem

    _, _, h5, _ = ran
    oem = tmp_path / "leo-b.oem"
    code, out, _ = run(capsys, "export-oem", h5, "--case", "leo-b", "--out", oem, "--frame", "ITRF")
    assert code == 0 and str(oem) in out
    msg = read_oem(oem.read_text())
    assert msg["metadata"]["OBJECT_NAME"] == "KESTREL-T1" and msg["metadata"]["REF_FRAME"] == "ITRF"
    d = read_case(h5, "leo-b")
    # OEM is km, km/s with 9 and 12 decimals (CCSDS 502.0-B-2): equal to rounding
    np.testing.assert_allclose(msg["states"][:, :3] * 1e3, d["state_itrf"][:, :3], rtol=0, atol=1e-6)
    np.testing.assert_allclose(msg["states"][:, 3:] * 1e3, d["state_itrf"][:, 3:], rtol=0, atol=1e-9)
    assert run(capsys, "export-oem", h5, "--case", "zzz", "--out", oem)[0] == cli.EXIT_BAD_INPUT


def test_unreachable_scheduler_exits_4(ran, capsys, monkeypatch, tmp_path):
    pytest.importorskip("distributed")
    from propagator.study import runner

    monkeypatch.setattr(runner, "CONNECT_TIMEOUT_S", 1.0)
    _, study, _, _ = ran
    code, _, err = run(capsys, "run", study, "--scheduler", "tcp://127.0.0.1:9", "--output", tmp_path / "x.h5")
    assert code == cli.EXIT_CLUSTER and "cannot reach" in err


def test_console_script_entry_point():
    """``python -m propagator.cli`` (what the ``longarc`` script calls) checks the demo."""
    p = subprocess.run([sys.executable, "-m", "propagator.cli", "check", "configs/demo_study.toml"],
                       cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert p.returncode == 0, p.stderr
    assert "meridian-a1" in p.stdout and "kestrel-cr-05" in p.stdout
