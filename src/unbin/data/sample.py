"""The analysis sample: filters, complete cases and follow-up checks, with the rows each step
dropped."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ..errors import DataError
from ..spec import Analysis, Spec
from ..spec.model import (
    AGE_AT_ENTRY,
    ATTAINED_AGE,
    DAYS_PER_UNIT,
    TIME_AT_ENTRY,
    TIME_ON_STUDY,
    OutcomeSpec,
)
from ..terms.roles import is_grouped, variable_role

MIN_SAMPLE_ROWS = 10  # an analysis sample with fewer rows is recorded as failed, not analysed


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
        comma = s[bad].astype(str).str.fullmatch(r"\s*[+-]?\d+,\d+\s*").all()
        fix = ("these are numbers with a decimal comma: set the cohort's csv.decimal: ',' in "
               "the spec" if comma else
               "recode them (or set them to missing) in the extract")
        raise DataError(f"column {col!r} ({role}) must be numeric but holds non-numeric values "
                        f"such as {examples} in {int(bad.sum())} rows{where}; {fix}.")
    return conv.astype(float)


def coerce_dates(df: pd.DataFrame, col: str, role: str, date_format: str | None = None
                 ) -> pd.Series:
    """A date column as datetime64: dates read as dates pass; text is read as ISO 8601
    (2025-06-30) or with ``date_format`` (the cohort's csv.date_format); anything else is a
    DataError naming the column, examples and the fix."""
    s = df[col]
    if pd.api.types.is_datetime64_any_dtype(s):
        return s.dt.tz_localize(None) if getattr(s.dt, "tz", None) is not None else s
    if pd.api.types.is_numeric_dtype(s) and not s.isna().all():
        raise DataError(f"column {col!r} ({role}) holds numbers, not dates; give the dates "
                        "(YYYY-MM-DD in a CSV) or a ready duration column as outcome.time.")
    text = s.astype("string").str.strip()
    conv = pd.to_datetime(text, format=date_format or "ISO8601", errors="coerce")
    bad = text.notna() & conv.isna()
    if bad.any():
        examples = ", ".join(repr(v) for v in text[bad].unique()[:3])
        how = (f"the cohort's csv.date_format {date_format!r}" if date_format
               else "ISO 8601 (YYYY-MM-DD)")
        raise DataError(f"column {col!r} ({role}) holds values that are not dates in "
                        f"{how}, such as {examples} in {int(bad.sum())} rows; write them as "
                        "YYYY-MM-DD or set the cohort's csv.date_format (e.g. '%d.%m.%Y').")
    return conv


def _followup(out: pd.DataFrame, o: OutcomeSpec, date_format: str | None
              ) -> tuple[pd.DataFrame, list[tuple[str, int]]]:
    """Build the survival times of ``o.followup`` (dates and/or the attained-age scale), with
    the rows each impossible order drops."""
    f = o.followup
    assert f is not None and o.event is not None
    steps: list[tuple[str, int]] = []
    if f.start and f.end:
        start = coerce_dates(out, f.start, "outcome.time.start", date_format)
        end = coerce_dates(out, f.end, "outcome.time.end", date_format)
        bad = end < start
        steps.append((f"follow-up ends before it starts ({f.end} < {f.start})", int(bad.sum())))
        out, start, end = out[~bad], start[~bad], end[~bad]
        if f.study_end:
            stop = pd.Timestamp(f.study_end)
            late = (out[o.event].fillna(0) != 0) & (end > stop)  # any cause's event, when competing
            steps.append((f"event after the study end ({f.end} > {f.study_end} with "
                          f"{o.event} {'not 0' if o.has_competing else '= 1'})",
                          int(late.sum())))
            out, start, end = out[~late], start[~late], end[~late]
            end = end.where(end <= stop, stop)  # later censoring dates: censored at the end
        per_unit = pd.Timedelta(days=1) * DAYS_PER_UNIT[f.unit]
        duration = (end - start) / per_unit
        entered = out[f.entry] if f.entry else None
        if f.entry_date:
            entered = (coerce_dates(out, f.entry_date, "outcome.time.entry", date_format)
                       - start) / per_unit
    else:
        assert f.duration is not None
        duration = out[f.duration]
        entered = out[f.entry] if f.entry else None
    out = out.copy()
    if f.scale == "attained_age":
        assert f.age is not None
        age_in = out[f.age] + (entered if entered is not None else 0.0)
        out[AGE_AT_ENTRY] = age_in.astype(float)
        out[ATTAINED_AGE] = (out[f.age] + duration).astype(float)
    else:
        out[TIME_ON_STUDY] = duration.astype(float)
        if f.entry_date and entered is not None:
            out[TIME_AT_ENTRY] = entered.astype(float)
    return out, steps


def labelled_factors(out: pd.DataFrame, a: Analysis, spec: Spec,
                     value_labels: dict[str, dict[Any, str]]) -> pd.DataFrame:
    """Categorical adjusters and the ``by`` variable that carry value labels (SPSS, Stata)
    become factors whose levels are the labels, in the order of their codes (the lowest code
    is the reference, as in the file)."""
    numeric_roles = {a.exposure, *a.outcome.columns, *a.strata}
    for v in dict.fromkeys([*a.adjust, *([a.by] if a.by else [])]):
        labels = value_labels.get(v)
        if (not labels or v in numeric_roles or is_grouped(v, spec)
                or variable_role(v, spec, out[v]) != "factor"):
            continue
        s = coerce_numeric(out, v, "labelled factor")
        names = {float(k): str(lab) for k, lab in labels.items()}
        codes = sorted(set(s.dropna().unique()) | set(names))
        text = {c: names.get(c, f"{c:g}") for c in codes}
        out[v] = pd.Categorical(s.map(text), categories=list(dict.fromkeys(text.values())))
    return out


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
    # each column's missing rows among those the earlier columns left, in one mask: the rows
    # are copied once (not once per column)
    keep = np.ones(len(cur), dtype=bool)
    for c in cols:
        miss = cur[c].isna().to_numpy()
        dropped.append((f"missing {c}", int(np.count_nonzero(miss & keep))))
        keep &= ~miss
    out = cur.take(np.flatnonzero(keep))  # a new frame: the columns below are set on it
    o = a.outcome
    fu = o.followup
    dates = {fu.start, fu.end, fu.entry_date} if fu else set()
    numeric = {a.exposure, *o.columns} - dates
    numeric |= {v for v in (*a.adjust, a.by) if v and is_grouped(v, spec)}
    for c in sorted(numeric):
        if out[c].dtype != np.float64:  # a float64 column is already what coerce_numeric gives
            out[c] = coerce_numeric(out, c, "analysis column")
    if df.attrs.get("value_labels"):
        out = labelled_factors(out, a, spec, df.attrs["value_labels"])
    if o.followup is not None:
        dialect = df.attrs.get("csv_dialect")
        out, steps = _followup(out, o, getattr(dialect, "date_format", None))
        dropped += steps
    if o.type == "survival":
        assert o.time is not None
        bad = out[o.time] <= 0
        if o.entry:
            bad |= (out[o.entry] < 0) | (out[o.entry] >= out[o.time])
        dropped.append((f"non-positive follow-up ({o.time}"
                        + (f" <= {o.entry}" if o.entry else " <= 0") + ")", int(bad.sum())))
        if bad.any():
            out = out[~bad]
    if o.type == "count":
        assert o.persontime is not None
        bad = out[o.persontime] <= 0
        dropped.append((f"non-positive person-time ({o.persontime} <= 0)", int(bad.sum())))
        if bad.any():
            out = out[~bad]
    if a.cluster:
        single_cluster(out, a)
    out.index = pd.RangeIndex(len(out))  # reset_index(drop=True) without copying the rows
    return Sample(frame=out, n_input=n0, dropped=tuple(dropped))


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
