"""Logistic regression (statsmodels GLM, binomial, logit link) on numpy arrays."""

from __future__ import annotations

from typing import Any

import numpy as np

from ._glm import run_glm
from .base import FitResult, Outcome


def fit_binary(X: np.ndarray, outcome: Outcome, names: tuple[str, ...]) -> FitResult:
    import statsmodels.api as sm

    y = outcome.y.astype(float)
    events = int(y.sum())

    def separation(lp: np.ndarray) -> str:
        # Fitted probabilities that are numerically 0 or 1 mean (quasi-)complete separation.
        # IRLS stops once the deviance changes by < 1e-10, which leaves a diverging linear
        # predictor near |lp| = 24 + log(rows involved): 20 catches it, and a fitted risk of
        # e^-20 (2e-9) is not a plausible real estimate.
        if np.any(np.abs(lp) > 20):
            return ("perfect or quasi-complete separation: some fitted probabilities are 0 or 1 "
                    "(a group with no events or only events?); the estimates are infinite. "
                    "Merge sparse groups or use a continuous form.")
        return ""

    def fitter(Z: np.ndarray) -> Any:
        model = sm.GLM(y, Z, family=sm.families.Binomial(), freq_weights=outcome.weights)
        # rtol: at registry scale the deviance (~1e6) wobbles by a few units in the last place
        # between iterations, more than an absolute 1e-10; without a relative tolerance a
        # fit that has converged runs to maxiter and is reported as not converged.
        return model.fit(maxiter=100, tol=1e-10, rtol=1e-13)

    return run_glm("binary", X, names, outcome.n, events, fitter, separation_check=separation)
