"""Reading a parquet extract row group by row group and building the analysis sample with one
copy of the rows: the same frame, to the value and the type, as the reference readers give
(pyarrow's ``read_table(...).to_pandas()``, pandas' ``dropna``), and no column an analysis
names is ever left out. Every file is written by pyarrow or pandas."""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from unbin.data import analysis_sample, read_extract
from unbin.data.extracts import _plain_numeric_columns
from unbin.spec import Spec, parse_spec

N = 1_000  # written in row groups of 128 rows: 8 groups, the last one short


def _arrow_table(seed: int = 5) -> pa.Table:
    """Every type an extract may hold, with missing values in some row groups only (the
    integers with nulls hold them in the last group alone: the first groups fit int32)."""
    rng = np.random.default_rng(seed)
    ints_late_null = rng.integers(-50, 50, N).astype(np.int32)
    late = np.zeros(N, dtype=bool)
    late[-20:] = rng.random(20) < 0.5
    late[-1] = True
    f64 = rng.normal(size=N)
    f64_mask = rng.random(N) < 0.1
    start = dt.date(2020, 1, 1)
    return pa.table({
        "id": pa.array(np.arange(N, dtype=np.int64)),
        "i8": pa.array(rng.integers(0, 3, N).astype(np.int8)),
        "u16": pa.array(rng.integers(0, 60_000, N).astype(np.uint16)),
        "i32_late_null": pa.array(ints_late_null, mask=late),
        "f32": pa.array(rng.normal(size=N).astype(np.float32)),
        "f64_null": pa.array(f64, mask=f64_mask),  # parquet nulls, not NaN
        "f64_nan": pa.array(np.where(rng.random(N) < 0.1, np.nan, f64)),
        "flag": pa.array(rng.random(N) < 0.5),
        "flag_null": pa.array(rng.random(N) < 0.5, mask=rng.random(N) < 0.1),
        "text": pa.array([None if i % 17 == 0 else f"c{i % 5}" for i in range(N)]),
        "coded": pa.array([f"lvl{i % 3}" for i in range(N)]).dictionary_encode(),
        "when": pa.array([start + dt.timedelta(days=int(d))
                          for d in rng.integers(0, 2000, N)], type=pa.date32()),
        "stamp": pa.array(rng.integers(0, 10**9, N) * 10**9, type=pa.timestamp("ns")),
    })


def _reference(path: Path, cols: list[str]) -> pd.DataFrame:
    return pq.read_table(path, columns=cols).to_pandas()


def test_a_parquet_file_without_pandas_metadata_reads_as_pyarrow_reads_it(
        tmp_path: Path) -> None:
    table = _arrow_table()
    path = tmp_path / "x.parquet"
    pq.write_table(table, path, row_group_size=128)
    assert pq.ParquetFile(path).metadata.num_row_groups == 8
    plain = _plain_numeric_columns(pq.ParquetFile(path), table.column_names)
    assert plain == {"id", "i8", "u16", "i32_late_null", "f32", "f64_null", "f64_nan"}
    # the requested order, not the file's; each subset read as pyarrow reads it
    for cols in (table.column_names, ["f64_null", "text", "i8", "when", "i32_late_null"],
                 ["i32_late_null"], ["u16", "flag_null", "coded", "stamp", "f32"]):
        got = read_extract(path, cols)
        want = _reference(path, cols)
        pd.testing.assert_frame_equal(got, want, check_exact=True)
        assert list(got.columns) == cols
    got = read_extract(path, ["i32_late_null", "f64_null", "f64_nan", "i8"])
    # the integers with nulls in their last group became floats with NaN there (as pyarrow
    # gives them); the integers without nulls kept their type
    assert got["i32_late_null"].dtype == np.float64 and got["i8"].dtype == np.int8
    assert got["i32_late_null"].isna().sum() == table["i32_late_null"].null_count > 0
    assert got["f64_null"].isna().sum() == table["f64_null"].null_count > 0
    assert np.array_equal(got["i32_late_null"].isna().to_numpy(),
                          table["i32_late_null"].is_null().to_numpy(zero_copy_only=False))


def test_a_parquet_file_written_by_pandas_keeps_its_types_and_index(tmp_path: Path) -> None:
    rng = np.random.default_rng(8)
    df = pd.DataFrame({
        "age": rng.normal(60, 10, N).round(1),
        "sex": rng.integers(0, 2, N).astype(np.int8),
        "visits": pd.array(np.where(rng.random(N) < 0.1, None, rng.integers(0, 9, N)),
                           dtype="Int64"),  # nullable: pandas metadata says Int64
        "centre": pd.Categorical(rng.choice(["north", "south", "east"], N)),
        "score": rng.normal(size=N).astype(np.float32),
    })
    cols = ["visits", "age", "centre", "sex", "score"]
    # written with the default index, with a range index that does not start at 0, with a
    # stored index column: pyarrow's reading restores what pandas wrote, and so does ours
    for name, frame, index in (("plain", df, False), ("shifted", df.set_axis(
            pd.RangeIndex(10, 10 + N)), True), ("stored", df.set_axis(
                pd.Index(rng.permutation(N) * 3)), True)):
        path = tmp_path / f"{name}.parquet"
        frame.to_parquet(path, index=index, row_group_size=100)
        got = read_extract(path, cols)
        pd.testing.assert_frame_equal(got, _reference(path, cols), check_exact=True)
        assert str(got["visits"].dtype) == "Int64" and got["centre"].dtype == "category"
    # pandas' own reader of the plain file: the same values and types
    pd.testing.assert_frame_equal(read_extract(tmp_path / "plain.parquet", cols),
                                  pd.read_parquet(tmp_path / "plain.parquet", columns=cols),
                                  check_exact=True)


