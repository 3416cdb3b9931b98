"""The fits table: one row per fitted model of an analysis (exposure form x adjustment coding)."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd

from ..models.base import FitResult, Outcome
from ..models.robust import variance_label
from ..refit.analysis import Refit
from ..spec import Spec

COLUMNS = ("form", "detail", "adjustment", "selected", "n", "events", "person_time",
           "n_params", "exposure_df",
           "loglik", "lr_chi2", "aic", "bic", "c_index", "r2", "variance",
           "dispersion", "nb_alpha", "nb_alpha_se", "converged", "status", "message",
           "warnings", "exposure_basis", "adjustment_terms")


def person_time(outcome: Outcome) -> float:
    """Follow-up summed over the sample's rows (frequency weights counted): time minus entry for a
    time-to-event outcome, the person-time of a count outcome; NaN for the other families."""
    if outcome.family == "survival" and outcome.time is not None:
        each = outcome.time - (outcome.entry if outcome.entry is not None else 0.0)
    elif outcome.family == "count" and outcome.offset is not None:
        each = np.exp(outcome.offset)
    else:
        return float("nan")
    if outcome.weights is not None and outcome.weight_kind == "frequency":
        each = each * outcome.weights  # sampling weights: the sample's own follow-up
    return float(np.sum(each))


def frequency_weighted(outcome: Outcome) -> bool:
    return outcome.weights is not None and outcome.weight_kind == "frequency"


def counted(res: FitResult, outcome: Outcome) -> tuple[int, int | None, float]:
    """A fit's n, events and BIC with each row counted as the persons its frequency weight
    says (the expanded rows' numbers; a count outcome's events are its counts summed); the
    fit's own without frequency weights."""
    if not frequency_weighted(outcome):
        return res.n, res.events, res.bic
    n = int(round(outcome.counted()))
    events = (None if res.events is None
              else int(round(outcome.counted(np.asarray(outcome.y, dtype=float)))))
    # BIC: events as n for Cox models (Volinsky & Raftery 2000), rows otherwise
    n_eff = events if (res.family == "survival" and events) else n
    return n, events, float(-2.0 * res.loglik + np.log(max(n_eff, 1)) * res.n_params)


def fits_table(r: Refit, spec: Spec | None = None) -> pd.DataFrame:
    """One row per fitted model: size, likelihood, AIC, concordance and its bases as JSON."""
    rows = []
    follow_up = person_time(r.outcome)
    nulls = {f.adjustment: f.result for f in r.fits if f.form == "null"}
    for f in r.fits:
        res = f.result
        n, events, bic = counted(res, r.outcome)
        null = nulls.get(f.adjustment)
        lr = 2 * (res.loglik - null.loglik) if (null is not None and null.ok and res.ok) else np.nan
        df_exp = sum(t.df for t in f.exposure_terms)
        basis = [t.to_dict() for t in f.exposure_terms]
        c = f.concordance(r.outcome)
        rows.append({
            "form": f.form,
            "detail": f.detail,
            "adjustment": f.adjustment,
            "selected": bool(f.selected),
            "n": n,
            "events": events if events is not None else pd.NA,
            "person_time": follow_up,
            "n_params": res.n_params,
            "exposure_df": df_exp,
            "loglik": res.loglik,
            "lr_chi2": lr,
            "aic": res.aic if res.ok else np.nan,
            "bic": bic if res.ok else np.nan,
            "c_index": c,
            "r2": res.extra.get("r2", np.nan),
            "variance": variance_label(res),
            "dispersion": res.extra.get("dispersion", np.nan),
            "nb_alpha": res.extra.get("nb_alpha", np.nan),
            "nb_alpha_se": res.extra.get("nb_alpha_se", np.nan),
            "converged": bool(res.converged),
            "status": res.status,
            "message": res.message,
            "warnings": " | ".join(res.warnings),
            "exposure_basis": json.dumps(basis, sort_keys=True),
            "adjustment_terms": json.dumps([t.to_dict() for t in f.adjust_terms], sort_keys=True),
        })
    out = pd.DataFrame(rows, columns=list(COLUMNS))
    out["events"] = out["events"].astype("Int64")
    return out
