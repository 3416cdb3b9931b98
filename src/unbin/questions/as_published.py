"""The grouped table the legacy paper would have published, written from the cohort's own rows,
and what re-analysing that table (the published-table route) gives against the individual
data.

Rows ``row_type`` = "group": per legacy group its bounds, median, cases and the other count
(participants for a binary outcome, person-time for counts and survival), the legacy model's
adjusted ratio against the reference group with its 95% interval — the rows a ``published:``
study in the spec takes. Counts partition the sample, so they go through complementary
suppression (``questions.disclosure``); a table with a withheld count is not re-analysed.
Under frequency weights a row counts as the persons it stands for (counts, person-time and the
group medians are those of the rows repeated by their weights).

Rows ``row_type`` = "route": the per-unit log-ratio slope from the table (assigned exposures =
the group medians, Greenland–Longnecker covariance, GLS; ``unbin.published``) beside the same
slope from the individual rows (the linear form, legacy adjustment), and
``information_ratio`` = (SE individual / SE table)², the share of the individual data's
information about the slope that the published-table route keeps.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from ..models import EFFECT_SCALE, RATIO_FAMILIES
from ..published.covariance import study_covariance
from ..published.gls import fit_trend
from ..refit.analysis import Refit
from ..refit.contrasts import Z95, contrast
from ..spec import Spec
from .disclosure import complementary

COLUMNS = ("row_type", "group", "reference", "lower", "upper", "median", "cases",
           "other_count", "design", "ratio", "ratio_lower", "ratio_upper", "form",
           "table_estimate", "table_se", "individual_estimate", "individual_se",
           "information_ratio", "covariance_method", "scale", "status", "message")

# One dtype per column whatever the rows hold, so tables of several analyses concatenate
# cleanly (an all-missing column keeps its type).
TEXT = ("row_type", "group", "design", "form", "covariance_method", "scale", "status", "message")
DTYPES: dict[str, str] = {c: ("object" if c in TEXT else "Int64" if c == "cases"
                              else "boolean" if c == "reference" else "float64")
                          for c in COLUMNS}

DESIGN = {"binary": "cohort_participants", "count": "cohort_person_time",
          "survival": "cohort_person_time"}


def _persons(r: Refit) -> np.ndarray:
    """How many persons each row stands for: its frequency weight, else 1 (sampling weights
    estimate, they do not count: the table counts the extract's rows)."""
    o = r.outcome
    if o.weights is not None and o.weight_kind == "frequency":
        return np.asarray(o.weights, dtype=float)
    return np.ones(len(r.x))


def _median(x: np.ndarray, w: np.ndarray) -> float:
    """The median of ``x`` with each value repeated ``w`` times (the plain median when every
    w is 1): the mean of the middle one or two of the repeated values."""
    if not len(x):
        return float("nan")
    order = np.argsort(x, kind="stable")
    xs, cw = x[order], np.cumsum(w[order])
    total = cw[-1]
    lo, hi = np.floor((total - 1) / 2), np.ceil((total - 1) / 2)
    pick = np.searchsorted(cw, [lo, hi], side="right").clip(0, len(xs) - 1)
    return float(xs[pick].mean())


def _other_counts(r: Refit, codes: np.ndarray, k: int, persons: np.ndarray) -> np.ndarray:
    o = r.outcome
    if r.family == "binary":
        return np.bincount(codes, weights=persons, minlength=k)
    if r.family == "count":
        pt = np.exp(o.offset) if o.offset is not None else np.ones(len(codes))
    else:
        start = o.entry if o.entry is not None else np.zeros(len(codes))
        pt = np.asarray(o.time, dtype=float) - np.asarray(start, dtype=float)
    return np.bincount(codes, weights=pt * persons, minlength=k)


def as_published_table(r: Refit, spec: Spec) -> pd.DataFrame:
    """The legacy grouped table as a paper would print it, and the table route vs the rows."""
    if r.family not in RATIO_FAMILIES:
        return pd.DataFrame(columns=list(COLUMNS)).astype(DTYPES)
    scale = EFFECT_SCALE[r.family]
    f = r.get("legacy", "legacy")
    lg = r.legacy
    k = len(lg.labels)
    codes = lg.codes(r.x)
    persons = _persons(r)
    cases = np.bincount(codes, weights=np.asarray(r.outcome.y, dtype=float) * persons,
                        minlength=k)
    other = _other_counts(r, codes, k, persons)
    shown = complementary([int(round(c)) for c in cases], spec.min_cell)
    if r.family == "binary":
        shown_other: list[Any] = complementary([int(round(v)) for v in other], spec.min_cell)
    else:
        shown_other = [float(v) for v in other]
    medians = [_median(r.x[codes == g], persons[codes == g]) if (codes == g).any() else np.nan
               for g in range(k)]
    ref = lg.reference
    rows: list[dict[str, Any]] = []
    est = np.full(k, np.nan)
    se = np.full(k, np.nan)
    if f is not None and f.result.ok and np.isfinite(medians[ref]):
        e, s = contrast(f, np.array(medians), medians[ref])
        est, se = e, s
    for g in range(k):
        row: dict[str, Any] = {
            "row_type": "group", "group": lg.labels[g], "reference": g == ref,
            "lower": lg.cuts[g - 1] if g > 0 else np.nan,
            "upper": lg.cuts[g] if g < k - 1 else np.nan, "median": medians[g],
            "cases": shown[g], "other_count": shown_other[g], "design": DESIGN[r.family],
            "scale": scale, "status": "ok", "message": ""}
        if g == ref:
            row.update(ratio=1.0)
        elif np.isfinite(est[g]):
            row.update(ratio=float(np.exp(est[g])),
                       ratio_lower=float(np.exp(est[g] - Z95 * se[g])),
                       ratio_upper=float(np.exp(est[g] + Z95 * se[g])))
        else:
            row.update(status="failed", message="the legacy model could not be refitted")
        rows.append(row)
    rows.append(_route(r, scale, codes, cases, other, medians, est, se, shown, k))
    out = pd.DataFrame(rows, columns=list(COLUMNS))
    for c in TEXT:
        out[c] = out[c].where(out[c].notna(), "")
    out["cases"] = pd.array([None if v is None or v != v else int(v) for v in out["cases"]],
                            dtype="Int64")
    out["reference"] = pd.array([None if v is None or v != v else bool(v)
                                 for v in out["reference"]], dtype="boolean")
    return out.astype(DTYPES)


def _route(r: Refit, scale: str, codes: np.ndarray, cases: np.ndarray, other: np.ndarray,
           medians: list[float], est: np.ndarray, se: np.ndarray, shown: list[Any],
           k: int) -> dict[str, Any]:
    row: dict[str, Any] = {"row_type": "route", "form": "linear", "scale": scale,
                           "design": DESIGN[r.family], "status": "ok", "message": ""}
    lin = r.get("linear", "legacy")
    if lin is not None and lin.result.ok:
        b, V = lin.exposure_coef()
        row.update(individual_estimate=float(b[0]), individual_se=float(np.sqrt(V[0, 0])))
    ref = r.legacy.reference
    order = [ref] + [g for g in range(k) if g != ref]
    if any(v is None for v in shown):
        row.update(status="withheld", message="a group count is below the disclosure "
                                              "threshold; the table is not re-analysed")
        return row
    if not np.isfinite(est).all() or not np.isfinite(medians).all() or (cases <= 0).any():
        row.update(status="failed", message="a group is empty, has no cases, or the legacy "
                                            "model failed")
        return row
    lr = est[order[1:]]
    var = se[order[1:]] ** 2
    kind = {"binary": "odds", "count": "rate", "survival": "rate"}[r.family]
    o = other[order] - cases[order] if kind == "odds" else other[order]
    try:
        cov = study_covariance(kind, lr, var, cases[order], o)
        fit = fit_trend("linear", np.array([medians[g] for g in order]), lr, cov.cov)
    except (ValueError, np.linalg.LinAlgError) as exc:
        row.update(status="failed", message=str(exc))
        return row
    t_se = float(np.sqrt(fit.cov[0, 0]))
    row.update(table_estimate=float(fit.coef[0]), table_se=t_se,
               covariance_method=cov.method)
    if "individual_se" in row:
        row["information_ratio"] = (row["individual_se"] / t_se) ** 2
    return row
