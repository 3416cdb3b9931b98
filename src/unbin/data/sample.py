"""The analysis sample: filters, complete cases and follow-up checks, with the rows each step
dropped."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..errors import DataError
from ..spec import Analysis, Spec


def coerce_numeric(df: pd.DataFrame, col: str, role: str) -> pd.Series:
    s = df[col]
    if pd.api.types.is_bool_dtype(s):
        return s.astype(float)
    if pd.api.types.is_numeric_dtype(s):
        return s.astype(float)
    conv = pd.to_numeric(s, errors="coerce")
    bad = s.notna() & conv.isna()
    if bad.any():
        examples = ", ".join(repr(v) for v in s[bad].astype(str).unique()[:3])
        where = ""
        first = s.index[np.flatnonzero(bad.to_numpy())[0]]
        if isinstance(first, (int, np.integer)):  # the extract's row position (as read)
            where = (f", the first in data row {int(first) + 1} (line {int(first) + 2} of a "
                     "CSV file with one header line)")
        raise DataError(f"column {col!r} ({role}) must be numeric but holds non-numeric values "
                        f"such as {examples} in {int(bad.sum())} rows{where}; recode them (or "
                        "set them to missing) in the extract.")
    return conv.astype(float)


@dataclass(frozen=True)
class Sample:
    """The complete-case analysis sample shared by every fit of one analysis."""

    frame: pd.DataFrame
    n_input: int
    dropped: tuple[tuple[str, int], ...]

    @property
    def n(self) -> int:
        return len(self.frame)


def filtered(df: pd.DataFrame, a: Analysis) -> tuple[pd.DataFrame, list[tuple[str, int]]]:
    """The rows the analysis' filters keep, and each filter's dropped-row count."""
    dropped: list[tuple[str, int]] = []
    cur = df
    for f in a.filters:
        s = cur[f.variable]
        keep = pd.Series(True, index=cur.index)
        if f.min is not None:
            keep &= coerce_numeric(cur, f.variable, "filter") >= f.min
        if f.max is not None:
            keep &= coerce_numeric(cur, f.variable, "filter") <= f.max
        if f.values is not None:
            keep &= s.isin(list(f.values)) | s.astype(str).isin([str(v) for v in f.values])
        dropped.append((f"filter: {f.describe()}", int((~keep).sum())))
        cur = cur[keep]
    return cur, dropped


def analysis_sample(df: pd.DataFrame, a: Analysis, spec: Spec) -> Sample:
    """Apply filters, then drop incomplete rows, then rows with impossible follow-up.

    Every step's dropped-row count is kept, in order, under a reason that names the column.
    """
    n0 = len(df)
    cur, dropped = filtered(df, a)
    design_cols = (a.exposure, *a.adjust, *a.strata, a.by, *a.outcome.columns)
    checked = design_weights(cur, a)
    cols = [c for c in a.columns if (c not in {f.variable for f in a.filters} or c in design_cols)
            and not (c in checked and c not in design_cols)]
    for c in cols:
        miss = cur[c].isna()
        dropped.append((f"missing {c}", int(miss.sum())))
        cur = cur[~miss]
    numeric = {a.exposure, *a.outcome.columns}
    numeric |= {v for v in a.adjust if v in spec.groupings}
    out = cur.copy()
    for c in sorted(numeric):
        out[c] = coerce_numeric(out, c, "analysis column")
    o = a.outcome
    if o.type == "survival":
        assert o.time is not None
        bad = out[o.time] <= 0
        if o.entry:
            bad |= (out[o.entry] < 0) | (out[o.entry] >= out[o.time])
        dropped.append((f"non-positive follow-up ({o.time}"
                        + (f" <= {o.entry}" if o.entry else " <= 0") + ")", int(bad.sum())))
        out = out[~bad]
    if o.type == "count":
        assert o.persontime is not None
        bad = out[o.persontime] <= 0
        dropped.append((f"non-positive person-time ({o.persontime} <= 0)", int(bad.sum())))
        out = out[~bad]
    if a.cluster:
        single_cluster(out, a)
    return Sample(frame=out.reset_index(drop=True), n_input=n0, dropped=tuple(dropped))


def design_weights(df: pd.DataFrame, a: Analysis) -> tuple[str, ...]:
    """Check the weight and cluster columns before any row is dropped: a weight must be a
    positive finite number and no cluster may be missing (dropping such rows would silently
    change the population the weights describe). Returns the columns checked."""
    checked: list[str] = []
    if a.weights is not None:
        col = a.weights.column
        role = f"weights, {a.weights.kind}"
        w = coerce_numeric(df, col, role)
        bad = {"missing": int(w.isna().sum()), "negative": int((w < 0).sum()),
               "zero": int((w == 0).sum()),
               "infinite": int(np.isinf(w.to_numpy(float)).sum())}
        found = [f"{n} {what}" for what, n in bad.items() if n]
        if found:
            raise DataError(f"column {col!r} ({role}) of analysis {a.name!r} has "
                            f"{', '.join(found)} weight(s); every weight must be a positive "
                            "number. Fix the weights in the extract, or drop those rows with a "
                            "filter (filters: [{variable: " + col + ", min: ...}]) if they do "
                            "not belong to the population.")
        checked.append(col)
    if a.cluster:
        miss = int(df[a.cluster].isna().sum())
        if miss:
            raise DataError(f"column {a.cluster!r} (cluster) of analysis {a.name!r} is missing "
                            f"in {miss} rows; every row needs its cluster (centre, family, "
                            "person). Fill it in the extract (a row of its own can be its own "
                            "cluster).")
        single_cluster(df, a)
        checked.append(a.cluster)
    return tuple(checked)


def single_cluster(df: pd.DataFrame, a: Analysis) -> None:
    assert a.cluster is not None
    if df[a.cluster].nunique() < 2:
        raise DataError(f"column {a.cluster!r} (cluster) has a single cluster in the analysis "
                        f"sample of {a.name!r}; a cluster-robust variance needs at least two "
                        "(and many more for trustworthy intervals). Remove cluster: from the "
                        "analysis or name the column that marks the clusters.")
