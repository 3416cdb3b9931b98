"""The command line: ``unbin run``, ``unbin check``, ``unbin demo``, ``unbin summary``,
``unbin report``."""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING

from rich.console import Console

from .errors import SpecError, UnbinError

if TYPE_CHECKING:
    from .spec import Spec


def _console(quiet: bool = False) -> Console:
    # Piped output (logs, CI) gets a fixed width wide enough for the summary table.
    width = None if sys.stdout.isatty() else 132
    return Console(quiet=quiet, no_color=bool(os.environ.get("NO_COLOR")), highlight=False,
                   width=width)


def _usable_spec(path: Path, console: Console) -> Spec | None:
    """The loaded spec when it is valid and matches its data; else print every problem (spec
    problems first, then data problems) and return None."""
    from .data import data_problems, grouping_warnings
    from .spec import load_spec

    try:
        spec = load_spec(path)
    except SpecError as exc:
        problems, what = exc.problems, "The spec has"
    else:
        problems, what = data_problems(spec), "The spec does not match the data:"
        if not problems:
            warnings = grouping_warnings(spec)
            if warnings:
                console.print(f"[yellow]{len(warnings)} note(s) on the legacy groups in the "
                              "analysis samples (the analyses still run; a legacy contrast "
                              "with an empty group is recorded as failed):[/yellow]")
                for w in warnings:
                    console.print(f"  - {w}", markup=False)
            return spec
    console.print(f"[red]{what} {len(problems)} problem(s):[/red]")
    for p in problems:
        console.print(f"  - {p}", markup=False)
    return None


def cmd_check(args: argparse.Namespace) -> int:

    console = _console()
    spec = _usable_spec(Path(args.spec), console)
    if spec is None:
        return 2
    console.print(f"Spec {args.spec} is usable: {len(spec.cohorts)} cohort(s), "
                  f"{len(spec.analyses)} analysis(es).")
    return 0


def _run(spec_path: Path, out: Path, cores: int, profile: str | None, quiet: bool,
         memory_mb: int | None = None) -> int:
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

    from .pipeline.runner import run_workflow
    from .present.summary import print_summary

    console = _console(quiet)
    errors = _console()  # problems are printed even with --quiet: the exit code alone says little
    if _usable_spec(spec_path, errors) is None:
        return 2
    start = time.perf_counter()
    with Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                  console=console, transient=True, disable=quiet) as progress:
        task = progress.add_task("starting the workflow", total=None)

        def update(done: int, total: int, current: str) -> None:
            progress.update(task, completed=done, total=total or None,
                            description=f"jobs done · running {current}" if current
                            else "jobs done")

        rc = run_workflow(spec_path, out, cores=cores, profile=profile, on_progress=update,
                          memory_mb=memory_mb)
    if rc != 0:
        errors.print(f"[red]The workflow failed (exit {rc}); see {out / 'logs'}.[/red]")
        return rc
    if not quiet:
        print_summary(out, console)
        if (out / "report.html").is_file():
            console.print(f"Report: {out / 'report.html'} (figures in {out / 'figures'})",
                          markup=False)
        console.print(f"Finished in {time.perf_counter() - start:.1f} s.")
    return 0


def cmd_run(args: argparse.Namespace) -> int:
    return _run(Path(args.spec), Path(args.out), args.cores, args.profile, args.quiet,
                args.memory_mb)


def cmd_demo(args: argparse.Namespace) -> int:
    from .demo import write_demo

    out = Path(args.out)
    spec_path = write_demo(out)
    _console(args.quiet).print(f"Demo registry (invented data) written: spec {spec_path}, "
                               f"extract {out / 'data'}")
    return _run(spec_path, out, args.cores, args.profile, args.quiet, args.memory_mb)


def cmd_pool(args: argparse.Namespace) -> int:
    from .consortium.bundles import POOLED_TABLES
    from .pipeline.jobs import pool_bundles

    out = Path(args.out) / "tables"
    pool_bundles([Path(b) for b in args.bundles], out, args.spec)
    console = _console(args.quiet)
    console.print(f"Pooled {len(args.bundles)} bundle(s): "
                  + ", ".join(str(out / f"{t}.parquet") for t in POOLED_TABLES), markup=False)
    return 0


def cmd_compare(args: argparse.Namespace) -> int:
    from rich.table import Table

    from .pipeline.jobs import compare_folders
    from .results.provenance import provenance
    from .results.tables import write_table

    changes = compare_folders(args.old, args.new, args.tolerance)
    out = Path(args.out) if args.out else Path(args.new) / "comparison.parquet"
    write_table(changes, out, provenance([], "", 0, "comparison", ""))
    console = _console(args.quiet)
    if changes.empty:
        console.print(f"No differences beyond {args.tolerance:g} between {args.old} and "
                      f"{args.new}.")
        return 0
    t = Table(title=f"What changed from {args.old} to {args.new}", title_justify="left")
    for col in ("change", "cohort", "analysis", "table", "item", "old", "new"):
        t.add_column(col)
    for _, r in changes.head(args.max_rows).iterrows():
        t.add_row(*(str(r[c]) for c in ("change", "cohort", "analysis", "table", "item", "old",
                                         "new")))
    console.print(t)
    affected = changes.drop_duplicates(["cohort", "analysis"])
    console.print(f"{len(changes)} change(s) in {len(affected)} cohort/analysis pair(s); "
                  f"full table: {out}", markup=False)
    return 0


