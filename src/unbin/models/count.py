"""Poisson regression with a log person-time offset on numpy arrays, by unbin's Newton solver."""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from ._glm import run_glm
from .base import FitResult, Outcome


def _zero_rate(eta: np.ndarray) -> str:
    # A group (or a region of a curve) with no counts at all has a rate ratio of 0: its log
    # runs to -inf and Newton stops where the log-likelihood no longer moves, near -25 or
    # below. A fitted rate e^20 (5e8) times below the typical row's is not a real estimate.
    if eta.size and float(np.min(eta)) < float(np.median(eta)) - 20:
        return ("some rows have a fitted rate of practically 0 (a group or range without any "
                "counts?); the rate ratio is 0 and its logarithm is -infinite. Merge sparse "
                "groups or use a continuous form.")
    return ""


def fit_count(X: np.ndarray, outcome: Outcome, names: tuple[str, ...]) -> FitResult:
    y = outcome.y.astype(float)
    res = run_glm("count", X, names, outcome, int(y.sum()), separation_check=_zero_rate)
    if res.ok:
        # Pearson dispersion: > 1 signals overdispersion (the Poisson SEs are then too small).
        eta = res.linear_predictor + res.extra["intercept"]
        mu = np.exp(eta + outcome.offset) if outcome.offset is not None else np.exp(eta)
        df_resid = max(outcome.n - len(res.names), 1)
        disp = float(np.sum((y - mu) ** 2 / mu) / df_resid)
        res.extra["dispersion"] = disp
        if disp > 1.5:
            res = replace(res, warnings=(*res.warnings, (
                f"Pearson dispersion {disp:.2f} > 1.5: the counts are overdispersed, so the "
                "Poisson standard errors are too small.")))
    return res
