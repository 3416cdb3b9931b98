"""Validity check: coverage of the confounding table's bootstrap intervals of the standardised
cumulative incidence under competing risks, against the exact value from known hazards.

    python benchmarks/checks/competing_confounding.py [--replicates 200] [--seed 1]
        [--n 400] [--bootstrap 100]

Design (invented): a confounder z ~ N(0, 1) and the exposure x = 0.5 z + sqrt(0.75) e, e ~
N(0, 1) (correlation 0.5). Two causes with known cause-specific hazards, drawn as independent
latent times (whose net hazards are then the cause-specific ones):

    cause 1 (of interest): Weibull, h1(t | x, z) = L1 K t^(K - 1) exp(B1 x + C1 z),
    cause 2 (competing):   exponential, h2(t | x, z) = L2 exp(B2 x + C2 z),

censoring uniform on (0.5, 4), horizon 2. Both causes' log hazards are linear in x and z, so the
continuously adjusted cause-specific Cox models (x linear, z a restricted cubic spline, which
holds the linear function) are correctly specified and their g-formula (``unbin.refit.
standardise.cif_risks``) estimates the population's standardised cumulative incidence

    R(v) = E_z[F1(h | v, z)],  F1(h | v, z) = int_0^h h1(s | v, z) exp(-H1(s | v, z) - H2(s | v, z)) ds,

computed here by numerical integration (scipy.integrate.quad in s, and in z against the normal
density) at the replicate's own contrast values (the table's ``x_value`` and ``x_reference``,
the 75th and 25th percentiles of x in the sample; the bootstrap holds them fixed). Each
replicate runs ``unbin.questions.confounding.confounding_table`` (z grouped in thirds as the
legacy adjustment) and checks whether the 95% bootstrap percentile interval of the continuous
estimate (``lower_continuous``..``upper_continuous``, linear exposure form, all grouped
variables; the (B + 1) 0.025-th and 0.975-th ordered replicates) holds R(x75) - R(x25) (risk difference) and log R(x75) - log R(x25) (risk ratio,
log scale). ``run`` returns each coverage with its Monte-Carlo SE and 99% band around 0.95,
the mean error of the estimate with its MC SE, and the ratio of the mean interval half-width to
1.96 x the empirical SD of the estimate (1 when the intervals are as wide as they should be).
The crude and grouped estimates target other quantities (confounded; residual confounding) and
are not scored.
"""

from __future__ import annotations

import sys
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import integrate, stats

from unbin.data import analysis_sample
from unbin.questions.confounding import confounding_table
from unbin.refit.analysis import bare_refit
from unbin.spec import parse_spec

N = 400
BOOTSTRAP = 100
HORIZON = 2.0
RHO = 0.5  # correlation of x and z
L1, K, B1, C1 = 0.15, 1.5, 0.4, 0.6  # cause 1: Weibull scale, shape, log HR of x and of z
L2, B2, C2 = 0.10, 0.2, 0.5  # cause 2: exponential rate, log HR of x and of z
CENSOR = (0.5, 4.0)


def draw(n: int, rng: np.random.Generator) -> pd.DataFrame:
    """One sample of the design (module docstring): x, z, time T, cause E (0 censored)."""
    z = rng.normal(size=n)
    x = RHO * z + np.sqrt(1 - RHO ** 2) * rng.normal(size=n)
    t1 = (rng.exponential(size=n) / (L1 * np.exp(B1 * x + C1 * z))) ** (1 / K)
    t2 = rng.exponential(size=n) / (L2 * np.exp(B2 * x + C2 * z))
    c = rng.uniform(*CENSOR, n)
    t = np.minimum(t1, t2)
    cause = np.where(c < t, 0, np.where(t1 <= t2, 1, 2))
    return pd.DataFrame({"x": x, "z": z, "T": np.minimum(t, c), "E": cause})


def _incidence_given(v: float, z: float, horizon: float) -> float:
    """F1(horizon | x = v, z) by quad over s."""
    r1, r2 = L1 * np.exp(B1 * v + C1 * z), L2 * np.exp(B2 * v + C2 * z)

    def density(s: float) -> float:
        return float(r1 * K * s ** (K - 1) * np.exp(-r1 * s ** K - r2 * s))

    return float(integrate.quad(density, 0.0, horizon, epsabs=1e-12, epsrel=1e-10)[0])


def true_risk(v: float, horizon: float = HORIZON) -> float:
    """R(v) = E_z[F1(horizon | v, z)], z ~ N(0, 1), by quad over z in (-9, 9)."""
    def integrand(z: float) -> float:
        return _incidence_given(v, z, horizon) * float(stats.norm.pdf(z))

    # |z| > 9 holds 2e-19 of the normal mass
    return float(integrate.quad(integrand, -9.0, 9.0, epsabs=1e-12, epsrel=1e-10)[0])


