"""Extract readers, column checks and the analysis sample (unbin.data)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from unbin.data import (
    analysis_sample,
    data_problems,
    extract_columns,
    extract_rows,
    read_extract,
)
from unbin.errors import DataError
from unbin.spec import parse_spec


def _frame() -> pd.DataFrame:
    return pd.DataFrame({
        "patient": np.arange(1.0, 9.0),
        "age": [34.5, 61.0, 72.25, np.nan, 45.0, 80.0, 55.5, 66.0],
        "sex": [0.0, 1.0, 0.0, 1.0, 1.0, 0.0, 1.0, 0.0],
        "egfr": [30.0, 45.5, 60.0, np.nan, 90.0, 20.5, 75.0, 15.0],
        "died": [0.0, 1.0, 0.0, 1.0, 0.0, 1.0, np.nan, 1.0],
    })


@pytest.mark.parametrize("suffix", [".csv", ".parquet", ".dta"])
def test_readers_return_only_the_requested_columns(tmp_path: Path, suffix: str) -> None:
    # Round trip through the writers of pandas (CSV, parquet via pyarrow, Stata .dta).
    df = _frame()
    path = tmp_path / f"extract{suffix}"
    if suffix == ".csv":
        df.to_csv(path, index=False)
    elif suffix == ".parquet":
        df.to_parquet(path, index=False)
    else:
        df.to_stata(path, write_index=False)
    assert extract_columns(path) == list(df.columns)
    assert extract_rows(path) == len(df)
    got = read_extract(path, ["egfr", "age"])
    assert list(got.columns) == ["egfr", "age"]
    pd.testing.assert_frame_equal(got.reset_index(drop=True).astype(float), df[["egfr", "age"]])


def test_missing_column_suggests_the_nearest_name(tmp_path: Path) -> None:
    path = tmp_path / "extract.parquet"
    _frame().to_parquet(path, index=False)
    with pytest.raises(DataError) as err:
        read_extract(path, ["age", "egrf"])
    msg = str(err.value)
    assert "column 'egrf' is not in extract 'extract.parquet'" in msg
    assert "Did you mean 'egfr'?" in msg
    with pytest.raises(DataError, match="does not exist"):
        read_extract(tmp_path / "absent.csv", ["age"])
    with pytest.raises(DataError, match="unknown file type"):
        extract_columns(tmp_path / "extract.xlsx")


def _spec(tmp_path: Path, extract: str, **analysis: Any) -> Any:
    a = {"name": "death_egfr", "outcome": {"type": "binary", "event": "died"},
         "exposure": "egfr", "adjust": ["age", "sex"]}
    a.update(analysis)
    raw = {"study": "s", "cohorts": [{"name": "north", "path": extract}],
           "groupings": {"egfr": {"cuts": [30, 60]}, "age": {"cuts": [50, 70]}},
           "analyses": [a]}
    return parse_spec(raw, base=tmp_path)


def test_non_numeric_exposure_values_are_a_clear_problem(tmp_path: Path) -> None:
    text = ("patient,age,sex,egfr,died\n"
            "1,50,0,45,0\n2,61,1,<15,1\n3,70,0,unknown,0\n4,55,1,88,1\n5,48,0,<15,0\n"
            "6,52,1,n/a,0\n")  # 'n/a' is a missing-value marker for the CSV reader, not a problem
    (tmp_path / "north.csv").write_text(text, encoding="utf-8")
    spec = _spec(tmp_path, "north.csv")
    problems = data_problems(spec)
    assert len(problems) == 1, problems
    (msg,) = problems
    assert msg.startswith("analyses[death_egfr]:") and msg.endswith("(cohort north)")
    assert "column 'egfr' (exposure) must be numeric" in msg
    assert "'<15'" in msg and "'unknown'" in msg and "in 3 rows" in msg


def test_data_problems_finds_a_missing_extract_and_a_non_binary_event(tmp_path: Path) -> None:
    assert "does not exist" in data_problems(_spec(tmp_path, "gone.parquet"))[0]
    df = _frame().fillna({"died": 0.0})
    df.loc[0, "died"] = 2.0
    df.to_parquet(tmp_path / "north.parquet", index=False)
    (msg,) = data_problems(_spec(tmp_path, "north.parquet"))
    assert "'died' (outcome.event) must be coded 0/1" in msg


def test_analysis_sample_counts_dropped_rows_per_reason(tmp_path: Path) -> None:
    df = _frame()
    spec = _spec(tmp_path, "north.parquet", filters=[{"variable": "age", "min": 40}])
    a = spec.analyses[0]
    sample = analysis_sample(df, a, spec)
    # Counted independently: the filter drops ages < 40 (34.5) and a missing age (NaN >= 40 is
    # false), then complete cases drop the row with missing 'died' (row 7) and the row with
    # missing egfr (row 4, already dropped with its missing age).
    kept = df[(df["age"] >= 40)].dropna(subset=["died", "egfr", "age", "sex"])
    assert sample.n == len(kept) == 5
    assert sample.n_input == 8
    dropped = dict(sample.dropped)
    assert dropped["filter: age >= 40"] == 2
    assert dropped["missing died"] == 1
    assert dropped["missing egfr"] == 0
    assert sample.n_input - sum(dropped.values()) == sample.n
    np.testing.assert_array_equal(sample.frame["patient"], kept["patient"])


def test_count_sample_drops_non_positive_person_time(tmp_path: Path) -> None:
    df = pd.DataFrame({"visits": [1, 0, 3, 2, 5], "pyears": [1.0, 0.0, 2.0, -1.0, 3.0],
                       "bmi": [22.0, 27.0, np.nan, 31.0, 25.0]})
    raw = {"study": "s", "cohorts": [{"name": "c", "path": "c.csv"}],
           "groupings": {"bmi": {"cuts": [25, 30]}},
           "analyses": [{"name": "v", "outcome": {"type": "count", "count": "visits",
                                                  "persontime": "pyears"}, "exposure": "bmi"}]}
    spec = parse_spec(raw, base=tmp_path)
    sample = analysis_sample(df, spec.analyses[0], spec)
    dropped = dict(sample.dropped)
    assert dropped["missing bmi"] == 1
    assert dropped["non-positive person-time (pyears <= 0)"] == 2
    assert sample.n == 2 and list(sample.frame["visits"]) == [1.0, 5.0]


def test_a_non_numeric_value_is_located_by_row_and_csv_line(tmp_path: Path) -> None:
    """The message names the column, its role, the value and where the first one is (data row
    and the CSV line, counting the header line)."""
    from unbin.data import coerce_numeric, read_extract

    path = tmp_path / "extract.csv"
    rows = ["x,age"] + [f"{i},{40 + i}" for i in range(30)]
    rows[17] = "16,<40"  # data row 17, line 18 of the file
    path.write_text("\n".join(rows) + "\n", encoding="utf-8")
    df = read_extract(path, ["age"])
    with pytest.raises(DataError) as err:
        coerce_numeric(df, "age", "exposure")
    msg = str(err.value)
    assert "column 'age' (exposure) must be numeric" in msg and "'<40' in 1 rows" in msg
    assert "the first in data row 17 (line 18 of a CSV file with one header line)" in msg
    assert rows[17].endswith("<40") and path.read_text().splitlines()[17] == rows[17]
