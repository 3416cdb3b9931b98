"""The command line: ``unbin run``, ``unbin check``, ``unbin demo``, ``unbin summary``."""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

from rich.console import Console

from .errors import SpecError, UnbinError


def _console(quiet: bool = False) -> Console:
    # Piped output (logs, CI) gets a fixed width wide enough for the summary table.
    width = None if sys.stdout.isatty() else 132
    return Console(quiet=quiet, no_color=bool(os.environ.get("NO_COLOR")), highlight=False,
                   width=width)


def cmd_check(args: argparse.Namespace) -> int:
    from .data import data_problems
    from .spec import load_spec

    console = _console()
    try:
        spec = load_spec(args.spec)
    except SpecError as exc:
        console.print(f"[red]The spec has {len(exc.problems)} problem(s):[/red]")
        for p in exc.problems:
            console.print(f"  - {p}", markup=False)
        return 2
    problems = data_problems(spec)
    if problems:
        console.print(f"[red]The spec does not match the data: {len(problems)} problem(s):[/red]")
        for p in problems:
            console.print(f"  - {p}", markup=False)
        return 2
    console.print(f"Spec {args.spec} is usable: {len(spec.cohorts)} cohort(s), "
                  f"{len(spec.analyses)} analysis(es).")
    return 0


def _run(spec_path: Path, out: Path, cores: int, profile: str | None, quiet: bool) -> int:
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

    from .data import data_problems
    from .runner import run_workflow
    from .spec import load_spec
    from .summary import print_summary

    console = _console(quiet)
    try:
        spec = load_spec(spec_path)
    except SpecError as exc:
        console.print("[red]The spec has problems:[/red]", *[f"  - {p}" for p in exc.problems],
                      sep="\n", markup=False)
        return 2
    problems = data_problems(spec)
    if problems:
        console.print("[red]The spec does not match the data:[/red]",
                      *[f"  - {p}" for p in problems], sep="\n", markup=False)
        return 2
    start = time.perf_counter()
    with Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                  console=console, transient=True, disable=quiet) as progress:
        task = progress.add_task("starting the workflow", total=None)

        def update(done: int, total: int, current: str) -> None:
            progress.update(task, completed=done, total=total,
                            description=f"jobs done ({current})" if current else "jobs done")

        rc = run_workflow(spec_path, out, cores=cores, profile=profile, on_progress=update)
    if rc != 0:
        console.print(f"[red]The workflow failed (exit {rc}); see {out / 'logs'}.[/red]")
        return rc
    if not quiet:
        print_summary(out, console)
        console.print(f"Finished in {time.perf_counter() - start:.1f} s.")
    return 0


def cmd_run(args: argparse.Namespace) -> int:
    return _run(Path(args.spec), Path(args.out), args.cores, args.profile, args.quiet)


def cmd_demo(args: argparse.Namespace) -> int:
    from .demo import write_demo

    out = Path(args.out)
    spec_path = write_demo(out)
    _console(args.quiet).print(f"Demo registry (invented data) written: spec {spec_path}, "
                               f"extract {out / 'data'}")
    return _run(spec_path, out, args.cores, args.profile, args.quiet)


def cmd_summary(args: argparse.Namespace) -> int:
    from .summary import print_summary

    print_summary(Path(args.out), _console())
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
        sp.add_argument("--quiet", action="store_true", help="no progress and no summary")

    sp = sub.add_parser("run", help="run every analysis of a spec")
    sp.add_argument("spec", help="the spec (YAML)")
    sp.add_argument("--out", required=True, help="output folder")
    run_options(sp)
    sp.set_defaults(func=cmd_run)

    sp = sub.add_parser("check", help="validate a spec and its data without fitting")
    sp.add_argument("spec")
    sp.set_defaults(func=cmd_check)

    sp = sub.add_parser("demo", help="write the invented demo registry and run it")
    sp.add_argument("--out", default="unbin-demo", help="output folder (default: unbin-demo)")
    run_options(sp)
    sp.set_defaults(func=cmd_demo)

    sp = sub.add_parser("summary", help="print the summary of a finished run")
    sp.add_argument("out")
    sp.set_defaults(func=cmd_summary)
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args))
    except UnbinError as exc:
        _console().print(f"[red]unbin:[/red] {exc}", markup=True)
        return 2


if __name__ == "__main__":
    sys.exit(main())
