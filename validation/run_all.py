"""Run every validation script and write validation/REPORT.md with its figures.

    python validation/run_all.py [--quick] [--only NAME ...]

Each script in :data:`SCRIPTS` runs as ``python validation/NAME.py [--quick] --json
validation/report/NAME.json`` in its own process.  Its JSON ``checks`` become table rows
grouped by area, its ``figures`` are linked under the table.  A script that is missing,
crashes, times out or writes no JSON is reported as a failed row — never skipped
silently.  Timings inside the scripts are ratios measured in the same run.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import platform
import subprocess
import sys
import time
from dataclasses import dataclass, field
from importlib import metadata
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
REPORT_DIR = HERE / "report"

AREAS = ("frames and time", "elements", "force models", "integrators", "fitting", "batch/I-O")

SCRIPTS: dict[str, str] = {
    "check_time_frames": "frames and time",
    "check_elements": "elements",
    "bench_forces": "force models",
    "bench_integrators": "integrators",
    "check_fitting": "fitting",
    "bench_batch": "batch/I-O",
}
"""Script name -> the area its failures are filed under when it produces no checks."""

LIBRARIES = ("numpy", "scipy", "numba", "pyerfa", "jplephem", "h5py", "astropy-iers-data", "pydantic", "dask")


@dataclass
class ScriptOutcome:
    name: str
    area: str
    status: str  # "ok", "failed", "missing", "no-json", "timeout"
    returncode: int | None = None
    elapsed_s: float = 0.0
    data: dict[str, Any] = field(default_factory=dict)
    stderr_tail: str = ""


def run_script(name: str, area: str, quick: bool, timeout_s: float, script_dir: Path = HERE,
               out_dir: Path = REPORT_DIR) -> ScriptOutcome:
    """Run one script; never raises for the script's own failures."""
    path = script_dir / f"{name}.py"
    if not path.exists():
        return ScriptOutcome(name, area, "missing")
    out_dir.mkdir(parents=True, exist_ok=True)
    json_path = out_dir / f"{name}.json"
    json_path.unlink(missing_ok=True)
    cmd = [sys.executable, str(path), "--json", str(json_path)] + (["--quick"] if quick else [])
    t0 = time.perf_counter()
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout_s)
    except subprocess.TimeoutExpired:
        return ScriptOutcome(name, area, "timeout", None, time.perf_counter() - t0)
    elapsed = time.perf_counter() - t0
    sys.stdout.write(proc.stdout)
    tail = "\n".join(proc.stderr.strip().splitlines()[-15:])
    if not json_path.exists():
        return ScriptOutcome(name, area, "no-json", proc.returncode, elapsed, stderr_tail=tail)
    data = json.loads(json_path.read_text())
    # A script exits 1 when one of its checks failed: those rows already say FAIL.  Only a
    # non-zero exit that no failed check explains counts as a failure of the script.
    failed_checks = any(not c.get("passed") for c in data.get("checks", []))
    status = "ok" if proc.returncode == 0 or (proc.returncode == 1 and failed_checks) else "failed"
    return ScriptOutcome(name, area, status, proc.returncode, elapsed, data, tail)


def _fmt(v: Any) -> str:
    if isinstance(v, bool):
        return str(v)
    if isinstance(v, (int, float)):
        return f"{v:.4g}"
    return str(v)


