"""CPU time of the large-sample GLM bootstrap refits (``unbin.models.weighted.WeightedGLM``
from ``_WHOLE_ROWS`` rows: ``_chord``, every replicate at once) on a simulated sample, best of
a few rounds; ``--save`` keeps the coefficients so that two source trees can be compared
(run the old and the new one alternately, each with its own PYTHONPATH):

    PYTHONPATH=OLD/src python benchmarks/glm_chord.py --n 200000 --save old.npy
    PYTHONPATH=NEW/src python benchmarks/glm_chord.py --n 200000 --save new.npy \\
        --against old.npy
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from unbin.models.base import Outcome  # noqa: E402
from unbin.models.weighted import Replicates, WeightedGLM, resample_counts  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=200_000)
    ap.add_argument("--p", type=int, default=8)
    ap.add_argument("--replicates", type=int, default=50)
    ap.add_argument("--family", default="binary", choices=["binary", "count"])
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--save")
    ap.add_argument("--against")
    a = ap.parse_args()
    rng = np.random.default_rng(11)
    X = rng.normal(size=(a.n, a.p))
    eta = -1.0 + X @ (0.2 * rng.normal(size=a.p))
    if a.family == "binary":
        o = Outcome("binary", (rng.random(a.n) < 1 / (1 + np.exp(-eta))).astype(float))
    else:
        t = rng.uniform(0.5, 2.0, a.n)
        o = Outcome("count", rng.poisson(t * np.exp(eta)).astype(float), offset=np.log(t))
    start = WeightedGLM(a.family, X, o).coef(np.ones((1, a.n)))[0]
    g = WeightedGLM(a.family, X, o, start)
    R = Replicates(resample_counts(np.random.default_rng(5), a.n, a.replicates))
    took = []
    for _ in range(a.rounds):
        t0 = time.process_time()
        coef = g.coef(R)
        took.append(time.process_time() - t0)
    line = (f"{a.family} n={a.n} p={a.p} B={a.replicates}: {min(took):.3f} s CPU (best of "
            f"{a.rounds})")
    if a.against:
        old = np.load(a.against)
        line += (f"; largest difference from {a.against} "
                 f"{np.nanmax(np.abs(coef - old)):.1e}, same failures "
                 f"{np.array_equal(np.isnan(coef), np.isnan(old))}")
    if a.save:
        np.save(a.save, coef)
    print(line)


if __name__ == "__main__":
    main()
