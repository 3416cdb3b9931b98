"""Conditional logistic regression for matched sets, through unbin's Cox engine.

With every row given the same time, an event indicator for the case(s) and the matched set as
the stratum, the Cox partial likelihood with Breslow's handling of ties is, set by set,

    prod_s exp(x_case' b) / sum_{j in set s} exp(x_j' b),

the conditional likelihood of 1:M matching exactly (one case per set: no tied events). A
set with several cases gets Breslow's approximation of the conditional likelihood (the
result carries a warning). Sets with no case or no control carry no
information and drop out of the likelihood. There is no intercept: absolute risks cannot be
computed from the fit.
"""

from __future__ import annotations

import numpy as np

from ._glm import check_design
from .base import FitResult, Outcome, failed_fit

_LAYOUT = "matched_layout"
LABEL = "conditional on the matched set"


def fit_matched(X: np.ndarray, outcome: Outcome, names: tuple[str, ...]) -> FitResult:
    from .cox import fit_cox, prepare_layout

    assert outcome.strata is not None
    y = np.asarray(outcome.y, dtype=float)
    n, events = outcome.n, int(y.sum())
    if events == 0:
        return failed_fit("binary", names, n, 0, "no cases in the analysis sample.")
    problem = check_design(X, names)
    if problem:
        return failed_fit("binary", names, n, events, problem)
    layout = outcome.cache.get(_LAYOUT)
    if layout is None:
        layout = outcome.cache[_LAYOUT] = prepare_layout(
            np.ones(n), y, strata=outcome.strata, weights=outcome.weights)
    fit = fit_cox(X, np.ones(n), y, strata=outcome.strata, weights=outcome.weights,
                  ties="breslow", layout=layout)
    if not fit.converged:
        return failed_fit("binary", names, n, events,
                          fit.message or "the conditional logistic fit did not converge.")
    warnings: list[str] = [fit.message] if fit.message else []
    per_set = np.bincount(np.asarray(outcome.strata), weights=y)
    if np.any(per_set > 1):
        warnings.append(f"{int(np.sum(per_set > 1))} matched sets hold more than one case: their "
                        "conditional likelihood is Breslow's approximation.")
    return FitResult(
        family="binary", names=names, coef=np.asarray(fit.coef), cov=np.asarray(fit.cov),
        loglik=float(fit.loglik), n=n, events=events, n_params=len(names), converged=True,
        iterations=int(fit.iterations), warnings=tuple(warnings),
        linear_predictor=X @ np.asarray(fit.coef),
        extra={"loglik0": float(fit.loglik0), "matched": True, "ties": "breslow"},
    )