def build_report(outcomes: list[ScriptOutcome], quick: bool, machine: dict[str, str] | None = None,
                 figure_prefix: str = "report/") -> str:
    """Markdown text of the report (pure function: tested without running scripts)."""
    machine = machine or machine_info()
    rows: dict[str, list[str]] = {a: [] for a in AREAS}
    n_pass = n_fail = 0
    problems: list[str] = []
    for o in outcomes:
        checks = o.data.get("checks", [])
        for c in checks:
            area = c.get("area", o.area)
            rows.setdefault(area, [])
            ok = bool(c.get("passed"))
            n_pass += ok
            n_fail += not ok
            rows[area].append(f"| {c['check']} | {c['reference']} | {c['tolerance']} | "
                              f"{_fmt(c['measured'])} {c.get('unit', '')} | {'pass' if ok else '**FAIL**'} |")
        if o.status != "ok":
            n_fail += 1
            what = {"missing": "script missing", "no-json": "script wrote no JSON",
                    "timeout": "script timed out", "failed": "script exited non-zero"}[o.status]
            rows.setdefault(o.area, []).append(f"| `{o.name}.py`: {what} | — | runs cleanly | "
                                               f"exit {o.returncode} | **FAIL** |")
            problems.append(f"- `{o.name}.py`: {what} (exit {o.returncode})"
                            + (f"\n\n  ```\n  {o.stderr_tail.replace(chr(10), chr(10) + '  ')}\n  ```" if o.stderr_tail else ""))
        elif not checks:
            n_fail += 1
            rows.setdefault(o.area, []).append(f"| `{o.name}.py`: no checks reported | — | ≥ 1 check | 0 | **FAIL** |")

    lines = ["# longarc validation report", "",
             f"Generated {machine['date']} by `validation/run_all.py{' --quick' if quick else ''}`.", "",
             f"- Machine: {machine['machine']}", f"- Python: {machine['python']}",
             f"- Libraries: {machine['libraries']}", "",
             f"**{n_pass} checks passed, {n_fail} failed.** Timings are ratios measured within one run "
             "on this machine; absolute times are for orientation only.", ""]
    for area in list(AREAS) + [a for a in rows if a not in AREAS]:
        if not rows.get(area):
            continue
        lines += [f"## {area[0].upper() + area[1:]}", "",
                  "| check | reference (source) | tolerance | measured | result |",
                  "|---|---|---|---|---|", *rows[area], ""]
    figs = [(o.name, f) for o in outcomes for f in o.data.get("figures", [])]
    if figs:
        lines += ["## Figures", ""]
        for name, f in figs:
            lines += [f"![{f['caption']}]({figure_prefix}{f['path']})", "", f"*{f['caption']}* (`{name}.py`)", ""]
    scalars = []
    for o in outcomes:
        for k, v in o.data.items():
            if k in ("checks", "figures", "script", "quick", "python"):
                continue
            scalars.append(f"| `{o.name}` | `{k}` | {_fmt(v) if not isinstance(v, (dict, list)) else json.dumps(v, default=str)} |")
    if scalars:
        lines += ["## Figures by key (JSON)", "", "| script | key | value |", "|---|---|---|", *scalars, ""]
    if problems:
        lines += ["## Problems", "", *problems, ""]
    return "\n".join(lines)


def machine_info() -> dict[str, str]:
    libs = []
    for lib in LIBRARIES:
        try:
            libs.append(f"{lib} {metadata.version(lib)}")
        except metadata.PackageNotFoundError:
            libs.append(f"{lib} (absent)")
    try:
        import os
        cores = os.cpu_count()
    except Exception:  # pragma: no cover
        cores = "?"
    return {"date": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
            "machine": f"{platform.machine()}, {cores} cores, {platform.platform()}",
            "python": platform.python_version(), "libraries": ", ".join(libs)}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="short versions (< 5 min on 2 cores)")
    parser.add_argument("--only", nargs="*", default=None, help="run only these scripts")
    parser.add_argument("--timeout", type=float, default=None, help="per-script timeout [s]")
    args = parser.parse_args(argv)
    timeout = args.timeout or (240.0 if args.quick else 3600.0)
    names = args.only or list(SCRIPTS)
    outcomes = [run_script(n, SCRIPTS.get(n, "other"), args.quick, timeout) for n in names]
    text = build_report(outcomes, args.quick)
    (HERE / "REPORT.md").write_text(text)
    print(f"\nwrote {HERE / 'REPORT.md'}")
    return 0 if all(o.status == "ok" and all(c.get("passed") for c in o.data.get("checks", [])) for o in outcomes) else 1


if __name__ == "__main__":
    sys.exit(main())
