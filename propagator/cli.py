"""The ``longarc`` command line.

Subcommands::

    longarc check STUDY.toml [--show CASE]        validate a study, list its cases (no run)
    longarc run STUDY.toml [--workers N] [--scheduler ADDRESS] [--output PATH]
                           [--fresh] [--no-plots] [--quiet]
    longarc summary FILE.h5                        one line per case of a study file
    longarc plot FILE.h5 --case NAME --kind KIND [--versus CASE] [--fit NAME] [--out PNG]
    longarc export-oem FILE.h5 --case NAME --out FILE.oem [--frame GCRF|ITRF] [--time-system UTC|TAI|TT]
    longarc models                                 registered force models and their parameters

Exit status (also in ``longarc --help``): see :data:`EXIT_CODES`.
"""

from __future__ import annotations

import argparse
import sys
import typing
from pathlib import Path
from typing import Any, Sequence

EXIT_OK = 0
EXIT_CASES_FAILED = 1
EXIT_BAD_CONFIG = 2
EXIT_BAD_INPUT = 3
EXIT_CLUSTER = 4
EXIT_INTERRUPTED = 130

EXIT_CODES: dict[int, str] = {
    EXIT_OK: "success (run: every case complete)",
    EXIT_CASES_FAILED: "run: one or more cases failed (the others are in the file; see the summary)",
    EXIT_BAD_CONFIG: "invalid command line or invalid study file (nothing was run)",
    EXIT_BAD_INPUT: "input file missing or unreadable, not a longarc study file, or no such case",
    EXIT_CLUSTER: "the Dask scheduler could not be reached, or dask.distributed is not installed",
    EXIT_INTERRUPTED: "interrupted (SIGINT/SIGTERM): unfinished cases are marked 'interrupted'; "
                      "rerun to finish",
}

CAUTION = ("Caution: results are engineering estimates to be verified independently; decisions "
           "follow the applicable regulations and licensed practice.")

PLOT_KINDS = ("elements", "ric-difference", "ground-track", "accelerations", "fit-residuals")


def _console(stderr: bool = False):
    from rich.console import Console

    con = Console(stderr=stderr, highlight=False)
    if not con.is_terminal:  # files and pipes: wide tables instead of 80 columns
        con = Console(stderr=stderr, highlight=False, width=160)
    return con


# --------------------------------------------------------------------------------------
# check
# --------------------------------------------------------------------------------------
def _cmd_check(args: argparse.Namespace) -> int:
    from rich.table import Table
    from rich.text import Text

    from propagator.study.config import StudyConfigError, load_study

    con = _console()
    try:
        study = load_study(args.study)
    except StudyConfigError as exc:
        _console(stderr=True).print(Text(str(exc), style="red"))
        return EXIT_BAD_CONFIG
    if args.show:
        try:
            case = study.case(args.show)
        except KeyError as exc:
            _console(stderr=True).print(Text(str(exc.args[0]), style="red"))
            return EXIT_BAD_INPUT
        con.print(Text(case.to_toml()), end="")
        return EXIT_OK
    table = Table(title=f"Study {study.name!r}: {len(study.cases)} case(s)"
                        + (f", templates: {', '.join(study.templates)}" if study.templates else ""))
    for col in ("Case", "From", "Epoch", "Span [d]", "Initial state", "Force models", "Sweep values"):
        table.add_column(col, overflow="fold")
    for c in study.cases:
        cfg = c.config
        try:
            span = f"{cfg.duration_seconds() / 86400.0:.4g}"
        except ValueError:
            span = "?"
        st = cfg.initial_state
        state = st.kind + (f" ({st.frame})" if st.kind == "cartesian" else "")
        sweep = ", ".join(f"{k}={_short(v)}" for k, v in c.sweep_values.items())
        table.add_row(Text(c.name), Text(c.origin), Text(cfg.epoch), span, state,
                      Text(", ".join(n for n, _ in c.forces)), Text(sweep))
    con.print(table)
    con.print(f"output file: {study.output_path(args.output)}")
    problems = [msg for c in study.cases for msg in c.preflight()]
    if problems:
        err = _console(stderr=True)
        err.print(Text(f"{len(problems)} problem(s) would stop case(s) before integration "
                       "(the others would still run):", style="red"))
        for msg in problems:
            err.print(Text(f"  - {msg}", style="red"))
        return EXIT_BAD_INPUT
    con.print("Every force model was prepared for every case.")
    con.print("The study file is valid; nothing was run.")
    return EXIT_OK


def _short(v: Any) -> str:
    return f"{v:.6g}" if isinstance(v, float) else str(v)


