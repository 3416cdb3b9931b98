"""One fitter per outcome family behind one interface: ``fit(family, X, outcome, names)``."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from .base import FitResult, Outcome, failed_fit

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
    """Fit one model; numeric trouble is returned as a failed FitResult, never raised."""
    X = np.asarray(X, dtype=float).reshape(outcome.n, -1)
    if X.shape[1] != len(names):
        raise ValueError(f"design has {X.shape[1]} columns but {len(names)} names")
    return _fitter(family)(X, outcome, tuple(names))


__all__ = ["EFFECT_SCALE", "RATIO_FAMILIES", "FitResult", "Outcome", "failed_fit", "fit"]
