"""Cox proportional-hazards regression through unbin's own engine (``unbin.cox``): Efron ties,
strata and delayed entry. Coefficients have no intercept; ``loglik`` is the log partial
likelihood."""

from __future__ import annotations

import numpy as np

from ._glm import check_design
from .base import FitResult, Outcome, failed_fit


def fit_survival(X: np.ndarray, outcome: Outcome, names: tuple[str, ...]) -> FitResult:
    from ..cox import fit_cox

    assert outcome.time is not None
    events = int(outcome.y.sum())
    n = outcome.n
    if events == 0:
        return failed_fit("survival", names, n, 0, "no events in the analysis sample; a Cox "
                          "model needs at least one event.")
    problem = check_design(X, names)
    if problem:
        return failed_fit("survival", names, n, events, problem)
    fit = fit_cox(X, outcome.time, outcome.y, entry=outcome.entry, strata=outcome.strata,
                  weights=outcome.weights, ties="efron")
    if not fit.converged:
        return failed_fit("survival", names, n, events,
                          fit.message or "Cox fit did not converge.")
    return FitResult(
        family="survival", names=names, coef=np.asarray(fit.coef), cov=np.asarray(fit.cov),
        loglik=float(fit.loglik), n=n, events=events, n_params=len(names), converged=True,
        iterations=int(fit.iterations), warnings=(fit.message,) if fit.message else (),
        linear_predictor=X @ np.asarray(fit.coef), extra={"loglik0": float(fit.loglik0)},
    )