# --------------------------------------------------------------------------------------
# run
# --------------------------------------------------------------------------------------
def _cmd_run(args: argparse.Namespace) -> int:
    from rich.text import Text

    from propagator.study.config import StudyConfigError, load_study
    from propagator.study.runner import ClusterUnavailableError, run_study

    con = _console()
    err = _console(stderr=True)
    try:
        study = load_study(args.study)
    except StudyConfigError as exc:
        err.print(Text(str(exc), style="red"))
        return EXIT_BAD_CONFIG
    try:
        report = run_study(study, output=args.output, workers=args.workers, scheduler=args.scheduler,
                           fresh=args.fresh, plots=False if args.no_plots else None,
                           progress=not args.quiet, console=con)
    except ClusterUnavailableError as exc:
        err.print(Text(str(exc), style="red"))
        return EXIT_CLUSTER
    except OSError as exc:
        err.print(Text(f"cannot write the output file: {exc}", style="red"))
        return EXIT_BAD_INPUT
    report.print(con)
    con.print(Text(CAUTION, style="italic"))
    if report.interrupted:
        return EXIT_INTERRUPTED
    return EXIT_CASES_FAILED if report.failed else EXIT_OK


# --------------------------------------------------------------------------------------
# summary / plot / export-oem
# --------------------------------------------------------------------------------------
def _open_error(path: str) -> str | None:
    p = Path(path)
    if not p.is_file():
        return f"{path}: no such file"
    try:
        from propagator.study.hdf5_store import StudyStore

        with StudyStore(p, mode="r"):
            pass
    except (OSError, ValueError) as exc:
        return f"{path}: not a readable longarc study file ({exc})"
    return None


