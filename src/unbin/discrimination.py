"""Discrimination of a fitted linear predictor: the C-index (AUC for binary outcomes, Harrell's C
for survival outcomes). Not defined here for count and continuous outcomes (NaN)."""

from __future__ import annotations

import numpy as np
from scipy import stats

from .models.base import Outcome


def auc(y: np.ndarray, score: np.ndarray) -> float:
    """Area under the ROC curve by the Mann–Whitney rank formula (ties count one half)."""
    y = np.asarray(y, dtype=bool)
    n1, n0 = int(y.sum()), int((~y).sum())
    if n1 == 0 or n0 == 0:
        return float("nan")
    ranks = stats.rankdata(score)
    return float((ranks[y].sum() - n1 * (n1 + 1) / 2) / (n1 * n0))


def c_index(outcome: Outcome, lp: np.ndarray | None) -> float:
    if lp is None:
        return float("nan")
    if outcome.family == "binary":
        return auc(outcome.y, lp)
    if outcome.family == "survival":
        from .cox import concordance

        assert outcome.time is not None
        return float(concordance(outcome.time, lp, outcome.y))
    return float("nan")
