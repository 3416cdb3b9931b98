"""Linear regression on numpy arrays (least squares by unbin's solver); the residual variance
counts as a parameter in AIC/BIC (maximum-likelihood log-likelihood)."""

from __future__ import annotations

import numpy as np

from ._glm import run_glm
from .base import FitResult, Outcome


def fit_continuous(X: np.ndarray, outcome: Outcome, names: tuple[str, ...]) -> FitResult:
    y = outcome.y.astype(float)
    res = run_glm("continuous", X, names, outcome, None, n_extra_params=1)
    if res.ok and res.linear_predictor is not None:
        fitted = res.linear_predictor + res.extra["intercept"]
        ss_res = float(np.sum((y - fitted) ** 2))
        ss_tot = float(np.sum((y - y.mean()) ** 2))
        res.extra["r2"] = 1.0 - ss_res / ss_tot if ss_tot > 0 else float("nan")
        res.extra["sigma"] = float(np.sqrt(ss_res / max(outcome.n - len(res.names), 1)))
    return res
