"""Collecting the job tables into the study tables (unbin.pipeline.jobs.collect_tables,
``stack_tables``): a column that is all missing in some jobs' tables (an analysis without a
horizon writes None into an object column) takes the type the other jobs give it, as pandas
chose it so far, without pandas' deprecated rule that left all-missing columns out of the
choice (the suite turns that FutureWarning into an error). Expected values written by hand
(common practice: the stacked rows in order, missing where a job had none)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from unbin.demo import write_demo
from unbin.pipeline.jobs import STUDY_TABLES, collect_tables, stack_tables
from unbin.results.tables import read_table, write_table
from unbin.spec import load_spec


def test_collected_tables_keep_the_type_of_a_column_missing_in_some_jobs(tmp_path: Path,
                                                                         ) -> None:
    spec_path = write_demo(tmp_path, n=300)
    spec = load_spec(spec_path)
    work, tables = tmp_path / "work", tmp_path / "tables"
    pairs = [(c.name, a.name) for c in spec.cohorts for a in spec.analyses]
    assert len(pairs) >= 3
    horizons, labels = [], []
    for i, (cohort, analysis) in enumerate(pairs):
        survival = i % 3 == 0  # one job in three has a horizon and a label
        df = pd.DataFrame({"cohort": [cohort] * 2, "analysis": [analysis] * 2,
                           "estimate": [0.5 + i, 1.5 + i],
                           "horizon": [5.0, 5.0] if survival else [None, None],
                           "label": pd.array(["a", None] if survival else [None, None],
                                             dtype="string" if survival else object)})
        horizons += [5.0, 5.0] if survival else [np.nan, np.nan]
        labels += ["a", pd.NA] if survival else [pd.NA, pd.NA]
        for name in STUDY_TABLES:
            out = df if name == "confounding" else pd.DataFrame({"cohort": [], "analysis": []})
            write_table(out, work / cohort / analysis / f"{name}.parquet", {})
    collect_tables(spec_path, work, tables)
    got = read_table(tables / "confounding.parquet")
    assert list(got.columns) == ["cohort", "analysis", "estimate", "horizon", "label"]
    assert got["horizon"].dtype == np.float64
    np.testing.assert_array_equal(got["horizon"].to_numpy(), np.asarray(horizons))
    assert got["label"].dtype == pd.StringDtype()
    assert got["label"].isna().tolist() == [v is pd.NA for v in labels]
    assert got.loc[got["label"].notna(), "label"].tolist() == ["a"] * len(range(0, len(pairs), 3))
    assert got["estimate"].tolist() == [v for i in range(len(pairs)) for v in (0.5 + i, 1.5 + i)]
    assert len(read_table(tables / "fits.parquet")) == 0


@pytest.mark.parametrize(("full", "empty", "dtype", "want"), [
    ([1.5, 2.5], [None], np.float64, [1.5, 2.5, np.nan]),
    ([1.5, 2.5], pd.array([None], dtype="string"), np.float64, [1.5, 2.5, np.nan]),
    (pd.array(["a", "b"], dtype="string"), [np.nan], pd.StringDtype(), ["a", "b", pd.NA]),
    (pd.array([1, 2], dtype="Int64"), [None], pd.Int64Dtype(), [1, 2, pd.NA]),
    (pd.to_datetime(["2020-01-01", "2021-06-30"]), [np.nan], np.dtype("datetime64[ns]"),
     [pd.Timestamp("2020-01-01"), pd.Timestamp("2021-06-30"), pd.NaT]),
    # types without missing values: pandas gives object (no deprecated choice involved)
    ([1, 2], [None], object, [1, 2, None]),
    ([True, False], [np.nan], object, [True, False, np.nan]),
])
def test_stacking_gives_all_missing_columns_the_others_type(full, empty, dtype, want) -> None:  # type: ignore[no-untyped-def]
    a = pd.DataFrame({"k": [0, 1], "c": full})
    b = pd.DataFrame({"k": [2], "c": pd.Series(empty, dtype=getattr(empty, "dtype", None))})
    got = stack_tables([a, b])
    assert got["c"].dtype == dtype
    assert got["k"].tolist() == [0, 1, 2]
    for g, w in zip(got["c"].tolist(), want, strict=True):
        assert (pd.isna(g) and pd.isna(w)) or g == w
    # every part all missing, or one part only: pandas' own concatenation
    only = stack_tables([b, b])
    assert only["c"].dtype == b["c"].dtype and only["c"].isna().all()
    assert stack_tables([a])["c"].dtype == a["c"].dtype
