"""The Fine–Gray model (``unbin.models.competing``): bias and coverage of its 95% intervals,
and type-I error, in a seeded simulation with a known subdistribution hazard ratio.

    python benchmarks/checks/fine_gray.py --replicates 1000 --seed 1
    python benchmarks/checks/fine_gray.py --replicates 500 --seed 1 --bootstrap 100 --delayed-only
    python benchmarks/checks/fine_gray.py --mean-error-by-n 300 1200 4800 --beta 0.5

Design (Fine & Gray 1999, sec. 5; the construction of Beyersmann et al. 2009): 300 people,
x standard normal; the cumulative incidence of cause 1 is
F1(t | x) = 1 - [1 - 0.3 (1 - exp(-t))]^exp(beta x) (log subdistribution hazard ratio beta);
cause 2 otherwise, exponential with rate exp(0.5 x); censoring uniform on (0, 3). beta = 0
(type-I error of the Wald test) and beta = 0.5, each with and without delayed entry (uniform
on (0, 1.5); people whose exit falls before entry are never seen).

Prints one JSON object: per design, the mean estimate, the coverage of the cluster-robust
interval with its Monte-Carlo SE, and that of the model-based one; with ``--bootstrap B``, also
that of the Wald interval with the bootstrap covariance (``fit_fine_gray(..., bootstrap=B)``:
persons resampled, censoring and entry weights re-estimated in each resample).

With ``--mean-error-by-n N ...`` it prints instead, per sample size under delayed entry, the
mean error of the coefficient (with its Monte-Carlo SE) fitted with the estimated censoring and
entry weights (the fit unbin makes) and, on the same replicates, with the design's true ones,
``G(t-) H(t) = (1 - t/3) min(t/1.5, 1)`` (:func:`mean_error_by_n`): whether a mean error is the
weights' estimation (it would vanish with the true weights) or the estimator's own finite-sample
behaviour (it shrinks with n either way).
"""

from __future__ import annotations

import argparse
import json
from typing import Any

import numpy as np

from unbin.models import Outcome
from unbin.models import fine_gray as engine
from unbin.models.competing import fine_gray_layout, fit_fine_gray

Z = 1.959963984540054
N = 300


def draw(n: int, beta: float, rng: np.random.Generator, delayed: bool,
         p: float = 0.3) -> np.ndarray:
    """Fine & Gray's (1999, sec. 5) design, as in Beyersmann et al. (2009): the cumulative
    incidence of cause 1 is F1(t|x) = 1 - [1 - p(1 - exp(-t))]^exp(beta x), a proportional
    subdistribution hazard with log ratio beta; cause 2 (probability 1 - F1(inf|x)) follows an
    exponential with rate exp(0.5 x). Censoring uniform on (0, 3); optionally delayed entry
    uniform on (0, 1.5) (people whose event or censoring falls before entry are never seen).
    Columns: x, observed time, cause (0 censored), entry."""
    rows: list[np.ndarray] = []
    while sum(r.shape[0] for r in rows) < n:
        x = rng.normal(size=n)
        f1_inf = 1 - (1 - p) ** np.exp(beta * x)
        is1 = rng.random(n) < f1_inf
        u = rng.random(n)
        t1 = -np.log(1 - (1 - (1 - u * f1_inf) ** np.exp(-beta * x)) / p)
        t2 = rng.exponential(1 / np.exp(0.5 * x))
        T = np.where(is1, t1, t2)
        C = rng.uniform(0, 3, n)
        L = rng.uniform(0, 1.5, n) if delayed else np.zeros(n)
        obs = np.minimum(T, C)
        cause = np.where(T <= C, np.where(is1, 1, 2), 0)
        rows.append(np.column_stack([x, obs, cause, L])[obs > L])
    return np.vstack(rows)[:n]


def simulate(n: int, beta: float, rng: np.random.Generator, delayed: bool,
             p: float = 0.3) -> tuple[np.ndarray, Outcome, np.ndarray]:
    a = draw(n, beta, rng, delayed, p)
    o = Outcome("survival", (a[:, 2] == 1).astype(float), time=a[:, 1],
                entry=a[:, 3] if delayed else None)
    return a[:, :1], o, a[:, 2]


def true_weight(at: np.ndarray) -> np.ndarray:
    """The design's ``G(t-) H(t)`` under delayed entry: P(censoring >= t) = 1 - t/3 on (0, 3)
    times P(entry < t) = min(t/1.5, 1)."""
    a = np.asarray(at, dtype=float)
    return np.clip(1 - a / 3, 0.0, 1.0) * np.clip(a / 1.5, 0.0, 1.0)


