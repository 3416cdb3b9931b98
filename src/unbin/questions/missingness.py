"""What the complete-case step drops: share missing per analysis column, overall, by legacy
exposure group and by outcome, and how complete-case rows differ from dropped rows."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from ..data import Sample, coerce_numeric
from ..data.sample import filtered
from ..errors import DataError
from ..spec import Analysis, Spec
from ..terms.legacy import legacy_term
from ..terms.roles import variable_role
from . import disclosure

# Long format: one row per analysis column x subset x level, so a reader filters on `subset`
# and a test selects a cell by (column, subset, level). The standardised difference belongs to
# the column, not to a subset: it is on the `subset == "all"` row, missing on the others.
COLUMNS = ("column", "role", "subset", "level", "rows", "missing", "share_missing",
           "suppressed", "smd", "smd_method", "note")

ROLE_ORDER = ("outcome", "exposure", "adjuster", "stratum", "by")


def _roles(a: Analysis) -> dict[str, str]:
    """Each column that enters the complete-case step, in the analysis' column order, with its
    first role (outcome, exposure, adjuster, stratum, by). Filter-only columns do not enter."""
    found: dict[str, str] = {}
    for role, cols in zip(ROLE_ORDER, (a.outcome.columns, (a.exposure,), a.adjust, a.strata,
                                       (a.by,) if a.by else ()), strict=True):
        for c in cols:
            found.setdefault(c, role)
    return {c: found[c] for c in a.columns if c in found}


def filtered_rows(frame: pd.DataFrame, a: Analysis) -> pd.DataFrame:
    """The rows the analysis' filters keep: the rows the complete-case step starts from (the
    analysis sample's own filter step; the job checks the counts agree)."""
    return filtered(frame, a)[0]


def smd_means(a: np.ndarray, b: np.ndarray) -> float:
    """(mean a - mean b) / sqrt((var a + var b) / 2), sample variances (Austin 2009)."""
    pooled = np.sqrt((np.var(a, ddof=1) + np.var(b, ddof=1)) / 2.0)
    diff = float(np.mean(a) - np.mean(b))
    if pooled == 0:
        return 0.0 if diff == 0 else float("nan")
    return diff / float(pooled)


def smd_levels(a: pd.Series, b: pd.Series) -> float:
    """Multi-category standardised difference of Yang & Dalton (2012): sqrt((p_a - p_b)' S^-1
    (p_a - p_b)) over every level but the first (sorted), S the mean of the two groups'
    multinomial covariances (diag p - p p'). Two levels: |p_a - p_b| / sqrt((p_a(1 - p_a) +
    p_b(1 - p_b)) / 2), Austin (2009)'s binary formula. Never negative."""
    ta, tb = a.astype(str), b.astype(str)
    levels = sorted(set(ta) | set(tb))
    if len(levels) < 2:
        return 0.0
    pa = np.array([np.mean(ta == lev) for lev in levels[1:]])
    pb = np.array([np.mean(tb == lev) for lev in levels[1:]])
    s = (np.diag(pa) - np.outer(pa, pa) + np.diag(pb) - np.outer(pb, pb)) / 2.0
    d = pa - pb
    value = float(d @ np.linalg.pinv(s) @ d)
    return float(np.sqrt(max(value, 0.0)))


def _numeric(s: pd.Series, column: str) -> pd.Series:
    if pd.api.types.is_datetime64_any_dtype(s):
        return (s - pd.Timestamp("1970-01-01")) / pd.Timedelta(days=1)
    return coerce_numeric(s.to_frame(column), column, "analysis column")


def _smd_kind(column: str, role: str, a: Analysis, spec: Spec, values: pd.Series) -> str:
    """levels (categorical) or means (numeric): the event indicator is categorical, the other
    outcome columns and the exposure numeric, adjusters and the rest as they enter the models
    (:mod:`unbin.terms.roles`)."""
    if column == a.outcome.event:
        return "levels"
    if role in ("outcome", "exposure"):
        return "means"
    return "levels" if variable_role(column, spec, values) == "factor" else "means"


