"""Harrell's C of unbin (``unbin.models.cox.concordance``) against a brute-force pair count.

    python benchmarks/checks/concordance.py --replicates 200 --seed 1

Each replicate draws a random design: up to 400 rows, 1-4 strata, delayed entry for about half
the rows (entry times tied with event times included), few distinct times and scores (heavy
ties in both), and a share of events between 0.1 and 1. The brute force visits every pair: i an
event, j in i's stratum, at risk at t_i (entry_j < t_i) and outliving i (t_j > t_i, or
t_j = t_i censored); a higher score of i counts 1, a tied score 1/2. Prints one JSON object:
the largest absolute difference, the number of designs compared and of designs without a
comparable pair (where both must give NaN; a disagreement there is counted in ``nan_mismatch``).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from unbin.models.cox import concordance


def brute_force(t: np.ndarray, s: np.ndarray, e: np.ndarray, entry: np.ndarray,
                strata: np.ndarray) -> float:
    num = den = 0.0
    for i in np.flatnonzero(e):
        ok = (strata == strata[i]) & ((t > t[i]) | ((t == t[i]) & ~e)) & (entry < t[i])
        den += ok.sum()
        num += (s[ok] < s[i]).sum() + 0.5 * (s[ok] == s[i]).sum()
    return num / den if den else float("nan")


def design(rng: np.random.Generator) -> tuple[np.ndarray, ...]:
    n = int(rng.integers(2, 401))
    n_times = int(rng.integers(1, 40))
    t = rng.integers(1, n_times + 1, n).astype(float)
    e = rng.random(n) < rng.uniform(0.1, 1.0)
    s = rng.integers(0, int(rng.integers(1, 30)), n).astype(float)
    strata = rng.integers(0, int(rng.integers(1, 5)), n)
    late = rng.random(n) < 0.5
    entry = np.where(late, t - rng.integers(1, n_times + 1, n), -1.0)
    return t, s, e, entry, strata


def run(replicates: int, seed: int) -> dict[str, Any]:
    rng = np.random.default_rng(seed)
    worst = 0.0
    compared = undefined = nan_mismatch = 0
    for _ in range(replicates):
        t, s, e, entry, strata = design(rng)
        ref = brute_force(t, s, e, entry, strata)
        got = concordance(t, s, e, entry=entry, strata=strata)
        if np.isnan(ref) or np.isnan(got):
            undefined += 1
            nan_mismatch += int(np.isnan(ref) != np.isnan(got))
            continue
        compared += 1
        worst = max(worst, abs(got - ref))
    return {"check": "Harrell's C within strata and risk sets vs a brute-force pair count",
            "design": "2-400 rows, 1-4 strata, delayed entry for about half the rows, ties in "
                      "time, score and entry = event time",
            "truth": 0.0, "replicates": replicates, "seed": seed, "compared": compared,
            "undefined": undefined, "nan_mismatch": nan_mismatch,
            "max_abs_difference": worst}


if __name__ == "__main__":
    from _command import command_line  # run as a script: this folder is on sys.path

    command_line(run, __doc__, replicates=200, seed=1)
