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
        # weighted sums: a frequency weight counts a row that many times, a sampling weight
        # estimates the population's sums (the fit's own weights, as its estimates use them)
        w = np.ones_like(y) if outcome.weights is None else np.asarray(outcome.weights, float)
        fitted = res.linear_predictor + res.extra["intercept"]
        ss_res = float(w @ (y - fitted) ** 2)
        ss_tot = float(w @ (y - float(w @ y) / float(w.sum())) ** 2)
        res.extra["r2"] = 1.0 - ss_res / ss_tot if ss_tot > 0 else float("nan")
        rows = float(w.sum()) if outcome.weight_kind == "frequency" else float(outcome.n)
        scale = 1.0 if outcome.weight_kind == "frequency" else outcome.n / float(w.sum())
        res.extra["sigma"] = float(np.sqrt(ss_res * scale / max(rows - len(res.names), 1)))
    return res
