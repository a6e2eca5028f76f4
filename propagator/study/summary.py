"""One-line-per-case summary of a study file, and its rendering as a rich table.

Reads only attributes and the first/last time stamp of each case, so it is cheap even for
year-long arcs and works while a runner is still writing (it then sees the last flush).
"""

from __future__ import annotations

import os
from typing import Any

from propagator.constants import SECONDS_PER_DAY
from propagator.study.hdf5_store import CASES_GROUP, open_for_reading

__all__ = ["summarize", "render_summary", "SUMMARY_COLUMNS"]

SUMMARY_COLUMNS: tuple[tuple[str, str], ...] = (
    ("case", "Case"),
    ("status", "Status"),
    ("epoch", "Epoch"),
    ("span_days", "Span [d]"),
    ("samples", "Samples"),
    ("nfev", "RHS evals"),
    ("accepted", "Accepted"),
    ("rejected", "Rejected"),
    ("error", "Error"),
)
"""(row key, table heading) in display order."""


def _text(v: Any) -> str:
    return v.decode("utf-8") if isinstance(v, bytes) else ("" if v is None else str(v))


def _int_or_none(v: Any) -> int | None:
    try:
        return None if v is None else int(v)
    except (TypeError, ValueError):
        return None


_STAT_KEYS = {
    "nfev": ("nfev", "evaluations"),
    "accepted": ("accepted", "accepted_steps"),
    "rejected": ("rejected", "rejected_steps"),
}
"""Summary column -> accepted names of the integrator-statistics attribute (first found wins)."""


def _stat(stats: Any, key: str) -> int | None:
    for name in _STAT_KEYS[key]:
        if name in stats:
            return _int_or_none(stats[name])
    return None


def summarize(path: str | os.PathLike) -> list[dict[str, Any]]:
    """One dict per case, sorted by name, with keys ``case``, ``status``, ``epoch`` (ISO
    text of the case epoch), ``span_days`` (|last - first sample| [d]), ``samples``,
    ``nfev``, ``accepted``, ``rejected`` (integrator statistics ``nfev`` / ``evaluations``,
    ``accepted`` / ``accepted_steps``, ``rejected`` / ``rejected_steps``; None when absent),
    ``integrator_status``, ``error`` (first line of the error of a failed case) and
    ``error_full`` (whole error text)."""
    rows: list[dict[str, Any]] = []
    with open_for_reading(path) as f:
        cases = f.get(CASES_GROUP)
        for name in sorted(cases.keys()) if cases is not None else []:
            g = cases[name]
            a = g.attrs
            try:
                t = g.get("time_s")
                n = int(t.shape[0]) if t is not None else 0
                span = abs(float(t[n - 1]) - float(t[0])) / SECONDS_PER_DAY if n > 0 else 0.0
            except (OSError, KeyError, ValueError):
                # a case being written by another process (or left by a killed one) may
                # not be readable beyond its attributes
                n = int(a.get("n_samples", 0))
                span = float("nan")
            stats = g["integrator_statistics"].attrs if "integrator_statistics" in g else {}
            error = _text(a.get("error", ""))
            rows.append({
                "case": name,
                "status": _text(a.get("status", "")),
                "epoch": _text(a.get("epoch_iso", "")),
                "span_days": span,
                "samples": n,
                "nfev": _stat(stats, "nfev"),
                "accepted": _stat(stats, "accepted"),
                "rejected": _stat(stats, "rejected"),
                "integrator_status": _text(stats.get("status", "")),
                "error": error.strip().splitlines()[0] if error.strip() else "",
                "error_full": error,
            })
    return rows


_STATUS_STYLE = {"complete": "green", "failed": "bold red", "running": "yellow", "interrupted": "magenta"}


def render_summary(rows: list[dict[str, Any]], console: Any = None, title: str = "Study cases") -> Any:
    """Print ``rows`` (from :func:`summarize`) as a rich table on ``console`` (a
    ``rich.console.Console``; a new one when None) and return the table."""
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text

    console = console or Console()
    n_fail = sum(r["status"] == "failed" for r in rows)
    n_done = sum(r["status"] == "complete" for r in rows)
    table = Table(title=title, caption=f"{len(rows)} cases: {n_done} complete, {n_fail} failed, "
                                       f"{len(rows) - n_done - n_fail} other")
    for key, heading in SUMMARY_COLUMNS:
        numeric = key in ("span_days", "samples", "nfev", "accepted", "rejected")
        table.add_column(heading, justify="right" if numeric else "left",
                         overflow="fold" if key == "error" else "ellipsis")
    for r in rows:
        cells = []
        for key, _ in SUMMARY_COLUMNS:
            v = r.get(key)
            # Text cells: error messages may contain brackets that rich would read as markup
            if key == "span_days":
                cells.append(Text(f"{v:.3f}"))
            elif key == "status":
                cells.append(Text(str(v), style=_STATUS_STYLE.get(v, "")))
            elif v is None:
                cells.append(Text("-"))
            else:
                cells.append(Text(str(v)))
        table.add_row(*cells)
    console.print(table)
    return table
