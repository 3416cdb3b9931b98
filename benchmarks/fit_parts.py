"""Where one fit job's CPU goes: the refit and each question table, in process.

    python benchmarks/fit_parts.py SPEC ANALYSIS                      # this source tree
    python benchmarks/fit_parts.py SPEC ANALYSIS --baseline OLD/src --repeats 2

Runs ``pipeline.jobs.fit_analysis`` for one analysis of the spec's first cohort (or
``--cohort``) in a fresh interpreter per run, with one BLAS thread, and prints the CPU seconds
of the whole job, of ``refit.analysis.refit_analysis`` and of each question table's builder.
With ``--baseline`` (another tree's ``src`` folder) the two trees run alternately, ``--repeats``
times each (the process' CPU time; on a shared machine it still moves with the load, so compare
runs made one after the other). The job's tables go to a temporary folder (``--out`` keeps
them: ``OUT/<label>-<run>/``, to compare with ``compare_runs.py``-style checks).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

_CHILD = r"""
import json, sys, time
import unbin.pipeline.jobs as J
import unbin.refit.analysis as A
spec, cohort, analysis, out = sys.argv[1:5]
times = {}
builder = J._builder
def timed_builder(target):
    f = builder(target)
    def run(*a, **k):
        t = time.process_time()
        try:
            return f(*a, **k)
        finally:
            times[target.rsplit(".", 1)[-1].rsplit(":", 1)[-1]] = time.process_time() - t
    return run
J._builder = timed_builder
refit = A.refit_analysis
def timed_refit(*a, **k):
    t = time.process_time()
    try:
        return refit(*a, **k)
    finally:
        times["refit"] = time.process_time() - t
A.refit_analysis = timed_refit
t = time.process_time()
J.fit_analysis(spec, cohort, analysis, out)
times["job"] = time.process_time() - t
print(json.dumps(times))
"""


def run_once(src: str | None, spec: str, cohort: str, analysis: str, out: str) -> dict[str, float]:
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")
    if src:
        env["PYTHONPATH"] = src
    done = subprocess.run([sys.executable, "-c", _CHILD, spec, cohort, analysis, out], env=env,
                          check=True, capture_output=True, text=True)
    return dict(json.loads(done.stdout.strip().splitlines()[-1]))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("spec")
    parser.add_argument("analysis")
    parser.add_argument("--cohort", default="", help="default: the spec's first cohort")
    parser.add_argument("--baseline", default="", help="another tree's src folder")
    parser.add_argument("--repeats", type=int, default=1)
    parser.add_argument("--out", default="", help="keep the tables under this folder")
    parser.add_argument("--json", action="store_true")
    args = parser.parse_args()
    cohort = args.cohort
    if not cohort:
        from unbin.spec import load_spec

        cohort = load_spec(args.spec).cohorts[0].name
    trees = [("this", os.environ.get("PYTHONPATH") or None)]
    if args.baseline:
        trees.insert(0, ("baseline", args.baseline))
    keep = Path(args.out) if args.out else Path(tempfile.mkdtemp())
    runs: list[tuple[str, int, dict[str, float]]] = []
    for r in range(args.repeats):
        for label, src in trees:
            out = keep / f"{label}-{r + 1}"
            out.mkdir(parents=True, exist_ok=True)
            runs.append((label, r + 1, run_once(src, args.spec, cohort, args.analysis, str(out))))
    if args.json:
        print(json.dumps([{"tree": t, "run": n, "cpu": cpu} for t, n, cpu in runs], indent=1))
        return
    largest = {k: max(cpu.get(k, 0.0) for _, _, cpu in runs) for _, _, cpu in runs for k in cpu}
    parts = sorted((k for k, v in largest.items() if v >= 0.05), key=lambda k: -largest[k])
    print("| part | " + " | ".join(f"{t} {n}" for t, n, _ in runs) + " |")
    print("|---|" + "---:|" * len(runs))
    for p in parts:
        print(f"| {p} | " + " | ".join(f"{cpu.get(p, 0.0):.2f}" for _, _, cpu in runs) + " |")

if __name__ == "__main__":
    main()
