"""What a binary outcome's sampling design (the analysis' ``design`` block) allows, and the
prior correction of the intercept for case-control extracts.

Matched sets are fitted conditionally (``unbin.models.matched``): there is no intercept, so
no absolute risk, implied threshold or net benefit. A case-control extract estimates odds
ratios correctly, but its intercept reflects the sampled case fraction, not the population's;
with the population prevalence ``tau`` the intercept is corrected by the prior correction
(King & Zeng 2001, eq. 8; the same shift as Rothman's case-control odds adjustment):

    intercept* = intercept - log[ ((1 - tau) / tau) * (ybar / (1 - ybar)) ],

``ybar`` the (frequency-weighted) case fraction of the analysis sample.
"""

from __future__ import annotations

import numpy as np

from ..models.base import Outcome
from ..spec import Analysis

MATCHED = ("matched sets are fitted conditionally on the set (conditional logistic "
           "regression), which has no intercept: absolute risks cannot be computed")
NO_PREVALENCE = ("a case-control extract's case fraction is set by its sampling: absolute "
                 "risks need the population's outcome frequency; give design.prevalence")


def absolute_risk_reason(a: Analysis) -> str:
    """Why the analysis cannot give absolute risks ('' when it can)."""
    if a.family != "binary":
        return ""
    if a.design.matched_set:
        return MATCHED
    if a.design.case_control and a.design.prevalence is None:
        return NO_PREVALENCE
    return ""


def marginal_reason(a: Analysis) -> str:
    """Why the marginal (g-computation) and bootstrap comparison of the confounding table is
    not computed for this design ('' when it is)."""
    if a.design.firth:
        return ("the fits are Firth-penalised and the confounding table's bootstrap refits "
                "are not; it is not computed")
    if a.family != "binary":
        return ""
    if a.design.matched_set:
        return MATCHED
    if a.design.sampled_on_outcome:
        return ("a case-control extract does not give population marginal risks (the "
                "confounding comparison standardises absolute risks over the sample)")
    return ""


def prior_shift(a: Analysis, outcome: Outcome) -> float:
    """The amount added to the logistic intercept to recalibrate a case-control extract to the
    population prevalence (0 without one)."""
    tau = a.design.prevalence
    if a.family != "binary" or tau is None:
        return 0.0
    y = np.asarray(outcome.y, dtype=float)
    w = np.ones_like(y) if outcome.weights is None else np.asarray(outcome.weights, float)
    ybar = float(w @ y / w.sum())
    return float(np.log(tau / (1.0 - tau)) - np.log(ybar / (1.0 - ybar)))
