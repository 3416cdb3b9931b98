"""CPU time of a fit's AUC (``unbin.models.discrimination.auc``: one linear predictor over the
whole sample, what ``c_index`` computes once per fitted model of a binary analysis) against
the rank formula it replaced (midranks by a stable comparison sort, the events' ranks summed,
``unbin.distributions.stats.rankdata``), alternated in one process; the two must be the
same float.

    python benchmarks/fit_auc.py                       # 200,000 and 1,000,000 rows
    python benchmarks/fit_auc.py --rows 1000000 --calls 20 --json

The scores are an invented logistic model's linear predictor rounded as the C-index compares
it (``compared_score``, 10 decimals: nearly all distinct) and, as a second case, a grouped
score (four values, heavy ties); about 15% events. Timings are this process' CPU seconds (one
BLAS thread); the first call of each is made before the clock starts (the compiled kernels'
loading).
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
from typing import Any  # noqa: E402

import numpy as np  # noqa: E402
from _measure import timed  # noqa: E402

from unbin.distributions import stats  # noqa: E402
from unbin.models.discrimination import auc, compared_score  # noqa: E402


def rank_auc(y: np.ndarray, score: np.ndarray) -> float:
    """The rank formula as ``auc`` computed it before (the reference)."""
    y = np.asarray(y, dtype=bool)
    n1, n0 = int(y.sum()), int((~y).sum())
    ranks = stats.rankdata(score)
    return float((ranks[y].sum() - n1 * (n1 + 1) / 2) / (n1 * n0))


def run(n: int, calls: int, seed: int) -> list[dict[str, Any]]:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 3))
    lp = x @ np.array([0.4, -0.2, 0.1]) - 1.9
    y = rng.random(n) < 1 / (1 + np.exp(-lp))
    out = []
    for kind, score in (("continuous", compared_score(lp)),
                        ("grouped", np.digitize(lp, [-2.5, -1.9, -1.3]).astype(float))):
        auc(y, score), rank_auc(y, score)  # loading, off the clock
        clock = {"count": 0.0, "rank": 0.0}
        same = True
        for _ in range(calls):
            t_new, new = timed(lambda s=score: auc(y, s), "cpu")
            t_old, old = timed(lambda s=score: rank_auc(y, s), "cpu")
            clock["count"] += t_new
            clock["rank"] += t_old
            same &= new == old
        out.append({"rows": n, "score": kind, "calls": calls,
                    "count_ms_per_call": 1e3 * clock["count"] / calls,
                    "rank_ms_per_call": 1e3 * clock["rank"] / calls,
                    "speedup": clock["rank"] / clock["count"], "identical": bool(same)})
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rows", type=int, nargs="+", default=[200_000, 1_000_000])
    ap.add_argument("--calls", type=int, default=10)
    ap.add_argument("--seed", type=int, default=20261205)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    rows = [r for n in args.rows for r in run(n, args.calls, args.seed)]
    if args.json:
        print(json.dumps(rows, indent=1))
        return
    print("| rows | score | counted ms | rank formula ms | speed-up | identical |")
    print("|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['rows']:,} | {r['score']} | {r['count_ms_per_call']:.1f} | "
              f"{r['rank_ms_per_call']:.1f} | {r['speedup']:.1f} | {r['identical']} |")


if __name__ == "__main__":
    main()
