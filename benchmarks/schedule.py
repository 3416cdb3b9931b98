"""The wall time a finished run's jobs would take on N idle cores: a list schedule of the jobs in
the workflow's dependency order, each taking its measured time.

    python benchmarks/schedule.py RUN [--cores 2] [--startup 2.5] [--scale draw_figures=0.7]

Each job's time is the ``s`` column of its Snakemake benchmark file (the job's wall time; a job
is single-threaded, so on an idle machine that is its CPU time, and unlike ``cpu_time``, which
Snakemake samples once a second, it does not lose a short job's last fraction of a second).
On a loaded machine ``s`` is inflated: estimate from a run on an idle machine, or scale.

The dependencies are those of ``src/unbin/workflow/rules/*.smk`` (kept in step with them by
hand): fits wait for the common bases (which wait for every cohort's summaries, when the run
has them), an imputed analysis' resampling job for its fit job (the handover), a cohort's
bundle for its fit and resampling jobs, pooling for the bundles, collecting for every fit and
resampling job, the figures for the collected tables (the study's figures for pooling too),
the report for every figure. The imputed analyses are read from the run's spec (``run.json``),
or named with ``--imputed``. When a core is free, the ready job of the highest priority starts
(the fits of imputed analyses have priority 1, every other job 0, as in ``fit.smk``), among
equals the one that became ready first (Snakemake's order among those is its scheduler's; a
list schedule is what it does up to that order). Printed: the estimate
(``--startup`` seconds before the first job, measured from the run's log, plus the schedule
plus ``--gap`` seconds per job for starting it), the jobs' summed time, that sum over the cores
(the bound no schedule beats) and the core-seconds left idle, most of them in the last steps.
"""

from __future__ import annotations

import argparse
import csv
import json
from pathlib import Path

STUDY_LEVEL = ("common_basis", "collect_tables", "pool_bundles", "draw_study_figures",
               "build_report")


def job_times(run: Path) -> dict[str, float]:
    """``rule/wildcards`` (the benchmark file's path under benchmarks/, without .tsv) -> s."""
    out = {}
    for f in sorted((run / "benchmarks").glob("*/**/*.tsv")):
        with open(f) as fh:
            row = next(csv.DictReader(fh, delimiter="\t"))
        out[f.relative_to(run / "benchmarks").with_suffix("").as_posix()] = float(row["s"])
    return out


def imputed_analyses(run: Path) -> set[str]:
    """The analyses of the run's spec (``run.json``) that impute their missing values."""
    record = run / "run.json"
    if not record.is_file():
        return set()
    spec_path = json.loads(record.read_text()).get("spec")
    if not spec_path or not Path(spec_path).is_file():
        return set()
    from unbin.spec import load_spec
    from unbin.spec.missing import missing_options

    spec = load_spec(spec_path)
    return {a.name for a in spec.analyses if missing_options(spec, a.name).imputed}


def dependencies(jobs: list[str], imputed: set[str] | frozenset[str] = frozenset()
                 ) -> dict[str, list[str]]:
    by_rule: dict[str, list[str]] = {}
    for j in jobs:
        by_rule.setdefault(j.split("/")[0], []).append(j)

    def of(rule: str, cohort: str | None = None) -> list[str]:
        return [j for j in by_rule.get(rule, [])
                if cohort is None or j.split("/")[1] == cohort]

    deps: dict[str, list[str]] = {}
    for j in jobs:
        rule, *wild = j.split("/")
        cohort = wild[0] if wild and rule not in STUDY_LEVEL else None
        if rule == "fit_analysis":
            deps[j] = of("common_basis")
        elif rule == "common_basis":
            deps[j] = of("summarise_sample")
        elif rule == "bundle_cohort":
            deps[j] = of("fit_analysis", cohort) + of("resample_analysis", cohort)
        elif rule == "pool_bundles":
            deps[j] = of("bundle_cohort")
        elif rule == "collect_tables":
            deps[j] = of("fit_analysis") + of("resample_analysis")
        elif rule == "draw_figures":
            deps[j] = of("collect_tables")
        elif rule == "draw_study_figures":
            deps[j] = of("collect_tables") + of("pool_bundles")
        elif rule == "build_report":
            deps[j] = of("draw_figures") + of("draw_study_figures") + of("pool_bundles")
        elif rule == "resample_analysis" and wild[-1] in imputed:  # the fit's handover
            deps[j] = [f"fit_analysis/{'/'.join(wild)}"]
        else:  # summarise_sample, a complete-case resample_analysis: the extract only
            deps[j] = []
    return deps


def priority(job: str, imputed: set[str] | frozenset[str]) -> int:
    rule, *wild = job.split("/")
    return 1 if rule == "fit_analysis" and wild and wild[-1] in imputed else 0


def schedule(times: dict[str, float], cores: int, gap: float,
             imputed: set[str] | frozenset[str] = frozenset()) -> tuple[float, dict[str, float]]:
    """Makespan and each job's end of the list schedule."""
    deps = dependencies(list(times), imputed)
    ends: dict[str, float] = {}
    running: list[tuple[float, str]] = []
    started: set[str] = set()
    now = 0.0
    while len(ends) < len(times):
        ready = [j for j in times if j not in started and all(d in ends for d in deps[j])]
        ready.sort(key=lambda j: (-priority(j, imputed),
                                  max((ends[d] for d in deps[j]), default=0.0)))
        while ready and len(running) < cores:
            j = ready.pop(0)
            started.add(j)
            running.append((now + gap + times[j], j))
        running.sort()
        now, j = running.pop(0)
        ends[j] = now
    return now, ends


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("run", type=Path, help="a finished result folder")
    ap.add_argument("--cores", type=int, default=2)
    ap.add_argument("--startup", type=float, default=0.0,
                    help="seconds before the first job (command start to first job)")
    ap.add_argument("--gap", type=float, default=0.15,
                    help="seconds to start each job (0.15 reproduces the demo run of 1f8e0c7 "
                    "on an idle machine: 81.0 s estimated, 81.1 s measured, --startup 2.6)")
    ap.add_argument("--scale", action="append", default=[], metavar="RULE=FACTOR",
                    help="multiply a rule's job times (what-if), e.g. draw_figures=0.7")
    ap.add_argument("--imputed", default=None, metavar="A,B",
                    help="the imputed analyses (default: those of the run's spec, run.json)")
    args = ap.parse_args(argv)
    times = job_times(args.run)
    imputed = (imputed_analyses(args.run) if args.imputed is None
               else {a for a in args.imputed.split(",") if a})
    for item in args.scale:
        rule, factor = item.split("=")
        times = {j: t * float(factor) if j.split("/")[0] == rule else t for j, t in times.items()}
    makespan, _ = schedule(times, args.cores, args.gap, imputed)
    total = sum(times.values())
    busy = total + args.gap * len(times)
    print(f"{len(times)} jobs, summed time {total:.1f} s; on {args.cores} cores at best "
          f"{busy / args.cores:.1f} s")
    print(f"list schedule {makespan:.1f} s + startup {args.startup:.1f} s = "
          f"{makespan + args.startup:.1f} s estimated wall; "
          f"{args.cores * makespan - busy:.1f} core-seconds idle")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
