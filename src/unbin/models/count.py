"""Poisson regression with a log person-time offset (statsmodels GLM) on numpy arrays."""

from __future__ import annotations

from typing import Any

import numpy as np

from ._glm import run_glm
from .base import FitResult, Outcome


def fit_count(X: np.ndarray, outcome: Outcome, names: tuple[str, ...]) -> FitResult:
    import statsmodels.api as sm

    y = outcome.y.astype(float)

    def fitter(Z: np.ndarray) -> Any:
        model = sm.GLM(y, Z, family=sm.families.Poisson(), offset=outcome.offset,
                       freq_weights=outcome.weights)
        # rtol: at registry scale the deviance (~1e6) wobbles by a few units in the last place
        # between iterations, more than an absolute 1e-10; without a relative tolerance a
        # fit that has converged runs to maxiter and is reported as not converged.
        return model.fit(maxiter=100, tol=1e-10, rtol=1e-13)

    res = run_glm("count", X, names, outcome.n, int(y.sum()), fitter)
    if res.ok:
        # Pearson dispersion: > 1 signals overdispersion (the Poisson SEs are then too small).
        mu = np.exp(res.linear_predictor + res.extra["intercept"] + outcome.offset) \
            if outcome.offset is not None else np.exp(res.linear_predictor + res.extra["intercept"])
        df_resid = max(outcome.n - len(res.names), 1)
        disp = float(np.sum((y - mu) ** 2 / mu) / df_resid)
        res.extra["dispersion"] = disp
        if disp > 1.5:
            res = _with_warning(res, f"Pearson dispersion {disp:.2f} > 1.5: the counts are "
                                     "overdispersed, so the Poisson standard errors are too small.")
    return res


def _with_warning(res: FitResult, msg: str) -> FitResult:
    from dataclasses import replace

    return replace(res, warnings=(*res.warnings, msg))