def _spec(tmp_path: Path, analyses: list[dict[str, Any]]) -> Spec:
    return parse_spec({
        "study": "t", "cohorts": [{"name": "c", "path": "c.parquet"}],
        "groupings": {"crp": {"cuts": [3]}},
        "analyses": analyses}, tmp_path)


def _extract(seed: int = 4) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    n = 600
    df = pd.DataFrame({
        "crp": rng.lognormal(1, 0.6, n).round(2),
        "age": rng.normal(60, 9, n).round(1),
        "sex": rng.integers(0, 2, n).astype(np.int8),
        "event": rng.integers(0, 2, n).astype(np.int8),
        "years": rng.uniform(0.1, 8, n).round(2),
        "died": rng.integers(0, 2, n).astype(np.int8),
        "visits": rng.poisson(2, n).astype(np.int16),
        "py": rng.uniform(0, 4, n).round(1),  # some 0: dropped for the count analysis
        "ward": rng.choice(["a", "b", "c"], n),
        "unused": rng.normal(size=n),
    })
    for col, share in (("crp", 0.05), ("age", 0.08), ("years", 0.04), ("py", 0.03)):
        df.loc[rng.random(n) < share, col] = np.nan
    df.loc[rng.random(n) < 0.06, "ward"] = None
    return df


ANALYSES = [
    {"name": "bin", "outcome": {"type": "binary", "event": "event"}, "exposure": "crp",
     "adjust": ["age", "sex", "ward"]},
    {"name": "surv", "outcome": {"type": "survival", "time": "years", "event": "died"},
     "exposure": "crp", "adjust": ["age"], "by": "sex"},
    {"name": "count", "outcome": {"type": "count", "count": "visits", "persontime": "py"},
     "exposure": "crp", "adjust": ["ward", "age"]},
]


@pytest.mark.parametrize("which", range(len(ANALYSES)))
def test_the_sample_is_pandas_complete_cases_with_each_columns_drops_in_order(
        tmp_path: Path, which: int) -> None:
    df = _extract()
    df.to_parquet(tmp_path / "c.parquet", index=False, row_group_size=100)
    spec = _spec(tmp_path, ANALYSES)
    a = spec.analyses[which]
    frame = read_extract(tmp_path / "c.parquet", a.columns)
    before = frame.copy()
    sample = analysis_sample(frame, a, spec)
    pd.testing.assert_frame_equal(frame, before, check_exact=True)  # the extract untouched
    # the reference: pandas drops each column's missing rows in the spec's column order
    cur = df[list(dict.fromkeys(a.columns))]
    steps = []
    for c in dict.fromkeys(a.columns):
        steps.append((f"missing {c}", int(cur[c].isna().sum())))
        cur = cur.dropna(subset=[c])
    if a.outcome.type == "count":
        steps.append(("non-positive person-time (py <= 0)", int((cur["py"] <= 0).sum())))
        cur = cur[cur["py"] > 0]
    if a.outcome.type == "survival":
        steps.append(("non-positive follow-up (years <= 0)", int((cur["years"] <= 0).sum())))
    assert list(sample.dropped) == steps
    assert sum(n for _, n in steps) > 0
    want = cur.reset_index(drop=True)
    for c in {a.exposure, *a.outcome.columns}:
        want[c] = want[c].astype(float)
    pd.testing.assert_frame_equal(sample.frame, want, check_exact=True)
    assert isinstance(sample.frame.index, pd.RangeIndex)


def test_every_column_an_analysis_names_is_read_and_none_other(tmp_path: Path) -> None:
    # the registry benchmark's spec: its extract has columns no analysis uses
    import sys

    sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "benchmarks"))
    import registry

    spec_path = registry.write_inputs(tmp_path, 2_000, 2, 2)
    from unbin.spec import load_spec

    spec = load_spec(spec_path).for_cohort("registry")
    path = spec.cohort("registry").path
    for a in spec.analyses:
        named = {a.exposure, *a.adjust, *a.strata, *a.outcome.columns,
                 *([a.by] if a.by else [])}
        frame = read_extract(path, a.columns)
        assert named <= set(frame.columns), (a.name, named - set(frame.columns))
        assert not set(registry.UNUSED) & set(frame.columns)
        pd.testing.assert_frame_equal(frame, _reference(path, list(frame.columns)),
                                      check_exact=True)
        sample = analysis_sample(frame, a, spec)
        assert named <= set(sample.frame.columns)
        # dropping any named column from the extract is an error naming it, never a quiet
        # sample without it
        for col in named:
            with pytest.raises(Exception, match=col):
                analysis_sample(frame.drop(columns=[col]), a, spec)
