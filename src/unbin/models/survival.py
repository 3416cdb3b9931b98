"""Cox proportional-hazards regression through unbin's own engine (``unbin.models.cox``): Efron ties,
strata and delayed entry. Coefficients have no intercept; ``loglik`` is the log partial
likelihood.

Every fit of one analysis has the same rows, times, events, entry, strata and weights (only X
differs), so the engine's sorted risk-set layout (``unbin.models.cox.prepare_layout``) is made at the
first fit and kept in ``outcome.cache`` for the others."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from ._glm import check_design
from .base import FitResult, Outcome, failed_fit

if TYPE_CHECKING:
    from .cox import Layout

_LAYOUT = "cox_layout"


def cox_layout(outcome: Outcome) -> Layout:
    """The Cox layout of this outcome's sample: prepared on first use, then kept in
    ``outcome.cache`` (invalid outcome arrays raise ``ValueError`` as ``fit_cox`` does)."""
    from .cox import prepare_layout

    layout: Layout | None = outcome.cache.get(_LAYOUT)
    if layout is None:
        assert outcome.time is not None
        layout = prepare_layout(outcome.time, outcome.y, entry=outcome.entry,
                                strata=outcome.strata, weights=outcome.weights)
        outcome.cache[_LAYOUT] = layout
    return layout


def fit_survival(X: np.ndarray, outcome: Outcome, names: tuple[str, ...]) -> FitResult:
    from .cox import fit_cox

    assert outcome.time is not None
    events = int(outcome.y.sum())
    n = outcome.n
    if events == 0:
        return failed_fit("survival", names, n, 0, "no events in the analysis sample; a Cox "
                          "model needs at least one event.")
    problem = check_design(X, names)
    if problem:
        return failed_fit("survival", names, n, events, problem)
    if outcome.penalty == "firth":
        from .firth_cox import fit_firth_cox

        return fit_firth_cox(X, outcome, names)
    fit = fit_cox(X, outcome.time, outcome.y, entry=outcome.entry, strata=outcome.strata,
                  weights=outcome.weights, ties="efron", layout=cox_layout(outcome))
    if not fit.converged:
        message = fit.message or "Cox fit did not converge."
        if "monotone likelihood" in message:
            message += ("; or set design: {firth: true} in the analysis for Firth-penalised "
                        "(finite) estimates")
        return failed_fit("survival", names, n, events, message)
    return FitResult(
        family="survival", names=names, coef=np.asarray(fit.coef), cov=np.asarray(fit.cov),
        loglik=float(fit.loglik), n=n, events=events, n_params=len(names), converged=True,
        iterations=int(fit.iterations), warnings=(fit.message,) if fit.message else (),
        linear_predictor=X @ np.asarray(fit.coef), extra={"loglik0": float(fit.loglik0)},
    )
