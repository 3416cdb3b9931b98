"""The log-likelihood of a model at given coefficients (not at its estimate): what Meng & Rubin's
(1992) D3 needs, the likelihood-ratio statistic of every imputed set re-evaluated at the
estimates pooled over the sets (unbin.refit.combine.d3).

The same likelihoods the fitters maximise, so that at a fit's own estimate ``loglik_at`` gives
its ``FitResult.loglik``:

- binary: sum f (y eta - log(1 + e^eta));
- count (Poisson): sum f (y eta - e^eta - log y!), eta with the log person-time offset;
- continuous: the normal likelihood with the residual variance profiled out, -N/2 (log(2 pi
  RSS(beta) / N) + 1) (the variance at its maximum given beta, as in the fit), so the statistic
  is a function of the regression coefficients alone;
- survival: the Cox log partial likelihood (Efron ties, strata, delayed entry, weights) through
  the engine's own layout and evaluation.

``f`` are frequency weights (1 without). Fits whose likelihood is something else (penalised,
conditional on matched sets, negative binomial, quasi-likelihood, sampling weights) have no
entry here: :func:`supports` says so, and their tests are combined by the Wald D1 instead.
"""

from __future__ import annotations

import numpy as np

from ._glm import INTERCEPT, poisson_constant
from .base import Outcome


def supports(outcome: Outcome) -> bool:
    """True when the outcome's fits maximise a plain likelihood that :func:`loglik_at` can
    evaluate: no penalty, no matched sets, Poisson counts, frequency weights only, no cluster."""
    if outcome.penalty != "none" or outcome.cluster is not None:
        return False
    if outcome.weights is not None and outcome.weight_kind != "frequency":
        return False
    if outcome.family == "binary":
        return outcome.strata is None
    if outcome.family == "count":
        return outcome.dispersion == "poisson"
    return outcome.family in ("continuous", "survival")  # competing events: cause-specific


def loglik_at(X: np.ndarray, outcome: Outcome, names: tuple[str, ...], coef: np.ndarray
              ) -> float:
    """The log-likelihood at ``coef`` of the model with design ``X`` (the columns without an
    intercept, as the fitters take them) and coefficient names ``names`` (a fit's
    ``FitResult.names``: the intercept first for the GLM families). Raises ValueError for an
    outcome :func:`supports` rejects."""
    if not supports(outcome):
        raise ValueError(f"no plain likelihood to evaluate for this {outcome.family} outcome")
    X = np.asarray(X, float).reshape(outcome.n, -1)
    b = np.asarray(coef, float)
    if outcome.family == "survival":
        return _cox(X, outcome, b)
    if not names or names[0] != INTERCEPT or len(names) != X.shape[1] + 1:
        raise ValueError("the GLM coefficients must be the intercept, then one per column of X")
    eta = b[0] + X @ b[1:]
    y = np.asarray(outcome.y, float)
    f = None if outcome.weights is None else np.asarray(outcome.weights, float)
    if outcome.family == "continuous":
        resid = y - eta
        big_n = float(y.size if f is None else f.sum())
        rss = float(resid @ resid if f is None else f @ (resid * resid))
        return float(-big_n / 2.0 * (np.log(2.0 * np.pi * rss / big_n) + 1.0))
    if outcome.family == "binary":
        terms = y * eta - (np.maximum(eta, 0.0) + np.log1p(np.exp(-np.abs(eta))))
        return float(terms.sum() if f is None else f @ terms)
    if outcome.offset is not None:
        eta = eta + outcome.offset
    const = outcome.cache.get("poisson_constant")
    if const is None:
        const = outcome.cache["poisson_constant"] = poisson_constant(y, f)
    terms = y * eta - np.exp(np.minimum(eta, 700.0))
    return float(const + (terms.sum() if f is None else f @ terms))


def _cox(X: np.ndarray, outcome: Outcome, beta: np.ndarray) -> float:
    """The Cox log partial likelihood at ``beta`` (Efron ties), on the outcome's cached layout."""
    from .cox.layout import _given_layout
    from .cox.likelihood import _evaluate, _standardised
    from .survival import cox_layout

    if beta.shape != (X.shape[1],):
        raise ValueError(f"{beta.size} coefficients for a design of {X.shape[1]} columns")
    layout = _given_layout(cox_layout(outcome), X.shape[0])
    D, scale, _ = _standardised(np.ascontiguousarray(X), layout)
    # the engine works on standardised columns; beta * scale is the same linear predictor
    # (centring does not change the partial likelihood)
    return float(_evaluate(layout, D, beta * scale, True, 0)[0])
