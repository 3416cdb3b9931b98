"""Type-I error of the adjusted cut search (``unbin.questions.cutpoints.SplitSearch`` with adjusters)
under a null with a confounder.

    python benchmarks/checks/cut_search_adjusted.py --replicates 1000 --seed 1

Design: n = 200, a confounder z ~ N(0, 1), the exposure x = 0.7 z + sqrt(1 - 0.49) e (all
distinct: about 160 candidate cuts in the 10-90% range, close to the continuous search the
corrections assume; with fewer candidates they are conservative), and an outcome that depends
on z only:
linear (y = z + N(0, 1)), logistic (logit P = -0.5 + z) and Cox (hazard exp(0.7 z),
exponential censoring, about half the rows with events). Truth: no association of x with the
outcome given z, so a 5% test should reject 5% of the time. Reported per family: the rejection
rates of the naive p of the maximally selected adjusted score statistic, of its Miller &
Siegmund / Lausen & Schumacher and Altman et al. corrections, of its simulated p (199 draws
from the adjusted score process's asymptotic null), and of the unadjusted search's
Lausen-corrected p (confounded), each with its Monte-Carlo standard error.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import stats

from unbin.models.base import Outcome
from unbin.questions.cutpoints import SplitSearch, p_altman, p_lausen

FAMILIES = ("continuous", "binary", "survival")


def _outcome(rng: np.random.Generator, family: str, z: np.ndarray) -> Outcome:
    n = z.size
    if family == "continuous":
        return Outcome("continuous", z + rng.normal(size=n))
    if family == "binary":
        return Outcome("binary", (rng.random(n) < 1 / (1 + np.exp(0.5 - z))).astype(float))
    T = rng.exponential(1 / np.exp(0.7 * z))
    C = rng.exponential(1.0, n)
    return Outcome("survival", (T <= C).astype(float), time=np.minimum(T, C))


def _max(search: SplitSearch) -> float:
    prof = search.profile()
    return float(np.nanmax(prof)) if np.isfinite(prof).any() else 0.0


def _p(search: SplitSearch) -> float:
    return float(stats.chi2.sf(_max(search), 1))


def run(replicates: int, seed: int, n: int = 200, rho: float = 0.7) -> dict[str, Any]:
    out: dict[str, Any] = {
        "check": "type-I error of the adjusted maximally selected split statistic",
        "design": f"n={n}, exposure correlated {rho} with a confounder, outcome on the "
                  "confounder only; 10-90% search",
        "truth": 0.05, "replicates": replicates, "seed": seed}
    for i, family in enumerate(FAMILIES):
        rng = np.random.default_rng([seed, i])
        hits = {"naive": 0, "lausen": 0, "altman": 0, "simulated": 0, "unadjusted_lausen": 0}
        for _ in range(replicates):
            z = rng.normal(size=n)
            x = rho * z + np.sqrt(1 - rho**2) * rng.normal(size=n)
            outcome = _outcome(rng, family, z)
            search = SplitSearch.build(family, x, outcome, adjust=(z[:, None], ("z",)))
            m = _max(search)
            p = float(stats.chi2.sf(m, 1))
            assert search.adjusted is not None
            sim = search.adjusted.simulate_max(search.k, rng, 199)
            hits["simulated"] += (1 + np.sum(sim >= m * (1 - 1e-10))) / 200 < 0.05
            hits["naive"] += p < 0.05
            hits["lausen"] += p_lausen(p) < 0.05
            hits["altman"] += p_altman(p) < 0.05
            hits["unadjusted_lausen"] += p_lausen(_p(SplitSearch.build(family, x, outcome))) < 0.05
        out[family] = {k: {"rate": v / replicates,
                           "mc_se": float(np.sqrt(0.05 * 0.95 / replicates))}
                       for k, v in hits.items()}
    return out


if __name__ == "__main__":
    from _command import command_line  # run as a script: this folder is on sys.path

    command_line(run, __doc__, replicates=1000, seed=1)