def _case_error(path: str, *names: str | None) -> str | None:
    from propagator.study.hdf5_store import StudyStore

    with StudyStore(path, mode="r") as store:
        known = store.case_names()
    for n in names:
        if n is not None and n not in known:
            import difflib

            close = difflib.get_close_matches(n, known, n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            return f"{path}: no case {n!r}{hint}; cases: {', '.join(known) or 'none'}"
    return None


def _cmd_summary(args: argparse.Namespace) -> int:
    from rich.text import Text

    from propagator.study.summary import render_summary, summarize

    problem = _open_error(args.file)
    if problem:
        _console(stderr=True).print(Text(problem, style="red"))
        return EXIT_BAD_INPUT
    rows = summarize(args.file)
    con = _console()
    render_summary(rows, con, title=f"{args.file}")
    failed = [r for r in rows if r["status"] == "failed"]
    for r in failed:
        con.print(Text(f"{r['case']}: {r['error_full'].strip()}", style="red"))
    return EXIT_OK


def _cmd_plot(args: argparse.Namespace) -> int:
    from rich.text import Text

    from propagator.study import plots

    err = _console(stderr=True)
    problem = _open_error(args.file) or _case_error(args.file, args.case, args.versus)
    if problem:
        err.print(Text(problem, style="red"))
        return EXIT_BAD_INPUT
    if args.kind == "ric-difference" and not args.versus:
        err.print(Text("--kind ric-difference needs --versus CASE (the case to compare with)", style="red"))
        return EXIT_BAD_CONFIG
    out = Path(args.out) if args.out else Path(args.file).with_name(
        f"{Path(args.file).stem}_{args.case}_{args.kind}.png")
    try:
        if args.kind == "elements":
            plots.plot_elements(args.file, args.case, out)
        elif args.kind == "ric-difference":
            plots.plot_ric_difference(args.file, args.case, out, other_case=args.versus)
        elif args.kind == "ground-track":
            plots.plot_ground_track(args.file, args.case, out)
        elif args.kind == "accelerations":
            plots.plot_accelerations(args.file, args.case, out)
        else:
            plots.plot_fit_residuals(args.file, args.case, out, fit_name=args.fit)
    except (KeyError, ValueError) as exc:
        err.print(Text(f"cannot draw {args.kind} for case {args.case!r}: {exc}", style="red"))
        return EXIT_BAD_INPUT
    _console().print(f"plot written: {out}")
    return EXIT_OK


def _cmd_export_oem(args: argparse.Namespace) -> int:
    from rich.text import Text

    from propagator.study.oem import write_oem

    err = _console(stderr=True)
    problem = _open_error(args.file) or _case_error(args.file, args.case)
    if problem:
        err.print(Text(problem, style="red"))
        return EXIT_BAD_INPUT
    try:
        out = write_oem(args.file, args.case, args.out, ref_frame=args.frame, time_system=args.time_system)
    except (KeyError, ValueError) as exc:
        err.print(Text(f"cannot export case {args.case!r}: {exc}", style="red"))
        return EXIT_BAD_INPUT
    _console().print(f"OEM written: {out}")
    return EXIT_OK


# --------------------------------------------------------------------------------------
# models
# --------------------------------------------------------------------------------------
def _type_text(ann: Any) -> str:
    origin = typing.get_origin(ann)
    if origin is typing.Literal:
        return " | ".join(repr(a) for a in typing.get_args(ann))
    if origin is not None:
        args = [a for a in typing.get_args(ann) if a is not type(None)]
        inner = " | ".join(_type_text(a) for a in args)
        return inner if origin in (typing.Union,) or str(origin) == "<class 'types.UnionType'>" else \
            f"{getattr(origin, '__name__', str(origin))}[{inner}]"
    return getattr(ann, "__name__", str(ann))


def _cmd_models(args: argparse.Namespace) -> int:
    from pydantic_core import PydanticUndefined
    from rich.table import Table
    from rich.text import Text

    from forcemodels import registry

    con = _console()
    for name in registry.known_names():
        spec = registry.get(name)
        table = Table(title=f"{name} — {spec.summary}", title_justify="left", expand=False)
        table.add_column("parameter")
        table.add_column("type")
        table.add_column("default")
        table.add_column("meaning [unit]", overflow="fold")
        for pname, f in spec.params.model_fields.items():
            if f.default is PydanticUndefined and f.default_factory is None:
                default = "required"
            elif f.default_factory is not None:
                default = repr(f.default_factory())
            else:
                default = repr(f.default)
            table.add_row(pname, Text(_type_text(f.annotation)), Text(default), Text(f.description or ""))
        if not spec.params.model_fields:
            table.add_row("(none)", "", "", "")
        con.print(table)
    con.print("Use in a study file: [[defaults.forces]] with model = \"<name>\" and the parameters above; "
              "spacecraft.mass_kg / srp_area_m2 / cr fill mass_kg / area_m2 / cr when a model entry omits them.")
    return EXIT_OK


# --------------------------------------------------------------------------------------
# parser
# --------------------------------------------------------------------------------------
def build_parser() -> argparse.ArgumentParser:
    codes = "\n".join(f"  {k:>3}  {v}" for k, v in EXIT_CODES.items())
    p = argparse.ArgumentParser(
        prog="longarc",
        description="Long-arc numerical orbit propagation: batch studies from TOML files, HDF5 output, "
                    "element fits, plots.",
        epilog=f"exit status:\n{codes}\n\n{CAUTION}",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    s = sub.add_parser("check", help="validate a study file and list its cases (no run)")
    s.add_argument("study", help="study file (TOML)")
    s.add_argument("--show", metavar="CASE", help="print the fully resolved TOML of one case")
    s.add_argument("--output", metavar="PATH", help="output file the run would use")
    s.set_defaults(func=_cmd_check)

    s = sub.add_parser("run", help="run a study; cases already complete in the output file are skipped")
    s.add_argument("study", help="study file (TOML)")
    s.add_argument("--workers", type=int, metavar="N", help="local worker processes (default: [study] "
                                                           "workers, else the number of CPU cores)")
    s.add_argument("--scheduler", metavar="ADDRESS", help="run on an existing Dask cluster, e.g. tcp://host:8786")
    s.add_argument("--output", metavar="PATH", help="HDF5 output file (default: [study] output, else "
                                                    "longarc-output/<study>.h5)")
    s.add_argument("--fresh", action="store_true", help="recompute every case, even those already complete")
    s.add_argument("--no-plots", action="store_true", help="do not draw the summary plots")
    s.add_argument("--quiet", action="store_true", help="no progress bar")
    s.set_defaults(func=_cmd_run)

    s = sub.add_parser("summary", help="one line per case of a study file")
    s.add_argument("file", help="study output file (HDF5)")
    s.set_defaults(func=_cmd_summary)

    s = sub.add_parser("plot", help="draw one figure of a stored case (PNG)")
    s.add_argument("file", help="study output file (HDF5)")
    s.add_argument("--case", required=True, metavar="NAME")
    s.add_argument("--kind", required=True, choices=PLOT_KINDS)
    s.add_argument("--versus", metavar="CASE", help="other case for --kind ric-difference")
    s.add_argument("--fit", metavar="NAME", help="fit to show for --kind fit-residuals (if several)")
    s.add_argument("--out", metavar="PNG", help="output image (default: next to FILE)")
    s.set_defaults(func=_cmd_plot)

    s = sub.add_parser("export-oem", help="write one case as a CCSDS OEM text file")
    s.add_argument("file", help="study output file (HDF5)")
    s.add_argument("--case", required=True, metavar="NAME")
    s.add_argument("--out", required=True, metavar="FILE.oem")
    s.add_argument("--frame", default="GCRF", choices=("GCRF", "ITRF"))
    s.add_argument("--time-system", default="UTC", choices=("UTC", "TAI", "TT"))
    s.set_defaults(func=_cmd_export_oem)

    s = sub.add_parser("models", help="list the registered force models and their parameters")
    s.set_defaults(func=_cmd_models)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``longarc`` console script; returns the exit status."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse: --help (0) or usage error (2)
        return int(exc.code or 0)
    if getattr(args, "workers", None) is not None and args.workers < 1:
        parser.print_usage(sys.stderr)
        print("longarc: error: --workers must be >= 1", file=sys.stderr)
        return EXIT_BAD_CONFIG
    return int(args.func(args))


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
