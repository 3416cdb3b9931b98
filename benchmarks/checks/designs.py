"""Sparse groups and matched sets: coverage of the Firth-penalised Wald intervals
(``unbin.models.firth``, ``unbin.models.firth_cox``) and the size of the conditional
(matched-set) Wald test (``unbin.models.matched``).

    python benchmarks/checks/designs.py --replicates 2000 --seed 1

Designs, each with a known truth:

- ``firth_logistic``: n = 40, x ~ N(0, 1), logit P(y) = -0.5 + 1.0 x. Coverage of the 95%
  Wald interval at the penalised estimate, its mean bias, and ML's mean bias over the
  replicates where ML is finite (``ml_infinite`` counts the separated ones).
- ``firth_cox``: n = 40, hazard exp(1.0 x), exponential censoring (about 60% events);
  coverage and bias as above.
- ``matched_null``: 60 matched sets of one case and 1 to 4 controls, each set with its own
  level of x (the matching factor), the case chosen within its set independently of x
  (log odds ratio 0); rejection rate of the 5% Wald test.

Prints one JSON object: per design, the observed rate with its Monte-Carlo SE.
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np
from scipy import special, stats

from unbin.models import Outcome, fit

BETA = 1.0
Z = 1.959963984540054


def _rate(hits: int, total: int) -> dict[str, float]:
    p = hits / max(total, 1)
    return {"rate": p, "mc_se": float(np.sqrt(p * (1 - p) / max(total, 1)))}


def _firth_logistic(rng: np.random.Generator, replicates: int) -> dict[str, Any]:
    est, ml, cover = [], [], 0
    for _ in range(replicates):
        x = rng.normal(size=40)
        y = (rng.random(40) < special.expit(-0.5 + BETA * x)).astype(float)
        res = fit("binary", x[:, None], Outcome("binary", y, penalty="firth"), ("x",))
        est.append(res.coef[1])
        cover += abs(res.coef[1] - BETA) <= Z * res.se()[1]
        m = fit("binary", x[:, None], Outcome("binary", y), ("x",))
        if m.ok:
            ml.append(m.coef[1])
    return {"coverage": _rate(cover, replicates), "firth_bias": float(np.mean(est) - BETA),
            "ml_bias_where_finite": float(np.mean(ml) - BETA), "ml_infinite": replicates - len(ml)}


def _firth_cox(rng: np.random.Generator, replicates: int) -> dict[str, Any]:
    est, ml, cover = [], [], 0
    for _ in range(replicates):
        x = rng.normal(size=40)
        t = rng.exponential(1.0 / np.exp(BETA * x))
        c = rng.exponential(1.5, 40)
        o = Outcome("survival", (t <= c).astype(float), time=np.minimum(t, c))
        res = fit("survival", x[:, None], replace(o, penalty="firth"), ("x",))
        est.append(res.coef[0])
        cover += abs(res.coef[0] - BETA) <= Z * res.se()[0]
        m = fit("survival", x[:, None], o, ("x",))
        if m.ok:
            ml.append(m.coef[0])
    return {"coverage": _rate(cover, replicates), "firth_bias": float(np.mean(est) - BETA),
            "ml_bias_where_finite": float(np.mean(ml) - BETA), "ml_infinite": replicates - len(ml)}


def _matched_null(rng: np.random.Generator, replicates: int) -> dict[str, Any]:
    rejected = 0
    for _ in range(replicates):
        xs, ys, sets = [], [], []
        for s in range(60):
            m = 1 + int(rng.integers(1, 5))
            xs.append(rng.normal(rng.normal(), 1.0, m))
            y = np.zeros(m)
            y[rng.integers(m)] = 1.0
            ys.append(y)
            sets.append(np.full(m, s))
        res = fit("binary", np.concatenate(xs)[:, None],
                  Outcome("binary", np.concatenate(ys), strata=np.concatenate(sets)), ("x",))
        rejected += 2 * stats.norm.sf(abs(res.coef[0] / res.se()[0])) < 0.05
    return {"type_i_error": _rate(rejected, replicates), "nominal": 0.05}


def run(replicates: int, seed: int) -> dict[str, Any]:
    rng = np.random.default_rng(seed)
    return {"truth": BETA, "replicates": replicates,
            "firth_logistic": _firth_logistic(rng, replicates),
            "firth_cox": _firth_cox(rng, replicates),
            "matched_null": _matched_null(rng, replicates)}


if __name__ == "__main__":
    from _command import command_line  # run as a script: this folder is on sys.path

    command_line(run, __doc__, replicates=2000, seed=1)
