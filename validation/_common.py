"""Shared plumbing for validation scripts: arguments, checks, table, JSON.

Every script runs as ``python validation/NAME.py [--quick] --json PATH``, prints a
readable table and writes its figures under the JSON keys its issue names, plus a
``checks`` list the report collector (``run_all.py``) turns into table rows:

    {"area", "check", "reference", "tolerance", "measured", "unit", "passed"}

``reference`` names the source (standard, textbook example, reference library, paper,
or "common practice" / "from memory").  Figures (PNG) go to ``figures`` as
``{"path", "caption"}`` with paths relative to the JSON file's folder.
"""

from __future__ import annotations

import argparse
import json
import math
import platform
import sys
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))


@dataclass
class Check:
    area: str
    check: str
    reference: str
    tolerance: str
    measured: float | str
    unit: str
    passed: bool


@dataclass
class Report:
    """Collects figures, checks and figure files of one validation script."""

    script: str
    quick: bool
    json_path: Path | None
    values: dict[str, Any] = field(default_factory=dict)
    checks: list[Check] = field(default_factory=list)
    figures: list[dict[str, str]] = field(default_factory=list)
    started: float = field(default_factory=time.perf_counter)

    @property
    def out_dir(self) -> Path:
        """Folder for figures: beside the JSON file (or validation/out)."""
        d = self.json_path.parent if self.json_path else ROOT / "validation" / "out"
        d.mkdir(parents=True, exist_ok=True)
        return d

    def check(self, area: str, check: str, reference: str, measured: float | str, *,
              tolerance: str, passed: bool, unit: str = "") -> bool:
        if isinstance(measured, float) and not math.isfinite(measured):
            passed = False
        self.checks.append(Check(area, check, reference, tolerance, measured, unit, bool(passed)))
        return bool(passed)

    def figure(self, path: Path, caption: str) -> None:
        self.figures.append({"path": str(Path(path).resolve().relative_to(self.out_dir.resolve())),
                             "caption": caption})

    def finish(self) -> int:
        """Print the table, write the JSON; exit code 0 if every check passed."""
        width = max([len(c.check) for c in self.checks] + [20])
        print(f"\n{self.script} ({'quick' if self.quick else 'full'}) — {time.perf_counter() - self.started:.1f} s")
        print(f"{'check':<{width}}  {'measured':>14}  {'tolerance':<18} result")
        for c in self.checks:
            m = f"{c.measured:.4g}" if isinstance(c.measured, (int, float)) else str(c.measured)
            print(f"{c.check:<{width}}  {m + ' ' + c.unit:>14}  {c.tolerance:<18} {'pass' if c.passed else 'FAIL'}")
        for k, v in self.values.items():
            if not isinstance(v, (dict, list)):
                print(f"  {k} = {v}")
            else:
                print(f"  {k} = {json.dumps(v, default=float)[:200]}")
        payload = {**self.values, "checks": [asdict(c) for c in self.checks], "figures": self.figures,
                   "script": self.script, "quick": self.quick,
                   "elapsed_s": time.perf_counter() - self.started,
                   "python": platform.python_version()}
        if self.json_path:
            self.json_path.parent.mkdir(parents=True, exist_ok=True)
            self.json_path.write_text(json.dumps(payload, indent=2, default=_json_default))
        return 0 if all(c.passed for c in self.checks) else 1


def _json_default(o: Any) -> Any:
    try:
        return float(o)
    except (TypeError, ValueError):
        return str(o)


def start(script_file: str, description: str) -> Report:
    """Parse ``[--quick] --json PATH`` and return a fresh :class:`Report`."""
    parser = argparse.ArgumentParser(description=description)
    parser.add_argument("--quick", action="store_true", help="shorter arcs / fewer repetitions")
    parser.add_argument("--json", type=Path, default=None, help="where to write the JSON figures")
    args = parser.parse_args()
    return Report(script=Path(script_file).stem, quick=args.quick, json_path=args.json)