def _outcome_groups(rows: pd.DataFrame, a: Analysis) -> tuple[pd.Series, list[str]]:
    """Each row's outcome subset (NaN where the outcome is missing) and the subsets in order.

    binary and survival: the event indicator (event, no event); count: count > 0 vs count = 0;
    continuous: tertiles of the observed outcome values (cuts at their 1/3 and 2/3 quantiles,
    a value on a cut in the lower tertile)."""
    o = a.outcome
    if o.type in ("binary", "survival"):
        assert o.event is not None
        e = _numeric(rows[o.event], o.event)
        return e.map({1.0: "event", 0.0: "no event"}), ["event", "no event"]
    if o.type == "count":
        assert o.count is not None
        c = _numeric(rows[o.count], o.count)
        return c.where(c.isna(), np.where(c > 0, "count > 0", "count = 0")), \
            ["count > 0", "count = 0"]
    assert o.value is not None
    v = _numeric(rows[o.value], o.value)
    names = ["tertile 1", "tertile 2", "tertile 3"]
    observed = v.dropna().to_numpy(float)
    if len(observed) == 0:
        return pd.Series(np.nan, index=rows.index, dtype=object), names
    cuts = np.quantile(observed, [1 / 3, 2 / 3])
    codes = np.searchsorted(cuts, v.to_numpy(float), side="left")
    return pd.Series(np.array(names, dtype=object)[np.minimum(codes, 2)],
                     index=rows.index).where(v.notna()), names


def _exposure_groups(rows: pd.DataFrame, sample: Sample, a: Analysis, spec: Spec
                     ) -> tuple[pd.Series, list[str]]:
    """Each row's legacy exposure group (NaN where the exposure is missing), the cuts resolved
    as the analysis resolves them: on the analysis sample's exposure (quantile groupings), or on
    the observed exposure when the sample is empty."""
    x = _numeric(rows[a.exposure], a.exposure)
    source = sample.frame[a.exposure].to_numpy(float) if sample.n else x.dropna().to_numpy(float)
    if len(source) == 0:
        return pd.Series(np.nan, index=rows.index, dtype=object), []
    term = legacy_term(source, a.exposure, spec)
    labels = list(term.labels)
    codes = term.codes(x.fillna(0.0).to_numpy(float))
    return pd.Series(np.array(labels, dtype=object)[codes], index=rows.index).where(x.notna()), \
        labels


def withheld_cells(sizes: list[int], missing: list[int], min_cell: int, partition: bool
                   ) -> list[bool]:
    """Which cells of one column over the levels of a subset withhold their missing count and
    share (:mod:`unbin.questions.disclosure`). In a cell, missing and observed partition the
    rows: complementary suppression of the two. A withheld row count withholds its cell. Over
    the levels (``partition``), the row counts get complementary suppression, and so do the
    missing counts (they add up to the column's shown total whenever the subset's variable is
    never missing): when exactly one cell is withheld, the cell with the smallest other
    positive missing count is withheld too."""
    shown_sizes = disclosure.complementary(sizes, min_cell) if partition else list(sizes)
    hidden = [shown is None or disclosure.complementary([m, n - m], min_cell)[0] is None
              for shown, n, m in zip(shown_sizes, sizes, missing, strict=True)]
    if partition and sum(hidden) == 1:
        others = [(m, i) for i, m in enumerate(missing) if not hidden[i] and m > 0]
        if others:
            hidden[min(others)[1]] = True
    return hidden


