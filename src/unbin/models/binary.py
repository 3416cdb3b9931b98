"""Logistic regression (binomial, logit link) on numpy arrays, by unbin's Newton solver."""

from __future__ import annotations

import numpy as np

from ._glm import run_glm
from .base import FitResult, Outcome


def _separation(lp: np.ndarray) -> str:
    # Fitted probabilities that are numerically 0 or 1 mean (quasi-)complete separation. The
    # iteration stops once the log-likelihood changes by < 1e-12 of its size, which leaves a
    # diverging linear predictor near |lp| = 24 + log(rows involved): 20 catches it, and a
    # fitted risk of e^-20 (2e-9) is not a plausible real estimate.
    if np.any(np.abs(lp) > 20):
        return ("perfect or quasi-complete separation: some fitted probabilities are 0 or 1 "
                "(a group with no events or only events?); the estimates are infinite. "
                "Merge sparse groups, use a continuous form, or set design: {firth: true} in the "
                "analysis for Firth-penalised (finite) estimates.")
    return ""


def fit_binary(X: np.ndarray, outcome: Outcome, names: tuple[str, ...]) -> FitResult:
    if outcome.strata is not None:  # matched sets: conditional logistic regression
        from .matched import fit_matched

        return fit_matched(X, outcome, names)
    if outcome.penalty == "firth":
        from .firth import fit_firth_logistic

        return fit_firth_logistic(X, outcome, names)
    events = int(outcome.y.sum())
    return run_glm("binary", X, names, outcome, events, separation_check=_separation)
