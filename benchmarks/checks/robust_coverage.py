"""Coverage of unbin's robust and cluster-robust 95% intervals (``unbin.models.robust``), each
beside the model-based interval on the same data.

    python benchmarks/checks/robust_coverage.py --replicates 2000 --seed 1

Designs, each with a known true coefficient 0.4 of an exposure x:

- ``poisson_cluster``: 50 clinics x 10 patients, a clinic-level gamma frailty with mean 1 (the
  marginal rate is exactly exp(b0 + 0.4 x), so the Poisson working model is consistent), x half
  clinic-level; ``cluster`` = clinic.
- ``cox_recurrent``: 300 people followed for 1 to 3 years, recurrent events at a rate
  0.6 exp(0.4 x) times a gamma frailty with mean 1 (the marginal rates are proportional with
  log rate ratio 0.4; Lin, Wei, Yang & Ying 2000), one row per gap between events (delayed
  entry at the previous event); ``cluster`` = person.
- ``logistic_sampling``: a population of 4,000 from a logistic model; rows are sampled with a
  probability that depends on x and the outcome together (0.15 to 0.9), so the unweighted slope
  is biased; sampling weights 1 / probability.

Prints one JSON object: per design, the coverage of the robust interval and of the model-based
one, with the Monte-Carlo SE.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import special

from unbin.models import Outcome, fit

BETA = 0.4
Z = 1.959963984540054


def _poisson_cluster(rng: np.random.Generator) -> tuple[np.ndarray, Outcome]:
    g = np.repeat(np.arange(50), 10)
    frailty = rng.gamma(2.0, 0.5, 50)[g]
    x = rng.normal(size=50)[g] + rng.normal(size=g.size)
    pyears = rng.uniform(0.5, 2.0, g.size)
    y = rng.poisson(np.exp(-0.5 + BETA * x) * frailty * pyears).astype(float)
    return x[:, None], Outcome("count", y, offset=np.log(pyears), cluster=g)


def _cox_recurrent(rng: np.random.Generator) -> tuple[np.ndarray, Outcome]:
    n = 300
    x = rng.normal(size=n)
    frailty = rng.gamma(2.0, 0.5, n)
    follow = rng.uniform(1.0, 3.0, n)
    counts = rng.poisson(0.6 * np.exp(BETA * x) * frailty * follow)
    person, entry, time, event = [], [], [], []
    for i in range(n):
        times = np.sort(rng.uniform(0.0, follow[i], counts[i]))
        stops = np.append(times, follow[i])
        starts = np.append(0.0, times)
        person += [i] * stops.size
        entry += list(starts)
        time += list(stops)
        event += [1.0] * times.size + [0.0]
    rows = np.asarray(person)
    return x[rows][:, None], Outcome("survival", np.asarray(event), time=np.asarray(time),
                                     entry=np.asarray(entry), cluster=rows)


def _logistic_sampling(rng: np.random.Generator) -> tuple[np.ndarray, Outcome]:
    N = 4000
    x = rng.normal(size=N)
    y = (rng.random(N) < special.expit(-1.0 + BETA * x)).astype(float)
    prob = np.clip(special.expit(-1.0 + 1.5 * x * (2 * y - 1)), 0.15, 0.9)
    keep = rng.random(N) < prob
    return x[keep][:, None], Outcome("binary", y[keep], weights=1.0 / prob[keep],
                                     weight_kind="sampling")


DESIGNS = {"poisson_cluster": _poisson_cluster, "cox_recurrent": _cox_recurrent,
           "logistic_sampling": _logistic_sampling}


def run(replicates: int, seed: int) -> dict[str, Any]:
    rng = np.random.default_rng(seed)
    out: dict[str, Any] = {"truth": BETA, "replicates": replicates}
    for name, make in DESIGNS.items():
        robust = model = done = 0
        for _ in range(replicates):
            X, o = make(rng)
            res = fit(o.family, X, o, ("x",))
            if not res.ok:
                continue
            j = res.names.index("x")
            b = res.coef[j]
            done += 1
            robust += abs(b - BETA) <= Z * np.sqrt(res.cov[j, j])
            model += abs(b - BETA) <= Z * np.sqrt(res.extra["model_cov"][j, j])
        p, q = robust / max(done, 1), model / max(done, 1)
        out[name] = {"fits": done, "robust_coverage": p,
                     "robust_mc_se": float(np.sqrt(p * (1 - p) / max(done, 1))),
                     "model_coverage": q}
    return out


if __name__ == "__main__":
    from _command import command_line  # run as a script: this folder is on sys.path

    command_line(run, __doc__, replicates=2000, seed=1)
