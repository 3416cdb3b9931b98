"""Full-sample fits shared by the tables of one resampling job.

The resampling tables of an analysis (``confounding``, ``information_bootstrap``,
``decision_resampling``) each fit their designs on the analysis sample before their bootstrap,
and several designs recur between them: the legacy groups with legacy and with continuous
adjustment, the linear exposure with continuous adjustment. A linear, logistic or Poisson fit
is a function of the design alone (the sample's frame and exposure, the terms, the outcome),
so a design met again in the same job is not fitted again: :func:`job_fit` keeps each fit in
the outcome's cache (``Outcome.cache``, which lives as long as the job's ``Refit``) under its
terms, and returns the kept fit, bit for bit the one a new fit would give. Cox fits are
not kept here (their tables prepare their own layouts and starts). The kept fit has no
``linear_predictor`` (an n-vector the resampling tables do not read), so the cache holds
coefficients and covariances only.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from ..models import fit
from ..models.base import FitResult
from ..refit.analysis import Refit
from ..terms import Term

__all__ = ["job_fit"]

GLM_FAMILIES = frozenset({"binary", "count", "continuous"})
_CACHE = "job_glm_fits"


def job_fit(r: Refit, X: np.ndarray, names: tuple[str, ...], exposure: tuple[Term, ...],
            adjust: tuple[Term, ...]) -> FitResult:
    """``fit(r.family, X, r.outcome, names)`` for the design ``X`` of ``exposure`` and
    ``adjust`` on ``r``'s sample (``unbin.refit.analysis.design``), fitted once per job for
    the linear, logistic and Poisson families (module docstring)."""
    if r.family not in GLM_FAMILIES:
        return fit(r.family, X, r.outcome, names)
    store: dict[tuple[str, ...], FitResult] = r.outcome.cache.setdefault(_CACHE, {})
    key = (r.family, repr(tuple(exposure)), repr(tuple(adjust)))
    got = store.get(key)
    if got is None:
        got = store[key] = replace(fit(r.family, X, r.outcome, names), linear_predictor=None)
    return got
