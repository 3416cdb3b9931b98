"""What a binary outcome's sampling design (the analysis' ``design`` block) allows, and the
prior correction of the intercept for case-control extracts.

Matched sets are fitted conditionally (``unbin.models.matched``): there is no intercept, so
no absolute risk, implied threshold or net benefit. A case-control extract estimates odds
ratios correctly, but its intercept reflects the sampled case fraction, not the population's;
with the population prevalence ``tau`` the intercept is corrected by the prior correction
(King & Zeng 2001, "prior correction"):

    intercept* = intercept - log[ ((1 - tau) / tau) * (ybar / (1 - ybar)) ],

``ybar`` the (frequency-weighted) case fraction of the analysis sample.
"""

from __future__ import annotations

from collections.abc import Callable

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


def bootstrap_reason(a: Analysis) -> str:
    """Why the bootstrap refits (``information_bootstrap``, ``decision_resampling``) do not
    apply to this design ('' when they do): they refit the ordinary (weighted) likelihood on
    resampled rows or clusters (``unbin.models.weighted.design_resample_weights``), not
    Firth's penalty or the conditional likelihood of matched sets."""
    if a.design.firth:
        return ("the fits are Firth-penalised and the bootstrap refits are not; no interval is "
                "computed")
    if a.design.matched_set:
        return ("the bootstrap refits the unconditional likelihood, not the conditional one of "
                "matched sets; no interval is computed")
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


def design_notes(a: Analysis, label: Callable[[str], str] = str) -> list[str]:
    """Short phrases for the report's line about an analysis: the cluster, sampling weights
    and the design block (``label`` turns a column into its human label)."""
    notes = []
    if a.cluster:
        notes.append(f"cluster-robust variances by {label(a.cluster)}")
    if a.weights is not None and a.weights.kind == "sampling":
        notes.append(f"sampling weights {label(a.weights.column)} (robust variances)")
    if a.design.matched_set:
        notes.append(f"matched sets {label(a.design.matched_set)} (conditional logistic "
                     "regression)")
    if a.design.prevalence is not None:
        notes.append(f"case-control extract, risks recalibrated to a prevalence of "
                     f"{a.design.prevalence:g}")
    elif a.design.case_control:
        notes.append("case-control extract (no absolute risks without a prevalence)")
    if a.design.firth:
        notes.append("Firth-penalised fits")
    return notes