def mean_error_by_n(replicates: int, seed: int, sizes: tuple[int, ...], beta: float,
                    delayed: bool = True) -> dict[str, Any]:
    """Per sample size, the coefficient's mean error over ``replicates`` seeded samples (the
    seed plus the size seeds each size), fitted with the estimated weights and, on the same
    samples, with the true ones (:func:`true_weight`; without delayed entry ``1 - t/3``)."""
    out: dict[str, Any] = {"beta": beta, "delayed": delayed, "replicates": replicates,
                           "seed": seed}

    def Q(at: np.ndarray) -> np.ndarray:
        a = np.asarray(at, dtype=float)
        return true_weight(a) if delayed else np.clip(1 - a / 3, 0.0, 1.0)

    for n in sizes:
        rng = np.random.default_rng([seed, n])
        est, true = [], []
        for _ in range(replicates):
            X, o, cause = simulate(n, beta, rng, delayed)
            assert o.time is not None
            est.append(engine.fit(fine_gray_layout(o, cause, 1), X).coef[0])
            layout = engine.prepare(o.time, cause, 1, entry=o.entry, weights=None, strata=None,
                                    Q_at=Q)
            true.append(engine.fit(layout, X).coef[0])
        row: dict[str, Any] = {}
        for key, values in (("estimated weights", est), ("true weights", true)):
            v = np.asarray(values, dtype=float)
            row[key] = {"mean_error": float(v.mean() - beta),
                        "mc_se": float(v.std(ddof=1) / np.sqrt(v.size)),
                        "empirical_sd": float(v.std(ddof=1))}
        out[f"n={n}"] = row
    return out


def run(replicates: int, seed: int, bootstrap: int = 0, delayed_only: bool = False,
        betas: tuple[float, ...] = (0.0, 0.5)) -> dict[str, Any]:
    rng = np.random.default_rng(seed)
    out: dict[str, Any] = {"n": N, "replicates": replicates, "bootstrap": bootstrap}
    for beta in betas:
        for delayed in (True,) if delayed_only else (False, True):
            est, robust, model, boot = [], 0, 0, 0
            for i in range(replicates):
                X, o, cause = simulate(N, beta, rng, delayed)
                res = fit_fine_gray(X, o, cause, 1, ("x",), bootstrap=bootstrap, seed=i)
                if not res.ok:
                    continue
                b = float(res.coef[0])
                est.append(b)
                sandwich = res.extra.get("robust_cov", res.cov)
                robust += abs(b - beta) <= Z * float(np.sqrt(sandwich[0, 0]))
                model += abs(b - beta) <= Z * float(np.sqrt(res.extra["model_cov"][0, 0]))
                if bootstrap:
                    boot += abs(b - beta) <= Z * float(np.sqrt(res.cov[0, 0]))
            done = max(len(est), 1)
            cover = robust / done
            row = {"fits": len(est), "mean_estimate": float(np.mean(est)),
                   "empirical_sd": float(np.std(est, ddof=1)),
                   "robust_coverage": cover,
                   "robust_mc_se": float(np.sqrt(cover * (1 - cover) / done)),
                   "model_coverage": model / done}
            if bootstrap:
                bc = boot / done
                row.update(bootstrap_coverage=bc,
                           bootstrap_mc_se=float(np.sqrt(bc * (1 - bc) / done)))
            out[f"beta={beta:g}{', delayed entry' if delayed else ''}"] = row
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--replicates", type=int, default=1000)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--bootstrap", type=int, default=0,
                    help="bootstrap resamples per fit (0: the sandwich only)")
    ap.add_argument("--delayed-only", action="store_true",
                    help="only the designs with delayed entry")
    ap.add_argument("--beta", type=float, action="append",
                    help="a true log SHR to simulate (repeatable; default 0 and 0.5)")
    ap.add_argument("--mean-error-by-n", type=int, nargs="+", metavar="N",
                    help="instead: the mean error with estimated and with true weights at these "
                         "sample sizes, delayed entry (module docstring)")
    args = ap.parse_args()
    betas = tuple(args.beta) if args.beta else (0.0, 0.5)
    if args.mean_error_by_n:
        print(json.dumps([mean_error_by_n(args.replicates, args.seed, tuple(args.mean_error_by_n),
                                          b) for b in betas], indent=2))
        return
    print(json.dumps(run(args.replicates, args.seed, args.bootstrap, args.delayed_only, betas),
                     indent=2))


if __name__ == "__main__":
    main()
