"""Bootstrap refits by the analysis' own fitter, for models the vectorised replicate solvers do
not cover.

The resampling questions refit linear, logistic and Poisson models on many replicates at once
(``unbin.models.weighted.WeightedGLM``: Newton on frequency weights). A negative binomial (NB2)
count analysis (``outcome.count_model: negative-binomial``) is not a Poisson model: its
estimates weight the rows by 1 / (mu + alpha mu^2) and alpha is estimated with them, so a
Poisson refit of a replicate estimates a different quantity than the full-sample NB2 fit it is
compared with (the share of information kept, the confounding share). Those replicates are
refitted here instead, one at a time, by ``unbin.models.fit`` on the replicate's drawn data set
(``unbin.models.weighted.replicate_rows``: each row repeated as often as drawn, or with the
drawn count as its frequency weight; a cluster drawn k times counts as k clusters), so a
replicate's estimate is the same estimator as the full sample's (Efron & Tibshirani 1993,
ch. 6: the bootstrap replicates the whole estimation procedure).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from .base import FitResult, Outcome
from .weighted import Replicates, Weights, as_replicates, replicate_clusters, replicate_rows


def needs_own_fitter(outcome: Outcome) -> bool:
    """Whether the bootstrap replicates of this outcome's models must be refitted by the
    analysis' own fitter (here) instead of the vectorised Poisson/logistic/linear solver."""
    return outcome.family == "count" and outcome.dispersion == "negative-binomial"


def drawn_outcome(outcome: Outcome, w_row: np.ndarray) -> tuple[np.ndarray, Outcome]:
    """One replicate's drawn data set: its rows ``m`` of the full sample and its outcome (the
    weights, offsets and clusters of those rows; an empty cache)."""
    m, w = replicate_rows(outcome, np.asarray(w_row, dtype=float))

    def pick(v: np.ndarray | None) -> np.ndarray | None:
        return None if v is None else np.asarray(v)[m]

    return m, replace(outcome, y=np.asarray(outcome.y)[m], offset=pick(outcome.offset),
                      time=pick(outcome.time), entry=pick(outcome.entry),
                      strata=pick(outcome.strata), weights=w,
                      cluster=replicate_clusters(outcome, m), cause=pick(outcome.cause),
                      cache={})


def drawn_fits(X: list[np.ndarray], outcome: Outcome, W: Weights) -> list[list[FitResult]]:
    """Each design of ``X`` refitted on each replicate of refit weights ``W`` (replicates, n;
    float64 or compact :class:`~unbin.models.weighted.Replicates`) by ``unbin.models.fit``:
    ``[replicate][design]``. A failed refit is a failed :class:`FitResult` (``ok`` False)."""
    from . import fit

    R: Replicates = as_replicates(W)
    designs = [np.asarray(x, dtype=float).reshape(outcome.n, -1) for x in X]
    names = [tuple(f"x{j}" for j in range(x.shape[1])) for x in designs]
    out: list[list[FitResult]] = []
    for b in range(len(R)):
        m, drawn = drawn_outcome(outcome, R.row(b))
        out.append([fit(outcome.family, x[m], drawn, nm)
                    for x, nm in zip(designs, names, strict=True)])
    return out


def coefficients(fits: list[FitResult], p: int) -> np.ndarray:
    """The refits' coefficients (intercept first), one row per fit; NaN where a fit failed."""
    out = np.full((len(fits), p + 1), np.nan)
    for b, f in enumerate(fits):
        if f.ok and np.all(np.isfinite(f.coef)):
            out[b] = f.coef
    return out