def missingness_table(frame: pd.DataFrame, sample: Sample, a: Analysis, spec: Spec
                      ) -> pd.DataFrame:
    """Share missing per analysis column overall, by legacy exposure group and by outcome, and
    each column's standardised difference between complete-case and dropped rows."""
    rows = filtered_rows(frame, a)
    roles = _roles(a)
    cols = list(roles)
    missing = rows[cols].isna()
    complete = ~missing.any(axis=1)
    steps = dict(sample.dropped)
    by_filters = sum(n for step, n in sample.dropped if step.startswith("filter: "))
    by_missing = sum(steps.get(f"missing {c}", 0) for c in cols)
    if (len(rows), int((~complete).sum())) != (sample.n_input - by_filters, by_missing):
        raise RuntimeError(f"the missingness table sees {len(rows)} rows after filters and "
                           f"{int((~complete).sum())} incomplete ones; the analysis sample "
                           f"{sample.n_input - by_filters} and {by_missing}")
    min_cell = spec.min_cell
    subsets: list[tuple[str, pd.Series, list[str]]] = [
        ("all", pd.Series("all", index=rows.index, dtype=object), ["all"]),
        ("exposure group", *_exposure_groups(rows, sample, a, spec)),
        ("outcome", *_outcome_groups(rows, a)),
    ]
    out: list[dict[str, Any]] = []
    for subset, group, levels in subsets:
        inside = [(group == lev).to_numpy() for lev in levels]  # once for every column
        sizes = [int(m.sum()) for m in inside]
        shown_sizes = sizes if subset == "all" else disclosure.complementary(sizes, min_cell)
        for c in cols:
            counts = [int(missing[c].to_numpy()[m].sum()) for m in inside]
            hidden = withheld_cells(sizes, counts, min_cell, partition=subset != "all")
            for lev, size, shown, n_missing, withheld in zip(levels, sizes, shown_sizes, counts,
                                                             hidden, strict=True):
                row: dict[str, Any] = {
                    "column": c, "role": roles[c], "subset": subset, "level": lev,
                    "rows": pd.NA if shown is None else size,
                    "missing": pd.NA if withheld else n_missing,
                    "share_missing": (float("nan") if withheld or not size
                                      else n_missing / size),
                    "suppressed": withheld, "smd": float("nan"), "smd_method": "", "note": ""}
                if subset == "all":
                    row.update(_smd(rows[c], complete, c, roles[c], a, spec, min_cell))
                out.append(row)
    df = pd.DataFrame(out, columns=list(COLUMNS))
    if not len(df):
        df = pd.DataFrame({c: pd.Series(dtype=object) for c in COLUMNS})
    for c in ("rows", "missing"):
        df[c] = df[c].astype("Int64")
    df["share_missing"] = df["share_missing"].astype(float)
    df["smd"] = df["smd"].astype(float)
    df["suppressed"] = df["suppressed"].astype(bool)
    return df


def _smd(values: pd.Series, complete: pd.Series, column: str, role: str, a: Analysis,
         spec: Spec, min_cell: int) -> dict[str, Any]:
    """The column's standardised difference, complete-case rows minus dropped rows, on the
    rows where the column is observed; withheld when either side has fewer than min_cell."""
    kind = _smd_kind(column, role, a, spec, values.dropna())
    observed = values.notna()
    kept = values[complete & observed]
    lost = values[~complete & observed]
    base: dict[str, Any] = {"smd_method": kind}
    if int((~complete).sum()) == 0:
        return {**base, "note": "no row dropped"}
    if len(lost) == 0:
        return {**base, "note": "observed in no dropped row"}
    if len(kept) == 0:
        return {**base, "note": "no complete-case row"}
    if disclosure.too_small_to_describe(min(len(kept), len(lost)), min_cell):
        return {**base, "note": "withheld: fewer than min_cell rows on one side"}
    if kind == "levels":
        return {**base, "smd": smd_levels(kept, lost)}
    if min(len(kept), len(lost)) < 2:
        return {**base, "note": "one row on one side: no spread"}
    try:
        value = smd_means(_numeric(kept, column).to_numpy(float),
                          _numeric(lost, column).to_numpy(float))
    except DataError:
        return {**base, "note": "not numeric: no difference computed"}
    return {**base, "smd": value, "note": "" if np.isfinite(value) else "no spread on either side"}
