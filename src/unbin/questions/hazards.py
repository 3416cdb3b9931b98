"""Hazards: Grambsch-Therneau tests of proportional hazards per form, adjustment and term.

For a survival analysis, every fitted legacy, linear, spline (the AIC-chosen one) and
fractional-polynomial model under each adjustment coding is tested on its scaled Schoenfeld
residuals (unbin.models.cox.residuals): one row per model term (the exposure term, each
adjuster term; a term's columns tested jointly: its spline basis, legacy group indicators or FP
powers) and a GLOBAL row for all columns, against the time transform ``km`` (1 - Kaplan-Meier)
(Grambsch & Therneau 1994). A small p says the term's hazard ratio changes over follow-up. A
model that did not fit, or whose residuals cannot be computed, gives one failed GLOBAL row
with the reason; other analysis families give an empty table."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from ..models.cox.residuals import DEFAULT_TRANSFORM, ph_tests, schoenfeld, time_transform
from ..models.survival import cox_layout
from ..refit.analysis import FormFit, Refit, design
from ..spec import Spec

COLUMNS = ("form", "adjustment", "term", "role", "statistic", "df", "p", "time_transform",
           "status", "message")
FORMS = ("legacy", "linear", "spline", "fp")
CODINGS = ("legacy", "continuous", "none")
GLOBAL = "GLOBAL"


def hazards_table(r: Refit, spec: Spec | None = None) -> pd.DataFrame:
    """The proportional-hazards tests of every survival model (see the module's notes)."""
    rows: list[dict[str, object]] = []
    if r.family == "survival":
        shared = _Shared()
        for coding in CODINGS:
            for form in FORMS:
                f = r.get(form, coding)
                if f is not None:
                    rows += _model_rows(r, f, form, coding, shared)
    return pd.DataFrame(rows, columns=list(COLUMNS))


def _row(form: str, coding: str, term: str, role: str, statistic: float = np.nan,
         df: int = 0, p: float = np.nan, status: str = "ok", message: str = "",
         ) -> dict[str, object]:
    return {"form": form, "adjustment": coding, "term": term, "role": role,
            "statistic": statistic, "df": df, "p": p, "time_transform": DEFAULT_TRANSFORM,
            "status": status, "message": message}


def _term_groups(f: FormFit) -> list[tuple[str, str, list[int]]]:
    """(label, role, column indices) of each term of the model, the exposure's first; a label
    shared by two terms (a grouped modifier as its spline and its levels) gets the kind."""
    seen: dict[str, int] = {}
    terms = [(t, "exposure") for t in f.exposure_terms] + [(t, "adjuster") for t in
                                                          f.adjust_terms]
    for t, _ in terms:
        seen[t.variable] = seen.get(t.variable, 0) + 1
    out = []
    for t, role in terms:
        label = t.variable
        if seen[label] > 1:
            label = f"{label} ({type(t).__name__.removesuffix('Term').lower()})"
        out.append((label, role, f.result.index(t.names()).tolist()))
    return out


class _Shared:
    """What the models of one table share: the adjustment terms' columns (the same rows and
    terms give the same columns) and the time transform at the events, which depends on the
    outcome and the event times only (every model of the sample has the same events, in the
    layout's order)."""

    def __init__(self) -> None:
        self.columns: dict[str, np.ndarray] = {}
        self.event_times: np.ndarray | None = None
        self.g: np.ndarray | None = None

    def transform(self, r: Refit, resid: Any) -> np.ndarray:
        if self.g is None or self.event_times is None or not np.array_equal(
                self.event_times, resid.time):
            o = r.outcome
            self.g = time_transform(DEFAULT_TRANSFORM, resid, o.time, o.y, entry=o.entry,
                                    weights=o.weights)
            self.event_times = resid.time
        return self.g


def _model_rows(r: Refit, f: FormFit, form: str, coding: str,
                shared: _Shared | None = None) -> list[dict[str, object]]:
    shared = shared if shared is not None else _Shared()
    res = f.result
    if not res.ok:
        return [_row(form, coding, GLOBAL, "global", status="failed",
                     message=f"the {form} model did not fit, so it cannot be tested: "
                             f"{res.message}")]
    if not res.names:
        return [_row(form, coding, GLOBAL, "global", status="failed",
                     message="the model has no covariates to test")]
    try:
        X, names = design(r.sample.frame, r.x, f.exposure_terms, f.adjust_terms,
                          shared.columns)
        if names != res.names:  # the fit's columns, in its order
            raise ValueError(f"the design's columns {names} are not the fit's {res.names}")
        layout = cox_layout(r.outcome)
        resid = schoenfeld(X, res.coef, layout=layout, ties="efron")
        g = shared.transform(r, resid)
        groups = _term_groups(f)
        per, glob = ph_tests(resid, res.cov, g, {label: cols for label, _, cols in groups})
    except ValueError as exc:
        return [_row(form, coding, GLOBAL, "global", status="failed",
                     message=f"proportional hazards not tested: {exc}")]
    rows = [_row(form, coding, label, role, per[label].statistic, per[label].df, per[label].p)
            for label, role, _ in groups]
    rows.append(_row(form, coding, GLOBAL, "global", glob.statistic, glob.df, glob.p))
    return rows
