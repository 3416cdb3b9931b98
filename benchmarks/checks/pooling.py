"""Coverage of random-effects intervals with few cohorts: DerSimonian–Laird with a normal
interval against Paule–Mandel / REML tau² with the Hartung–Knapp–Sidik–Jonkman interval, and
the prediction interval.

    python benchmarks/checks/pooling.py                      # 4000 replicates, JSON
    python benchmarks/checks/pooling.py --replicates 20000 --seed 7

Each replicate is one invented meta-analysis of k cohorts (k = 3 and 5): cohort i has a
within-cohort variance v_i drawn uniformly from [0.01, 0.09] (cohorts of unequal size) and an
estimate y_i ~ N(mu + u_i, v_i) with u_i ~ N(0, tau²), tau² = 0.04 (I² around 60%), mu = 0.
An interval covers when it holds mu; the prediction interval covers when it holds the effect
of a new cohort, mu + u_new. Coverage is reported with its Monte-Carlo standard error
sqrt(c (1 - c) / replicates). Replicates are pooled column-wise by ``pool_pointwise``, the
same code path as the pooled curves.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from unbin.consortium.meta_analysis import pool_pointwise

TAU2 = 0.04
V_RANGE = (0.01, 0.09)


def _coverage(hit: np.ndarray) -> dict[str, float]:
    c = float(np.mean(hit))
    return {"coverage": c, "mc_se": float(np.sqrt(c * (1.0 - c) / hit.size))}


def simulate(k: int, replicates: int, rng: np.random.Generator, tau2: float = TAU2,
             v_range: tuple[float, float] = V_RANGE) -> dict[str, Any]:
    """Coverage of each interval for one k (95% nominal)."""
    v = rng.uniform(v_range[0], v_range[1], (k, replicates))
    u = rng.normal(0.0, np.sqrt(tau2), (k, replicates))
    y = u + rng.normal(0.0, np.sqrt(v))
    new = rng.normal(0.0, np.sqrt(tau2), replicates)
    out: dict[str, Any] = {"k": k, "tau2": tau2, "replicates": replicates}
    dl = pool_pointwise(y, v, tau2_method="dl")
    out["dl_normal"] = _coverage((dl.re_lower <= 0.0) & (dl.re_upper >= 0.0))
    out["dl_hksj"] = _coverage((dl.hksj_lower <= 0.0) & (dl.hksj_upper >= 0.0))
    for method in ("pm", "reml"):
        res = pool_pointwise(y, v, tau2_method=method)
        out[f"{method}_hksj"] = _coverage((res.hksj_lower <= 0.0) & (res.hksj_upper >= 0.0))
        out[f"{method}_prediction"] = _coverage((res.pi_lower <= new) & (res.pi_upper >= new))
    return out


def run(replicates: int, seed: int) -> dict[str, Any]:
    """Coverage at k = 3 and k = 5 (one seeded stream; the same numbers on every machine)."""
    rng = np.random.default_rng(seed)
    return {"nominal": 0.95, "seed": seed,
            "results": [simulate(k, replicates, rng) for k in (3, 5)]}


if __name__ == "__main__":
    from _command import command_line  # run as a script: this folder is on sys.path

    command_line(run, __doc__, replicates=4000, seed=20260)
