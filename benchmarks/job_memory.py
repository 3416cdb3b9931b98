"""Where one job's memory peaks: each step of ``unbin.pipeline.jobs.resample_analysis`` (or,
with ``--fit``, of ``fit_analysis``) run in this process — reading the extract, the analysis
sample, the refits, each table builder — with its CPU seconds, the
process' resident memory (RSS, from /proc, sampled every 10 ms by a thread) at the table's
start and its largest value during the table, and the main thread's innermost calls at the
moment that largest value was first seen (where the table was when memory peaked). With
``--traced`` also the memory Python's allocator tracking sees (tracemalloc, to which numpy
reports its arrays) at each table's start and end: RSS well above it is memory freed by the
program that the C library has not handed back to the system.

    python benchmarks/registry.py --rows 1000000 --inputs-only --keep /tmp/reg1m
    python benchmarks/job_memory.py /tmp/reg1m/spec.yaml registry death_egfr /tmp/out
    python benchmarks/job_memory.py --fit /tmp/reg1m/spec.yaml registry death_egfr /tmp/out

(the spec and extract of any run work; the tables are written to the last argument's folder
as the job writes them; an imputed analysis' resampling job reads what its fit job handed
over when that folder holds it, as in the workflow, else imputes and refits again). Linux
only (/proc).
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import resource  # noqa: E402
import sys  # noqa: E402
import threading  # noqa: E402
import time  # noqa: E402
import traceback  # noqa: E402
import tracemalloc  # noqa: E402
from collections.abc import Callable  # noqa: E402
from typing import Any  # noqa: E402

from unbin.pipeline import jobs  # noqa: E402

PAGE = os.sysconf("SC_PAGE_SIZE")


def rss_mb() -> float:
    with open("/proc/self/statm", encoding="ascii") as f:
        return int(f.read().split()[1]) * PAGE / 2**20


class Sampler:
    """The largest RSS since ``reset`` and the main thread's stack when it was first seen."""

    def __init__(self, every: float = 0.01) -> None:
        self.main = threading.get_ident()
        self.every, self.peak = every, 0.0
        self.stack: list[traceback.FrameSummary] | None = None
        self.stop = False
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def reset(self) -> None:
        self.peak, self.stack = rss_mb(), None

    def _run(self) -> None:
        while not self.stop:
            now = rss_mb()
            if now > self.peak:
                self.peak = now
                frame = sys._current_frames().get(self.main)
                self.stack = None if frame is None else traceback.extract_stack(frame)[-8:]
                # the frame (and so its locals' arrays) must not be held here until the
                # next peak: that kept a finished table's arrays alive into the next one
                del frame
            time.sleep(self.every)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("spec")
    ap.add_argument("cohort")
    ap.add_argument("analysis")
    ap.add_argument("out", help="folder for the job's tables")
    ap.add_argument("--traced", action="store_true",
                    help="also tracemalloc's view (slower: every allocation is recorded)")
    ap.add_argument("--fit", action="store_true",
                    help="the analysis' fit job (fit_analysis) instead of its resampling job")
    args = ap.parse_args()
    os.makedirs(args.out, exist_ok=True)
    sampler = Sampler()
    if args.traced:
        tracemalloc.start()

    def measured(label: str, fn: Callable[..., Any]) -> Callable[..., Any]:
        def run(*a: Any, **k: Any) -> Any:
            sampler.reset()
            start, cpu = rss_mb(), time.process_time()
            traced = tracemalloc.get_traced_memory()[0] / 2**20 if args.traced else None
            out = fn(*a, **k)
            cpu = time.process_time() - cpu
            line = (f"{label}: {cpu:.1f} s CPU, RSS at start {start:.0f} MB, "
                    f"peak {sampler.peak:.0f} MB")
            if traced is not None:
                line += (f"; traced at start {traced:.0f} MB, at end "
                         f"{tracemalloc.get_traced_memory()[0] / 2**20:.0f} MB")
            print(line, flush=True)
            for fs in sampler.stack or []:
                print(f"    {os.path.basename(fs.filename)}:{fs.lineno} {fs.name}", flush=True)
            return out

        return run

    original = jobs._builder

    def builder(target: str) -> Callable[..., Any]:
        return measured(target.split(":")[1], original(target))

    # the steps before the tables: the names the job functions look up when they run
    from unbin.refit import analysis as refit_module

    jobs.read_extract = measured("read_extract", jobs.read_extract)  # type: ignore[assignment]
    jobs.analysis_sample = measured("analysis_sample",  # type: ignore[assignment]
                                    jobs.analysis_sample)
    for name in ("refit_analysis", "bare_refit"):
        setattr(refit_module, name, measured(name, getattr(refit_module, name)))
    jobs._builder = builder
    cpu = time.process_time()
    if args.fit:
        jobs.fit_analysis(args.spec, args.cohort, args.analysis, args.out)
    else:  # an imputed analysis reads what its fit job (--fit, same OUT) handed over
        handover = os.path.join(args.out, jobs.HANDOVER)
        jobs.resample_analysis(args.spec, args.cohort, args.analysis, args.out,
                               handover=handover if os.path.isfile(handover) else None)
    sampler.stop = True
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"job: {time.process_time() - cpu:.1f} s CPU, largest RSS {peak:.0f} MB")


if __name__ == "__main__":
    main()