def cmd_summary(args: argparse.Namespace) -> int:
    from .present.summary import print_summary

    print_summary(Path(args.out), _console())
    return 0


def cmd_report(args: argparse.Namespace) -> int:
    from .present.report import build_report, find_spec

    out = Path(args.out)
    console = _console(args.quiet)
    with console.status("drawing the figures and writing the report", spinner="line"):
        rep = build_report(out, find_spec(out, args.spec))
    console.print(f"Report: {rep.path} ({len(rep.figures)} figures in {out / 'figures'})",
                  markup=False)
    return 0


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="unbin", description=(
        "Refit legacy grouped analyses of continuous predictors on the continuous scale and "
        "tabulate what the grouping cost."))
    from . import __version__

    p.add_argument("--version", action="version", version=f"unbin {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    def run_options(sp: argparse.ArgumentParser) -> None:
        sp.add_argument("--cores", type=int, default=max(1, os.cpu_count() or 1),
                        help="cores for local jobs (default: all)")
        sp.add_argument("--profile", default=None,
                        help="Snakemake profile: 'local', 'slurm' or a profile folder")
        sp.add_argument("--memory-mb", type=int, default=None,
                        help="megabytes the jobs running at once on this computer may use "
                             "together (default: 90%% of the memory available at the start; "
                             "no cap with a cluster profile)")
        sp.add_argument("--quiet", action="store_true", help="no progress and no summary")

    sp = sub.add_parser("run", help="run every analysis of a spec")
    sp.add_argument("spec", help="the spec (YAML)")
    sp.add_argument("--out", required=True, help="output folder")
    run_options(sp)
    sp.set_defaults(func=cmd_run)

    sp = sub.add_parser("check", help="validate a spec and its data without fitting")
    sp.add_argument("spec", help="the spec (YAML) to check against its extracts")
    sp.set_defaults(func=cmd_check)

    sp = sub.add_parser("demo", help="write the invented demo registry and run it")
    sp.add_argument("--out", default="unbin-demo", help="output folder (default: unbin-demo)")
    run_options(sp)
    sp.set_defaults(func=cmd_demo)

    sp = sub.add_parser("pool", help="pool cohort bundles (folders under <out>/bundles/)")
    sp.add_argument("bundles", nargs="+", help="bundle folders, one per cohort")
    sp.add_argument("--out", required=True, help="output folder (tables go to OUT/tables/)")
    sp.add_argument("--spec", default=None,
                    help="a spec whose 'published' studies join the pooled curves")
    sp.add_argument("--quiet", action="store_true", help="print nothing")
    sp.set_defaults(func=cmd_pool)

    sp = sub.add_parser("compare", help="what changed between two result folders")
    sp.add_argument("old", help="output folder of the earlier run")
    sp.add_argument("new", help="output folder of the later run")
    sp.add_argument("--tolerance", type=float, default=1e-8,
                    help="absolute change below which an estimate counts as unchanged "
                         "(model scale: log ratio, mean difference; default 1e-8)")
    sp.add_argument("--out", help="parquet file for the full table (default NEW/comparison.parquet)")
    sp.add_argument("--max-rows", type=int, default=40, help="rows shown on screen")
    sp.add_argument("--quiet", action="store_true", help="print nothing")
    sp.set_defaults(func=cmd_compare)

    sp = sub.add_parser("summary", help="print the summary of a finished run")
    sp.add_argument("out", help="output folder of a finished run")
    sp.set_defaults(func=cmd_summary)

    sp = sub.add_parser("report", help="draw the figures and rebuild OUT/report.html")
    sp.add_argument("out", help="output folder of a finished run")
    sp.add_argument("--spec", default=None,
                    help="the run's spec (default: OUT/spec.yaml, as `unbin demo` writes it)")
    sp.add_argument("--quiet", action="store_true", help="print nothing")
    sp.set_defaults(func=cmd_report)
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args))
    except UnbinError as exc:
        _console().print(f"[red]unbin:[/red] {exc}", markup=True)
        return 2
    except KeyboardInterrupt:
        # Snakemake has stopped its jobs and marked their outputs incomplete; tables are written
        # atomically, so what exists is complete and the next run redoes only the rest.
        _console().print("[red]Interrupted.[/red] Finished jobs are kept; run the same command "
                         "again to finish the rest.")
        return 130


if __name__ == "__main__":
    sys.exit(main())
