"""One fitter per outcome family behind one interface: ``fit(family, X, outcome, names)``."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from .base import FitResult, Outcome, failed_fit
from .robust import needs_robust, with_robust_variance

EFFECT_SCALE = {
    "binary": "odds ratio",
    "continuous": "mean difference",
    "count": "rate ratio",
    "survival": "hazard ratio",
}
RATIO_FAMILIES = frozenset({"binary", "count", "survival"})


def _fitter(family: str) -> Callable[[np.ndarray, Outcome, tuple[str, ...]], FitResult]:
    if family == "binary":
        from .binary import fit_binary

        return fit_binary
    if family == "continuous":
        from .continuous import fit_continuous

        return fit_continuous
    if family == "count":
        from .count import fit_count

        return fit_count
    if family == "survival":
        from .survival import fit_survival

        return fit_survival
    raise ValueError(f"unknown outcome family {family!r}; use binary, continuous, count or survival.")


def fit(family: str, X: np.ndarray, outcome: Outcome, names: tuple[str, ...]) -> FitResult:
    """Fit one model; numeric trouble is returned as a failed FitResult, never raised.

    With sampling weights or a cluster (``outcome.weight_kind``, ``outcome.cluster``) the
    covariance is the (cluster-)robust sandwich (unbin.models.robust); ``extra["variance"]``
    names the covariance the result carries."""
    X = np.asarray(X, dtype=float).reshape(outcome.n, -1)
    if X.shape[1] != len(names):
        raise ValueError(f"design has {X.shape[1]} columns but {len(names)} names")
    res = _fitter(family)(X, outcome, tuple(names))
    if res.ok and needs_robust(outcome):
        res = with_robust_variance(res, X, outcome)
    if res.ok and "variance" not in res.extra:
        res.extra["variance"] = "model"
    return _design_labelled(res)


def _design_labelled(res: FitResult) -> FitResult:
    """A penalised or conditional (matched-set) fit says so in its ``variance`` label."""
    if not res.ok:
        return res
    if res.extra.get("penalty") == "firth":
        from .firth import LABEL

        res.extra["variance"] = f"{res.extra['variance']}; {LABEL}"
    if res.extra.get("matched"):
        from .matched import LABEL as MATCHED

        res.extra["variance"] = f"{res.extra['variance']}; {MATCHED}"
    return res


__all__ = ["EFFECT_SCALE", "RATIO_FAMILIES", "FitResult", "Outcome", "failed_fit", "fit"]
