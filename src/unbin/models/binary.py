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
        if np.any(np.abs(lp) > 30):
            return ("perfect or quasi-complete separation: some fitted probabilities are 0 or 1 "
                    "(a group with no events or only events?); the estimates are infinite. "
                    "Merge sparse groups or use a continuous form.")
        return ""

    def fitter(Z: np.ndarray) -> Any:
        model = sm.GLM(y, Z, family=sm.families.Binomial(), freq_weights=outcome.weights)
        return model.fit(maxiter=100, tol=1e-10)

    return run_glm("binary", X, names, outcome.n, events, fitter, separation_check=separation)