def table(seed: int, n: int = N, bootstrap: int = BOOTSTRAP) -> pd.DataFrame:
    """The confounding table of one seeded replicate."""
    frame = draw(n, np.random.default_rng(seed))
    raw = {"study": "competing_confounding", "cohorts": [{"name": "c", "path": "unused.csv"}],
           "groupings": {"x": {"quantiles": 3}, "z": {"quantiles": 3}},
           "analyses": [{"name": "a", "exposure": "x", "adjust": ["z"],
                         "outcome": {"type": "survival", "time": "T", "event": "E",
                                     "horizon": HORIZON, "event_of_interest": 1,
                                     "competing": [2]}}],
           "resampling": {"bootstrap": bootstrap}, "seed": seed}
    spec = parse_spec(raw, base=Path("."))
    an = spec.analysis("a")
    return confounding_table(bare_refit(analysis_sample(frame, an, spec), an, spec, "c"), spec)


def _row(tab: pd.DataFrame, scale: str) -> pd.Series:
    sel = tab[(tab["exposure_form"] == "linear") & (tab["scope"] == "all")
              & (tab["scale_kind"] == "marginal") & (tab["scale"] == scale)]
    return sel.iloc[0]


def replicate(seed: int, n: int = N, bootstrap: int = BOOTSTRAP) -> dict[str, float]:
    """One replicate's errors, coverage indicators and half-widths (risk difference: rd_*,
    log risk ratio: rr_*), and the true values."""
    tab = table(seed, n, bootstrap)
    rd, rr = _row(tab, "risk difference"), _row(tab, "risk ratio")
    r1, r0 = true_risk(float(rd["x_value"])), true_risk(float(rd["x_reference"]))
    out: dict[str, float] = {"true_rd": r1 - r0, "true_log_rr": float(np.log(r1 / r0)),
                             "bootstrap_ok": float(rd["bootstrap_ok"])}
    for key, row, truth in (("rd", rd, r1 - r0), ("rr", rr, float(np.log(r1 / r0)))):
        lo, hi, est = (float(row[c]) for c in ("lower_continuous", "upper_continuous",
                                               "estimate_continuous"))
        out[f"{key}_err"] = est - truth
        out[f"{key}_cover"] = float(lo <= truth <= hi)
        out[f"{key}_half"] = (hi - lo) / 2
    return out


def summarise(reps: list[dict[str, float]]) -> dict[str, Any]:
    """Coverage with its MC SE and 99% binomial band around 0.95, bias with its MC SE, and the
    half-width ratio (mean half-width / (1.96 x empirical SD of the estimate))."""
    m = len(reps)
    lo, hi = stats.binom.ppf([0.005, 0.995], m, 0.95) / m
    out: dict[str, Any] = {"band_99_around_0.95": [float(lo), float(hi)]}
    for key, name in (("rd", "risk difference"), ("rr", "log risk ratio")):
        cover = float(np.mean([r[f"{key}_cover"] for r in reps]))
        err = np.array([r[f"{key}_err"] for r in reps])
        sd = float(np.std(err, ddof=1))
        out[name] = {"coverage": cover, "mc_se": float(np.sqrt(cover * (1 - cover) / m)),
                     "mean_error": float(err.mean()), "mean_error_mc_se": sd / np.sqrt(m),
                     "empirical_sd": sd,
                     "half_width_ratio": float(np.mean([r[f"{key}_half"] for r in reps])
                                               / (1.96 * sd))}
    return out


def run(replicates: int, seed: int, n: int = N, bootstrap: int = BOOTSTRAP) -> dict[str, Any]:
    """Coverage of the continuous standardised cumulative-incidence intervals over
    ``replicates`` seeded simulations (module docstring)."""
    reps = [replicate(seed * 100_003 + i, n, bootstrap) for i in range(replicates)]
    return {"check": "confounding: bootstrap intervals of the standardised cumulative "
                     "incidence (competing risks) cover the true value (nominal 0.95)",
            "replicates": replicates, "seed": seed, "n": n, "bootstrap": bootstrap,
            "horizon": HORIZON,
            "mean_true_risk_difference": float(np.mean([r["true_rd"] for r in reps])),
            "min_bootstrap_ok": float(min(r["bootstrap_ok"] for r in reps)),
            **summarise(reps)}


if __name__ == "__main__":
    import argparse

    from _command import command_line  # run as a script: this folder is on sys.path

    ap = argparse.ArgumentParser(add_help=False)
    ap.add_argument("--n", type=int, default=N)
    ap.add_argument("--bootstrap", type=int, default=BOOTSTRAP)
    extra, rest = ap.parse_known_args()
    sys.argv = [sys.argv[0], *rest]
    command_line(partial(run, n=extra.n, bootstrap=extra.bootstrap), __doc__, replicates=200,
                 seed=1)
