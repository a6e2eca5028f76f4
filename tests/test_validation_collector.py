"""The validation report collector: failures and missing scripts must show, never vanish."""

from __future__ import annotations

import importlib.util
import json
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _load_run_all():
    spec = importlib.util.spec_from_file_location("run_all", ROOT / "validation" / "run_all.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules["run_all"] = mod
    spec.loader.exec_module(mod)
    return mod


run_all = _load_run_all()
MACHINE = {"date": "2031-01-01", "machine": "test", "python": "3", "libraries": "none"}


def _outcome(name, checks, status="ok"):
    return run_all.ScriptOutcome(name, "integrators", status, 0, 1.0, {"checks": checks, "figures": []})


def test_failing_check_shows_as_failed():
    checks = [{"area": "integrators", "check": "good", "reference": "common practice", "tolerance": "< 1",
               "measured": 0.5, "unit": "m", "passed": True},
              {"area": "integrators", "check": "bad one", "reference": "from memory", "tolerance": "< 1",
               "measured": 3.0, "unit": "m", "passed": False}]
    text = run_all.build_report([_outcome("x", checks)], quick=True, machine=MACHINE)
    bad_row = next(line for line in text.splitlines() if line.startswith("| bad one"))
    assert "**FAIL**" in bad_row
    good_row = next(line for line in text.splitlines() if line.startswith("| good"))
    assert "pass" in good_row and "FAIL" not in good_row
    assert "1 checks passed, 1 failed" in text


def test_missing_script_is_reported(tmp_path):
    outcome = run_all.run_script("does_not_exist", "fitting", quick=True, timeout_s=5,
                                 script_dir=tmp_path, out_dir=tmp_path / "out")
    assert outcome.status == "missing"
    text = run_all.build_report([outcome], quick=True, machine=MACHINE)
    assert "does_not_exist.py`: script missing" in text
    assert "0 checks passed, 1 failed" in text


def test_crashing_script_is_reported(tmp_path):
    (tmp_path / "crashes.py").write_text("raise SystemExit('boom')\n")
    outcome = run_all.run_script("crashes", "elements", quick=True, timeout_s=30,
                                 script_dir=tmp_path, out_dir=tmp_path / "out")
    assert outcome.status == "no-json"
    text = run_all.build_report([outcome], quick=True, machine=MACHINE)
    assert "script wrote no JSON" in text and "boom" in text


def test_script_protocol_round_trip(tmp_path):
    """A script following validation/_common.py's protocol lands in the report."""
    script = tmp_path / "tiny.py"
    script.write_text(
        "import sys\n"
        f"sys.path.insert(0, {str(ROOT / 'validation')!r})\n"
        "from _common import start\n"
        "rep = start(__file__, 'tiny')\n"
        "rep.values['answer_m'] = 0.25\n"
        "rep.check('elements', 'tiny check', 'common practice', 0.25, tolerance='< 1 m', passed=0.25 < 1, unit='m')\n"
        "sys.exit(rep.finish())\n")
    outcome = run_all.run_script("tiny", "elements", quick=True, timeout_s=60, script_dir=tmp_path,
                                 out_dir=tmp_path / "out")
    assert outcome.status == "ok", outcome.stderr_tail
    data = json.loads((tmp_path / "out" / "tiny.json").read_text())
    assert data["answer_m"] == 0.25 and data["checks"][0]["passed"] is True
    text = run_all.build_report([outcome], quick=True, machine=MACHINE)
    assert "| tiny check | common practice | < 1 m | 0.25 m | pass |" in text


def test_script_with_no_checks_counts_as_failure():
    text = run_all.build_report([_outcome("empty", [])], quick=False, machine=MACHINE)
    assert "no checks reported" in text and "0 checks passed, 1 failed" in text


@pytest.mark.parametrize("name", list(run_all.SCRIPTS))
def test_every_listed_area_is_known(name):
    assert run_all.SCRIPTS[name] in run_all.AREAS


def test_failed_checks_exit_is_not_counted_twice_but_a_crash_after_json_is(tmp_path):
    """exit 1 with a failing check: one FAIL row; exit 1 with all checks passing: the script fails."""
    body = ("import sys\n"
            f"sys.path.insert(0, {str(ROOT / 'validation')!r})\n"
            "from _common import start\n"
            "rep = start(__file__, 'x')\n"
            "rep.check('elements', 'c', 'common practice', 2.0, tolerance='< 1', passed=PASSED)\n"
            "code = rep.finish()\n"
            "sys.exit(EXIT)\n")
    (tmp_path / "fails.py").write_text(body.replace("PASSED", "False").replace("EXIT", "code"))
    (tmp_path / "crash.py").write_text(body.replace("PASSED", "True").replace("EXIT", "1"))
    out = tmp_path / "out"
    o1 = run_all.run_script("fails", "elements", quick=True, timeout_s=60, script_dir=tmp_path, out_dir=out)
    o2 = run_all.run_script("crash", "elements", quick=True, timeout_s=60, script_dir=tmp_path, out_dir=out)
    assert o1.status == "ok" and o2.status == "failed"
    text = run_all.build_report([o1, o2], quick=True, machine=MACHINE)
    assert "1 checks passed, 2 failed" in text
    assert "`fails.py`: script exited non-zero" not in text
    assert "`crash.py`: script exited non-zero" in text
