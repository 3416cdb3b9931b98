"""The CPU time of the figure jobs (``draw_figures`` for one cohort, ``draw_study_figures``)
under two source trees, alternated, on a copy of a finished run; and whether they draw the
same figures.

    python benchmarks/figure_jobs.py RUN --old OLD_SRC --new NEW_SRC [--cohort C] [--repeat 5]

RUN is a finished run's folder (``unbin demo --out RUN``); its ``spec.yaml`` and ``tables/`` are
copied to a scratch folder per tree, so RUN is not touched. Each job runs in a fresh
interpreter (as a workflow job does: imports included) with ``PYTHONPATH`` set to the tree's
``src``; its CPU time is the child's user + system seconds. The trees alternate, so a load that
changes during the measurement weighs on both; the medians are printed. Then the two trees'
figures are compared: every SVG and ``index.json`` byte for byte, every PNG pixel for pixel
(decoded by Pillow, as RGBA) with its resolution.
"""

from __future__ import annotations

import argparse
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

JOB = """
import sys
from pathlib import Path
from unbin.pipeline import jobs
run, what = Path(sys.argv[1]), sys.argv[2]
if what == "_study":
    jobs.draw_study_figures(run / "spec.yaml", run / "figures" / "_study")
else:
    out = run / "figures" / what
    jobs.draw_figures(run / "spec.yaml", what, out)
"""


def child_cpu(cmd: list[str], env: dict[str, str]) -> float:
    """User + system seconds of one child process (and its children)."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    subprocess.run(cmd, env=env, check=True, stdout=subprocess.DEVNULL)
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def same_figures(old: Path, new: Path) -> list[str]:
    """What differs between two figure folders (empty: the same figures)."""
    import numpy as np
    from PIL import Image

    def files(d: Path) -> list[Path]:
        return sorted(p.relative_to(d) for p in d.rglob("*")
                      if p.is_file() and not p.name.startswith("."))

    problems = [f"only in one: {p}" for p in sorted(set(files(old)) ^ set(files(new)))]
    for rel in sorted(set(files(old)) & set(files(new))):
        a, b = old / rel, new / rel
        if rel.suffix == ".png":
            ia, ib = Image.open(a), Image.open(b)
            pa, pb = np.asarray(ia.convert("RGBA")), np.asarray(ib.convert("RGBA"))
            if pa.shape != pb.shape or (pa != pb).any() or ia.info.get("dpi") != ib.info.get(
                    "dpi"):
                problems.append(f"pixels differ: {rel}")
        elif a.read_bytes() != b.read_bytes():
            problems.append(f"bytes differ: {rel}")
    return problems


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("run", type=Path)
    ap.add_argument("--old", type=Path, required=True, help="the old tree's src folder")
    ap.add_argument("--new", type=Path, required=True, help="the new tree's src folder")
    ap.add_argument("--cohort", default=None, help="default: the run's first cohort folder")
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args()
    cohort = args.cohort or sorted(p.name for p in (args.run / "figures").iterdir()
                                   if p.is_dir() and not p.name.startswith("_"))[0]
    scratch = Path(tempfile.mkdtemp(prefix="figure-jobs-"))
    try:
        runs = {}
        for name in ("old", "new"):
            runs[name] = scratch / name
            runs[name].mkdir()
            shutil.copy(args.run / "spec.yaml", runs[name] / "spec.yaml")
            shutil.copytree(args.run / "tables", runs[name] / "tables")
        job = scratch / "job.py"
        job.write_text(JOB, encoding="utf-8")
        times: dict[tuple[str, str], list[float]] = {}
        for i in range(args.repeat):
            for what in (cohort, "_study"):
                for name, src in (("old", args.old), ("new", args.new)):
                    env = {**os.environ, "PYTHONPATH": str(src.resolve())}
                    shutil.rmtree(runs[name] / "figures" / what, ignore_errors=True)
                    t = child_cpu([sys.executable, str(job), str(runs[name]), what], env)
                    times.setdefault((what, name), []).append(t)
            print(f"round {i + 1}: " + ", ".join(f"{w} {n} {v[-1]:.2f} s"
                                                 for (w, n), v in times.items()), flush=True)
        for what in (cohort, "_study"):
            old, new = (statistics.median(times[(what, n)]) for n in ("old", "new"))
            rule = "draw_study_figures" if what == "_study" else f"draw_figures ({what})"
            print(f"{rule}: median CPU old {old:.2f} s, new {new:.2f} s ({new / old - 1:+.0%})")
        problems = [p for what in (cohort, "_study") for p in same_figures(
            runs["old"] / "figures" / what, runs["new"] / "figures" / what)]
        print("figures: the same" if not problems else "figures differ:\n  "
              + "\n  ".join(problems))
    finally:
        shutil.rmtree(scratch)


if __name__ == "__main__":
    main()
