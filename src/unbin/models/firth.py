"""Logistic regression by Firth's penalised likelihood (Firth 1993; Heinze & Schemper 2002).

The penalised log-likelihood is ``l*(b) = l(b) + 1/2 log|I(b)|`` (Jeffreys' prior), whose
maximum is finite even when a legacy group has no events or only events (separation). On the
standardised design Z (intercept first, as in ``_glm``), with w = f mu (1 - mu) (f: frequency
weights) and h the diagonal of the hat matrix W^1/2 Z (Z'WZ)^-1 Z' W^1/2, the modified score is

    U*(b) = Z' (f (y - mu) + h (1/2 - mu)),

and Newton steps ``(Z'WZ)^-1 U*`` are taken, each halved while it lowers l* and capped at 5 on
the standardised scale. Convergence: no standardised coefficient moves by more than 1e-10.

What the result carries: the estimates are the penalised ones; ``cov`` is the inverse Fisher
information at them (Wald intervals; not profile-penalised-likelihood intervals); ``loglik`` is
the ordinary log-likelihood at the penalised estimate (so AIC compares forms on one footing:
the penalty depends on how the columns are scaled), and ``extra["penalised_loglik"]`` holds
l* on the original column scale. ``extra["penalty"] = "firth"`` marks the fit, and the tables'
``variance`` column says the fit is Firth-penalised.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from scipy import linalg

from ._glm import INTERCEPT, MAX_ITER, back_transform, check_design, standardise
from .base import FitResult, Outcome, failed_fit

_STEP_TOL = 1e-10
_MAX_STEP = 5.0
PENALTY = "firth"
LABEL = "Firth-penalised"


# (log-likelihood, penalised log-likelihood, score, information) at one parameter vector
Evaluation = tuple[float, float, np.ndarray, np.ndarray]


def improving_step(evaluate: Callable[[np.ndarray], Evaluation | None], at: np.ndarray,
                   step: np.ndarray, pll: float) -> tuple[np.ndarray, Evaluation] | None:
    """Halve ``step`` (at most 30 times) until the penalised log-likelihood at ``at + step`` is
    no lower than ``pll`` (to a relative 1e-10): the new point and the evaluation there, or
    None when no halving improves it (``evaluate`` returns None where it cannot evaluate)."""
    for _ in range(30):
        nxt = evaluate(at + step)
        if nxt is not None and nxt[1] >= pll - 1e-10 * abs(pll):
            return at + step, nxt
        step = step / 2.0
    return None


def halving_failed(what: str) -> str:
    """The message of a fit whose step halving found no improvement of the penalised ``what``."""
    return (f"step halving could not improve the penalised {what}; check the design for extreme "
            "values.")


def _finite(ev: Evaluation | None) -> Evaluation | None:
    return ev if ev is not None and np.isfinite(ev[1]) else None


def _evaluate(Z: np.ndarray, y: np.ndarray, freq: np.ndarray | None,
              theta: np.ndarray) -> Evaluation | None:
    """(log-likelihood, penalised log-likelihood on Z's scale, modified score, information),
    or None when the information is singular."""
    eta = Z @ theta
    e = np.exp(-np.abs(eta))
    inv = 1.0 / (1.0 + e)
    mu = np.where(eta >= 0, inv, e * inv)
    v = e * inv * inv
    terms = y * eta - (np.maximum(eta, 0.0) + np.log1p(e))
    f = np.ones_like(y) if freq is None else freq
    w = f * v
    H = (Z * w[:, None]).T @ Z
    try:
        factor = linalg.cho_factor(H)
    except (linalg.LinAlgError, ValueError):
        return None
    logdet = 2.0 * float(np.sum(np.log(np.diag(factor[0]))))
    # leverages: h_i = w_i z_i' H^-1 z_i
    h = w * np.einsum("ij,ij->i", Z, linalg.cho_solve(factor, Z.T).T)
    ll = float(f @ terms)
    score = Z.T @ (f * (y - mu) + h * (0.5 - mu))
    return ll, ll + 0.5 * logdet, score, H


def fit_firth_logistic(X: np.ndarray, outcome: Outcome, names: tuple[str, ...]) -> FitResult:
    """Firth-penalised logistic regression; failures are returned as a failed FitResult."""
    all_names = (INTERCEPT, *names)
    n = outcome.n
    y = np.asarray(outcome.y, dtype=float)
    freq = None if outcome.weights is None else np.asarray(outcome.weights, dtype=float)
    events = int(y.sum()) if freq is None else int(round(float(freq @ y)))
    Z, mean, sd = standardise(X)
    problem = check_design(X, names, Z)
    if problem:
        return failed_fit("binary", all_names, n, events, problem)
    theta = np.zeros(Z.shape[1])
    ybar = float(y.mean() if freq is None else (freq @ y) / freq.sum())
    theta[0] = np.log((ybar + 0.5 / n) / (1.0 - ybar + 0.5 / n))
    cur = _evaluate(Z, y, freq, theta)
    if cur is None:
        return failed_fit("binary", all_names, n, events,
                          "the information matrix is singular at the start; check the design.")
    for it in range(1, MAX_ITER + 1):
        ll, pll, score, H = cur
        step = linalg.solve(H, score, assume_a="pos")
        big = float(np.max(np.abs(step)))
        if big > _MAX_STEP:
            step *= _MAX_STEP / big
        if big <= _STEP_TOL:
            cov_s = linalg.inv(H)
            coef, cov = back_transform(theta, cov_s, mean, sd)
            return FitResult(
                family="binary", names=all_names, coef=coef, cov=cov, loglik=ll, n=n,
                events=events, n_params=len(all_names), converged=True, iterations=it,
                linear_predictor=X @ coef[1:],
                extra={"intercept": float(coef[0]), "penalty": PENALTY,
                       # l* on the original scale: log|I| gains 2 sum(log sd) from Z's scaling
                       "penalised_loglik": pll + float(np.sum(np.log(sd)))},
            )
        found = improving_step(lambda t: _finite(_evaluate(Z, y, freq, t)), theta, step, pll)
        if found is None:
            return failed_fit("binary", all_names, n, events, halving_failed("log-likelihood"))
        theta, cur = found
    return failed_fit("binary", all_names, n, events,
                      f"the Firth-penalised fit did not converge within {MAX_ITER} iterations.")
