"""Extracts as registries deliver them: CSV dialects (delimiter, decimal mark, encoding,
gzip), SPSS and Stata files with value labels, survival times from dates, and the attained-age
time scale. Every file here is written by another library (or by hand, byte by byte) than the
one that reads it."""

from __future__ import annotations

import datetime as dt
import gzip
import struct
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from unbin.data import analysis_sample, data_problems, extract_columns, extract_rows, read_extract
from unbin.data.extracts import csv_dialect
from unbin.errors import DataError, SpecError
from unbin.models import fit as _fit
from unbin.refit.analysis import build_outcome
from unbin.spec import load_spec, parse_spec
from unbin.spec.model import CsvDialect


def fit_model(X: np.ndarray, outcome: Any, names: tuple[str, ...]) -> Any:
    return _fit(outcome.family, X, outcome, names)


def _frame(n: int = 40, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    return pd.DataFrame({
        "id": np.arange(1, n + 1),
        "age": np.round(rng.uniform(40, 80, n), 2),
        "crp": np.round(rng.lognormal(1, 0.8, n), 3),
        "smoker": rng.integers(0, 2, n),
        "weight_kg": np.round(rng.normal(78, 12, n), 1),
    })


# -- CSV dialects ------------------------------------------------------------------------------

DIALECTS = [
    # delimiter, decimal, encoding, compressed
    (",", ".", "utf-8", False),
    (";", ",", "utf-8", False),
    (";", ",", "cp1252", False),
    ("\t", ".", "utf-8", True),
    ("|", ",", "latin-1", True),
    (";", ".", "utf-8-sig", False),
]


@pytest.mark.parametrize(("sep", "decimal", "encoding", "gz"), DIALECTS)
def test_each_csv_dialect_written_by_pandas_is_detected_and_read_by_pyarrow(
        tmp_path: Path, sep: str, decimal: str, encoding: str, gz: bool) -> None:
    # pandas writes (its own CSV writer); unbin detects the dialect and pyarrow's CSV reader
    # reads it. A non-ASCII column name checks the encoding.
    df = _frame().rename(columns={"weight_kg": "Gewicht_kg" if encoding == "utf-8" else "poids_é"})
    path = tmp_path / ("extract.csv.gz" if gz else "extract.csv")
    df.to_csv(path, sep=sep, decimal=decimal, encoding=encoding, index=False,
              compression="gzip" if gz else None)
    got = csv_dialect(path)
    assert (got.delimiter, got.decimal) == (sep, decimal)
    # cp1252 and latin-1 agree on these bytes; the detector names the Windows code page
    expected_enc = {"cp1252": "cp1252", "latin-1": "cp1252"}.get(encoding, encoding)
    if encoding == "utf-8" and gz is False and all(ord(c) < 128 for c in "".join(df.columns)):
        expected_enc = "utf-8"
    assert got.encoding == expected_enc
    assert extract_columns(path) == list(df.columns)
    assert extract_rows(path) == len(df)
    cols = [df.columns[4], "age", "crp"]
    back = read_extract(path, cols)
    pd.testing.assert_frame_equal(back.astype(float), df[cols].astype(float))


def test_a_semicolon_decimal_comma_extract_passes_the_check(tmp_path: Path) -> None:
    """The usual European export: ';'-separated with decimal commas; the check reads it without
    any csv block in the spec."""
    text = "x;age;y;t;d;e\n" + "".join(
        f"{i};{50 + i % 30},5;{i % 2};{1 + i % 7},25;{i % 3 == 0:d};{0.1 * i:.1f}\n".replace(
            ".", ",") for i in range(60))
    (tmp_path / "north.csv").write_text(text, encoding="utf-8")
    raw = {"study": "s", "cohorts": [{"name": "north", "path": "north.csv"}],
           "groupings": {"age": {"cuts": [60, 70]}},
           "analyses": [{"name": "a", "outcome": {"type": "binary", "event": "y"},
                         "exposure": "age"}]}
    spec = parse_spec(raw, base=tmp_path)
    assert data_problems(spec) == []
    back = read_extract(tmp_path / "north.csv", ["age", "t"])
    # Written values, parsed independently: '50,5' is 50.5
    np.testing.assert_array_equal(back["age"], [50 + i % 30 + 0.5 for i in range(60)])
    np.testing.assert_array_equal(back["t"], [1 + i % 7 + 0.25 for i in range(60)])


def test_the_spec_wins_over_detection_and_a_joined_header_names_the_delimiter(
        tmp_path: Path) -> None:
    path = tmp_path / "north.csv"
    _frame().to_csv(path, sep=";", decimal=",", index=False)
    raw = {"study": "s", "cohorts": [{"name": "north", "path": "north.csv",
                                      "csv": {"delimiter": ","}}],
           "groupings": {"age": {"cuts": [60, 70]}},
           "analyses": [{"name": "a", "outcome": {"type": "binary", "event": "smoker"},
                         "exposure": "age"}]}
    spec = parse_spec(raw, base=tmp_path)
    problems = data_problems(spec)
    assert problems and all("semicolon-separated" in p for p in problems)
    assert "csv.delimiter: ';'" in problems[0]
    with pytest.raises(DataError, match="one column: the file looks semicolon-separated"):
        read_extract(path, ["age"], CsvDialect(delimiter=","))
    # the decimal mark given in the spec is used even where detection would find another
    back = read_extract(path, ["age"], CsvDialect(delimiter=";", decimal="."))
    assert back["age"].dtype == object  # '52,33' is not a number with a decimal point
    with pytest.raises(DataError, match=r"must be numeric.*'"):
        from unbin.data import coerce_numeric
        coerce_numeric(back, "age", "exposure")


def test_a_large_csv_is_read_by_pyarrow_not_by_the_pandas_parser(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # Several of pyarrow's 1 MiB blocks, written row by row with the standard library's csv
    # module; pandas' CSV parser is switched off to show it is not used.
    import csv

    n = 100_000
    rng = np.random.default_rng(11)
    x = np.round(rng.normal(size=n), 6)
    path = tmp_path / "big.csv"
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, delimiter=";")
        w.writerow(["id", "x", "label"])
        for i in range(n):
            w.writerow([i, f"{x[i]:.6f}".replace(".", ","), f"row {i}"])
    assert path.stat().st_size > 2 * (1 << 20)

    def refuse(*args: Any, **kwargs: Any) -> None:
        raise AssertionError("pandas.read_csv was called")

    monkeypatch.setattr(pd, "read_csv", refuse)
    back = read_extract(path, ["x", "id"])
    assert len(back) == n
    np.testing.assert_array_equal(back["x"].to_numpy(), x)
    np.testing.assert_array_equal(back["id"].to_numpy(), np.arange(n))


def test_a_value_that_does_not_fit_the_first_block_is_read_wider(tmp_path: Path) -> None:
    """pyarrow infers types from its first 1 MiB block; a decimal or a text value far down
    the file widens the column instead of failing the read (file written as plain text)."""
    from unbin.data import coerce_numeric

    n = 150_000
    dose = [str(i % 50) for i in range(n)]
    dose[-3] = "2,5"
    when = [f"2020-01-0{1 + i % 9}" for i in range(n)]
    when[-2] = "unknown"
    path = tmp_path / "late.csv"
    path.write_text("id;dose;when\n" + "".join(
        f"{i};{d};{w}\n" for i, (d, w) in enumerate(zip(dose, when, strict=True))),
        encoding="utf-8")
    assert path.stat().st_size > 2 * (1 << 20)
    back = read_extract(path, ["dose", "when"], CsvDialect(decimal=","))
    expected = [float(d.replace(",", ".")) for d in dose]
    np.testing.assert_array_equal(back["dose"].to_numpy(), expected)
    assert back["when"].iloc[-2] == "unknown" and back["when"].iloc[-1] == "2020-01-06"
    # Detected from the first 64 KiB (whole numbers only), the decimal mark stays '.'; the
    # check then names the fix.
    detected = read_extract(path, ["dose"])
    with pytest.raises(DataError, match="decimal comma: set the cohort's csv.decimal: ','"):
        coerce_numeric(detected, "dose", "exposure")


def test_an_undecodable_csv_and_a_broken_gzip_are_clear_errors(tmp_path: Path) -> None:
    path = tmp_path / "x.csv"
    path.write_bytes("age;név\n1;é\n".encode("cp1252"))
    with pytest.raises(DataError, match="cannot be decoded as 'utf-8'.*csv.encoding"):
        read_extract(path, ["age"], CsvDialect(encoding="utf-8"))
    assert extract_columns(path) == ["age", "név"]  # detected: Windows-1252
    bad = tmp_path / "y.csv.gz"
    bad.write_bytes(b"not gzip at all")
    with pytest.raises(DataError, match="not a readable gzip file"):
        extract_columns(bad)


# -- SPSS and Stata, value labels ------------------------------------------------------------

def _write_sav(path: Path, columns: dict[str, list[float]], labels: dict[str, dict[int, str]],
               ) -> None:
    """A minimal uncompressed SPSS system file written byte by byte, following the record
    layout of the GNU PSPP developers' guide ('System File Format': file header, variable
    records, value-label records 3 and 4, long variable names 7/13, dictionary termination
    999, then one 8-byte float per variable and case; system-missing is -DBL_MAX)."""
    names = list(columns)
    n = len(columns[names[0]])
    out = bytearray(b"$FL2" + b"@(#) hand-written unbin test file".ljust(60))
    out += struct.pack("<iiiii", 2, len(names), 0, 0, n) + struct.pack("<d", 100.0)
    out += b"03 Dec 26" + b"12:00:00" + b"".ljust(64) + b"\0\0\0"
    fmt = (5 << 16) | (8 << 8) | 2  # F8.2
    short = [f"V{i + 1}" for i in range(len(names))]
    for s in short:
        out += struct.pack("<iiiiii", 2, 0, 0, 0, fmt, fmt) + s.encode().ljust(8)
    for i, name in enumerate(names):
        if name not in labels:
            continue
        out += struct.pack("<ii", 3, len(labels[name]))
        for code, text in labels[name].items():
            b = text.encode()
            out += struct.pack("<d", float(code)) + bytes([len(b)]) + b + b" " * (-(len(b) + 1) % 8)
        out += struct.pack("<iii", 4, 1, i + 1)
    long_names = "\t".join(f"{s}={name}" for s, name in zip(short, names, strict=True)).encode()
    out += struct.pack("<iiii", 7, 13, 1, len(long_names)) + long_names
    out += struct.pack("<ii", 999, 0)
    for r in range(n):
        for name in names:
            v = columns[name][r]
            out += struct.pack("<d", -sys.float_info.max if v != v else float(v))
    path.write_bytes(bytes(out))


def _labelled_cohort(n: int = 300, seed: int = 5) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    region = rng.integers(1, 4, n)  # 1 north, 2 coast, 3 hills
    crp = np.round(rng.lognormal(1, 0.6, n), 2)
    lp = -1.0 + 0.3 * np.log(crp) + np.array([0.0, 0.5, -0.4])[region - 1]
    y = (rng.random(n) < 1 / (1 + np.exp(-lp))).astype(float)
    return pd.DataFrame({"crp": crp, "region": region.astype(float), "stroke": y})


REGION_LABELS = {1: "north", 2: "coast", 3: "hills"}


def test_an_spss_file_written_by_hand_is_read_with_its_value_labels(tmp_path: Path) -> None:
    df = _labelled_cohort()
    df.loc[3, "crp"] = np.nan
    path = tmp_path / "cohort.sav"
    _write_sav(path, {c: df[c].tolist() for c in df}, {"region": REGION_LABELS})
    assert extract_columns(path) == ["crp", "region", "stroke"]
    assert extract_rows(path) == len(df)
    back = read_extract(path, ["region", "crp"])
    pd.testing.assert_frame_equal(back, df[["region", "crp"]], check_dtype=False)
    assert back.attrs["value_labels"] == {"region": {1.0: "north", 2.0: "coast", 3.0: "hills"}}


@pytest.mark.parametrize("kind", ["sav", "dta"])
def test_value_labels_become_the_levels_of_a_categorical_adjuster(tmp_path: Path, kind: str
                                                                   ) -> None:
    """SPSS (written by hand) and Stata (written by pandas, its labels read through
    pyreadstat): the labelled region is a factor with the labels as levels, the lowest code the
    reference; the fit equals statsmodels' logistic fit with the same indicators."""
    import statsmodels.api as sm

    from unbin.refit.analysis import adjustment_terms

    df = _labelled_cohort()
    path = tmp_path / f"cohort.{kind}"
    if kind == "sav":
        _write_sav(path, {c: df[c].tolist() for c in df}, {"region": REGION_LABELS})
    else:
        out = df.copy()
        out["region"] = pd.Categorical.from_codes(df["region"].astype(int) - 1,
                                                  ["north", "coast", "hills"])
        out.to_stata(path, write_index=False)  # codes 0, 1, 2 with their labels
    raw = {"study": "s", "cohorts": [{"name": "c", "path": path.name}],
           "groupings": {"crp": {"cuts": [2, 4]}},
           "analyses": [{"name": "a", "outcome": {"type": "binary", "event": "stroke"},
                         "exposure": "crp", "adjust": ["region"]}]}
    spec = parse_spec(raw, base=tmp_path)
    a = spec.analyses[0]
    frame = read_extract(path, a.columns)
    sample = analysis_sample(frame, a, spec)
    assert list(sample.frame["region"].cat.categories) == ["north", "coast", "hills"]
    (term,) = adjustment_terms(sample.frame, a, spec, "legacy")
    assert term.names() == ("region[coast]", "region[hills]")  # 'north' (lowest code) is ref
    # Independent design: indicators of the written codes, statsmodels' logistic fit
    X = np.column_stack([np.log(df["crp"]), df["region"] == 2, df["region"] == 3]).astype(float)
    ours = fit_model(np.column_stack([np.log(sample.frame["crp"]), term.basis(
        sample.frame["region"])]), build_outcome(sample, a), ("lcrp", *term.names()))
    ref = sm.Logit(df["stroke"], sm.add_constant(X)).fit(disp=0)
    np.testing.assert_allclose(ours.coef[1:], ref.params[1:], rtol=1e-6)


# -- survival times from dates -------------------------------------------------------------

def _dated_cohort(n: int = 400, seed: int = 9) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    start = pd.Timestamp("2012-01-01") + pd.to_timedelta(rng.integers(0, 1500, n), unit="D")
    days = rng.integers(2, 4000, n)
    end = start + pd.to_timedelta(days, unit="D")
    recruited = start + pd.to_timedelta(np.floor(rng.uniform(0, 0.5, n) * days), unit="D")
    return pd.DataFrame({"enrolled": start, "recruited": recruited, "exit": end,
                         "died": (rng.random(n) < 0.3).astype(float),
                         "ldl": np.round(rng.normal(3.4, 0.9, n), 2),
                         "age": np.round(rng.uniform(45, 75, n), 2)})


def _surv_spec(tmp_path: Path, path: str, outcome: dict[str, Any], **cohort: Any) -> Any:
    raw = {"study": "s", "cohorts": [{"name": "c", "path": path, **cohort}],
           "groupings": {"ldl": {"cuts": [3, 4]}},
           "analyses": [{"name": "a", "outcome": {"type": "survival", "event": "died",
                                                  **outcome},
                         "exposure": "ldl"}]}
    return parse_spec(raw, base=tmp_path)


@pytest.mark.parametrize("date_format", [None, "%d.%m.%Y"])
def test_durations_from_dates_equal_precomputed_durations_and_give_the_same_fit(
        tmp_path: Path, date_format: str | None) -> None:
    df = _dated_cohort()
    # Precomputed independently with the standard library's date arithmetic.
    def years(col: str) -> np.ndarray:
        return np.array([(e.date() - s.date()).days
                         for s, e in zip(df["enrolled"], df[col], strict=True)]) / 365.25

    df["years"], df["entry_years"] = years("exit"), years("recruited")
    written = df.copy()
    if date_format:
        for c in ("enrolled", "recruited", "exit"):
            written[c] = written[c].dt.strftime(date_format)
    written.to_csv(tmp_path / "c.csv", sep=";", decimal=",", index=False)
    csv_block = {"csv": {"date_format": date_format}} if date_format else {}
    dated = _surv_spec(tmp_path, "c.csv", {"time": {"start": "enrolled", "end": "exit",
                                                     "entry": "recruited", "unit": "years"}},
                       **csv_block)
    ready = _surv_spec(tmp_path, "c.csv", {"time": "years", "entry": "entry_years"})
    assert data_problems(dated) == []
    samples = []
    for spec in (dated, ready):
        a = spec.analyses[0]
        samples.append(analysis_sample(read_extract(spec.cohorts[0].path, a.columns,
                                                    spec.cohorts[0].csv), a, spec))
    s_dated, s_ready = samples
    assert s_dated.n == s_ready.n == len(df)
    np.testing.assert_allclose(s_dated.frame["time_on_study"], df["years"], rtol=1e-9)
    np.testing.assert_allclose(s_dated.frame["time_at_entry"], df["entry_years"], rtol=1e-9)
    fits = [fit_model(s.frame[["ldl"]].to_numpy(float), build_outcome(s, sp.analyses[0]), ("ldl",))
            for s, sp in ((s_dated, dated), (s_ready, ready))]
    np.testing.assert_allclose(fits[0].coef, fits[1].coef, rtol=1e-9)
    np.testing.assert_allclose(fits[0].cov, fits[1].cov, rtol=1e-9)


def test_impossible_orders_are_dropped_in_their_own_steps(tmp_path: Path) -> None:
    df = _dated_cohort(n=300, seed=2)
    df.loc[[5, 17, 40], "exit"] = df.loc[[5, 17, 40], "enrolled"] - pd.Timedelta(days=30)
    df.loc[[8, 9], "exit"] = pd.NaT
    df.to_parquet(tmp_path / "c.parquet", index=False)
    study_end = "2019-12-31"
    spec = _surv_spec(tmp_path, "c.parquet", {"time": {"start": "enrolled", "end": "exit",
                                                       "unit": "days", "study_end": study_end}})
    a = spec.analyses[0]
    sample = analysis_sample(read_extract(tmp_path / "c.parquet", a.columns), a, spec)
    steps = dict(sample.dropped)
    # Counted by brute force on the written frame
    stop = pd.Timestamp(study_end)
    complete = df.dropna(subset=["exit"])
    backwards = complete["exit"] < complete["enrolled"]
    late_event = ~backwards & (complete["died"] == 1) & (complete["exit"] > stop)
    assert steps["missing exit"] == 2
    assert steps["follow-up ends before it starts (exit < enrolled)"] == int(backwards.sum()) == 3
    assert steps[f"event after the study end (exit > {study_end} with died = 1)"] == int(
        late_event.sum()) > 0
    kept = complete[~backwards & ~late_event]
    days = [(min(e, stop) - s).days for s, e in zip(kept["enrolled"], kept["exit"], strict=True)]
    positive = np.array(days) > 0
    assert steps["non-positive follow-up (time_on_study <= 0)"] == int((~positive).sum())
    np.testing.assert_array_equal(sample.frame["time_on_study"], np.array(days)[positive])
    assert sample.n_input - sum(steps.values()) == sample.n


def test_dates_that_are_not_dates_are_a_clear_problem(tmp_path: Path) -> None:
    text = "enrolled;exit;died;ldl\n2015-03-01;2019-02-11;1;3,1\n2016-13-40;2020-01-01;0;2,8\n"
    (tmp_path / "c.csv").write_text(text, encoding="utf-8")
    spec = _surv_spec(tmp_path, "c.csv", {"time": {"start": "enrolled", "end": "exit"}})
    (msg,) = data_problems(spec)
    assert "column 'enrolled' (outcome.time.start)" in msg and "'2016-13-40'" in msg
    assert "csv.date_format" in msg


def test_stata_dates_written_by_pyreadstat_give_the_durations(tmp_path: Path) -> None:
    """A Stata file written by pyreadstat (ReadStat's writer: %td dates, value labels), its
    data read by pandas' Stata reader: the durations equal the standard library's date
    arithmetic."""
    import pyreadstat

    df = _dated_cohort(n=50, seed=4)
    written = df.assign(enrolled=df["enrolled"].dt.date, exit=df["exit"].dt.date)
    written = written.drop(columns="recruited")
    pyreadstat.write_dta(written, str(tmp_path / "c.dta"),
                         variable_value_labels={"died": {0: "alive", 1: "dead"}})
    spec = _surv_spec(tmp_path, "c.dta", {"time": {"start": "enrolled", "end": "exit",
                                                    "unit": "days"}})
    a = spec.analyses[0]
    frame = read_extract(tmp_path / "c.dta", a.columns)
    assert frame.attrs["value_labels"] == {"died": {0: "alive", 1: "dead"}}
    sample = analysis_sample(frame, a, spec)
    days = [(e.date() - s.date()).days for s, e in zip(df["enrolled"], df["exit"], strict=True)]
    np.testing.assert_array_equal(sample.frame["time_on_study"], days)
    assert set(sample.frame["died"]) <= {0.0, 1.0}  # an outcome keeps its codes


# -- the attained-age time scale ------------------------------------------------------------

def _age_scale_cohort(n: int, seed: int, beta: float) -> pd.DataFrame:
    """Gompertz hazard in attained age, h(a) = 2e-3 exp(0.09 (a - 40)) exp(beta x): people are
    recruited at ages 40-75 and followed from then on (left truncation at the recruitment
    age), up to 12 years, censored uniformly. Event ages are drawn by inverting the cumulative
    hazard from the recruitment age."""
    rng = np.random.default_rng(seed)
    age0 = np.round(rng.uniform(40, 75, n), 3)
    x = rng.normal(size=n)
    lam, g = 2e-3, 0.09
    e = rng.exponential(size=n) / (lam * np.exp(beta * x))
    # H(a) - H(a0) = lam/g (exp(g(a-40)) - exp(g(a0-40))) = e  ->  a
    age_event = 40 + np.log(np.exp(g * (age0 - 40)) + g * e * 1.0) / g
    follow = np.minimum(age_event - age0, rng.uniform(2, 12, n))
    died = (age_event - age0 <= follow).astype(float)
    start = pd.Timestamp("2010-01-01") + pd.to_timedelta(rng.integers(0, 700, n), unit="D")
    end = start + pd.to_timedelta(np.maximum(np.round(follow * 365.25), 1), unit="D")
    return pd.DataFrame({"recruited": start, "last_seen": end, "died": died, "x": x,
                         "age": age0})


def _age_spec(tmp_path: Path, path: str, duration: str | None = None) -> Any:
    time = duration or {"start": "recruited", "end": "last_seen", "unit": "years"}
    raw = {"study": "s", "cohorts": [{"name": "c", "path": path}],
           "groupings": {"x": {"cuts": [0]}},
           "analyses": [{"name": "a", "outcome": {
               "type": "survival", "event": "died", "time_scale": "attained_age", "age": "age",
               "time": time, "horizon": 80}, "exposure": "x"}]}
    return parse_spec(raw, base=tmp_path)


@pytest.mark.parametrize("given", ["dates", "duration"])
def test_an_attained_age_cox_fit_equals_lifelines_with_entry_col(tmp_path: Path, given: str
                                                                  ) -> None:
    from lifelines import CoxPHFitter

    df = _age_scale_cohort(800, 4, beta=0.4)
    df["years"] = (df["last_seen"] - df["recruited"]).dt.days / 365.25
    df.to_parquet(tmp_path / "c.parquet", index=False)
    spec = _age_spec(tmp_path, "c.parquet", "years" if given == "duration" else None)
    a = spec.analyses[0]
    sample = analysis_sample(read_extract(tmp_path / "c.parquet", a.columns), a, spec)
    ours = fit_model(sample.frame[["x"]].to_numpy(float), build_outcome(sample, a), ("x",))
    # The same data on the age scale, built independently: entry and exit ages in years
    ref = df.assign(exit_age=df["age"] + (df["last_seen"] - df["recruited"]).dt.days / 365.25)
    cph = CoxPHFitter().fit(ref[["exit_age", "died", "x", "age"]], duration_col="exit_age",
                            event_col="died", entry_col="age")
    np.testing.assert_allclose(ours.coef, cph.params_.to_numpy(), rtol=1e-6)
    np.testing.assert_allclose(np.sqrt(np.diag(ours.cov)), cph.standard_errors_.to_numpy(),
                               rtol=1e-5)
    # The horizon says its scale: an age, in years
    from unbin.refit.risk import risk_scale

    assert risk_scale(a, spec).label == "probability of died by attained_age = 80 years"


def test_attained_age_intervals_cover_the_true_hazard_ratio(tmp_path: Path) -> None:
    """Operating characteristic: 150 seeded cohorts (n = 300) with a true log hazard ratio of
    0.4 on the attained-age scale with left truncation; the 95% Wald intervals of the
    attained-age fit must cover it in 95% of them (two-sided binomial band 0.90-0.99 for 150
    replicates, about 2.5 Monte-Carlo SEs)."""
    beta, reps, cover = 0.4, 150, 0
    path = tmp_path / "c.parquet"
    spec = _age_spec(tmp_path, "c.parquet")
    a = spec.analyses[0]
    for r in range(reps):
        _age_scale_cohort(300, 1000 + r, beta).to_parquet(path, index=False)
        sample = analysis_sample(read_extract(path, a.columns), a, spec)
        fit = fit_model(sample.frame[["x"]].to_numpy(float), build_outcome(sample, a), ("x",))
        se = float(np.sqrt(fit.cov[0, 0]))
        cover += abs(float(fit.coef[0]) - beta) <= 1.959964 * se
    assert 0.90 <= cover / reps <= 0.99, cover / reps


# -- spec keys ----------------------------------------------------------------------------

def test_follow_up_and_csv_keys_are_checked(tmp_path: Path) -> None:
    base = {"study": "s", "groupings": {"x": {"cuts": [0]}}}

    def problems(outcome: dict[str, Any], cohort: dict[str, Any] | None = None) -> str:
        raw = {**base, "cohorts": [{"name": "c", "path": "c.csv", **(cohort or {})}],
               "analyses": [{"name": "a", "outcome": {"type": "survival", "event": "d",
                                                      **outcome}, "exposure": "x"}]}
        with pytest.raises(SpecError) as err:
            parse_spec(raw, base=tmp_path)
        return str(err.value)

    dates = {"start": "s0", "end": "s1"}
    assert "needs 'age'" in problems({"time": dates, "time_scale": "attained_age"})
    assert "used only with time_scale: attained_age" in problems({"time": "t", "age": "a"})
    assert "use unit: years" in problems({"time": {**dates, "unit": "months"},
                                          "time_scale": "attained_age", "age": "a"})
    assert "not a calendar date" in problems({"time": {**dates, "study_end": "2024-02-30"}})
    assert "'31.12.2024' is not a date written YYYY-MM-DD" in problems(
        {"time": {**dates, "study_end": "31.12.2024"}})
    assert "unknown key 'ends'. Did you mean 'end'?" in problems({"time": {"start": "s0",
                                                                           "ends": "s1"}})
    assert "'end' is a required property" in problems({"time": {"start": "s0"}})
    assert "is neither a column name nor" in problems({"time": 5})
    assert "given twice" in problems({"time": {**dates, "entry": "r"}, "entry": "e"})
    assert "not a known text encoding" in problems({"time": "t"}, {"csv": {"encoding": "utf-9"}})
    assert "does not read back a whole date" in problems({"time": "t"},
                                                         {"csv": {"date_format": "%d.%m"}})
    assert "both ','" in problems({"time": "t"}, {"csv": {"delimiter": ",", "decimal": ","}})
    msg = problems({"time": "t"}, {"path": "c.parquet", "csv": {"decimal": ","}})
    assert ".csv and .csv.gz extracts only" in msg


def test_an_unquoted_yaml_date_is_a_study_end(tmp_path: Path) -> None:
    (tmp_path / "spec.yaml").write_text(
        "study: s\ncohorts: [{name: c, path: c.csv, csv: {delimiter: ';', decimal: ','}}]\n"
        "groupings: {x: {cuts: [0]}}\n"
        "analyses:\n  - name: a\n    exposure: x\n    outcome:\n      type: survival\n"
        "      event: d\n      time: {start: s0, end: s1, unit: days, study_end: 2024-06-30}\n",
        encoding="utf-8")
    spec = load_spec(tmp_path / "spec.yaml")
    f = spec.analyses[0].outcome.followup
    assert f is not None and f.study_end == "2024-06-30" and f.unit == "days"
    assert spec.cohorts[0].csv == CsvDialect(delimiter=";", decimal=",")
    assert spec.analyses[0].columns == ("d", "s0", "s1", "x")
    assert spec.analyses[0].outcome.time == "time_on_study"
    # the cohort's csv block is part of what decides a rerun
    assert spec.slice_for("a", "c")["cohort_csv"] == {"c": {"delimiter": ";", "decimal": ","}}
    assert dt.date.fromisoformat(f.study_end)


def test_gzip_csv_written_by_the_standard_library(tmp_path: Path) -> None:
    path = tmp_path / "c.csv.gz"
    with gzip.open(path, "wt", encoding="utf-8") as fh:
        fh.write("id\tage\n1\t50.5\n2\t61.25\n")
    assert read_extract(path, ["age"])["age"].tolist() == [50.5, 61.25]


# -- a SAS file written by SAS-format software outside the project ---------------------------

IRIS_SAS = Path(__file__).parent / "files" / "iris.sas7bdat"


def test_a_sas7bdat_shipped_by_a_package_is_read_and_fitted() -> None:
    """The iris data as the R package haven ships them in SAS format (tests/data/files/README.md).
    unbin reads it through pyreadstat; pandas' own SAS reader is the independent reader. The
    column means are Fisher's (1936) published iris means (5.843, 3.057, 3.758, 1.199 cm), and a
    linear analysis on the file equals statsmodels' OLS on pandas' reading of it."""
    import statsmodels.api as sm

    from unbin.refit.analysis import adjustment_terms

    assert extract_columns(IRIS_SAS) == ["Sepal_Length", "Sepal_Width", "Petal_Length",
                                         "Petal_Width", "Species"]
    assert extract_rows(IRIS_SAS) == 150
    ref = pd.read_sas(IRIS_SAS, encoding="utf-8")
    ours = read_extract(IRIS_SAS, ["Petal_Length", "Sepal_Length", "Species"])
    np.testing.assert_allclose(ours[["Petal_Length", "Sepal_Length"]], ref[["Petal_Length",
                                                                            "Sepal_Length"]])
    assert list(ours["Species"]) == list(ref["Species"])
    np.testing.assert_allclose(ref.iloc[:, :4].mean().to_numpy(), [5.843, 3.057, 3.758, 1.199],
                               atol=5e-4)  # Fisher (1936), to the published three decimals
    raw = {"study": "s", "cohorts": [{"name": "c", "path": str(IRIS_SAS)}],
           "groupings": {"Sepal_Length": {"cuts": [5.5, 6.5]}},
           "analyses": [{"name": "a", "outcome": {"type": "continuous", "value": "Petal_Length"},
                         "exposure": "Sepal_Length", "adjust": ["Species"]}]}
    spec = parse_spec(raw, base=IRIS_SAS.parent)
    a = spec.analyses[0]
    sample = analysis_sample(read_extract(IRIS_SAS, a.columns), a, spec)
    (term,) = adjustment_terms(sample.frame, a, spec, "legacy")
    # the file stores Species in 6 characters (both readers give 'versic', 'virgin')
    assert term.names() == ("Species[versic]", "Species[virgin]")
    x = sample.frame["Sepal_Length"].to_numpy(float)
    fitted = fit_model(np.column_stack([x, term.basis(sample.frame["Species"])]),
                       build_outcome(sample, a), ("x", *term.names()))
    X = sm.add_constant(np.column_stack([ref["Sepal_Length"], ref["Species"] == "versic",
                                         ref["Species"] == "virgin"]).astype(float))
    ols = sm.OLS(ref["Petal_Length"], X).fit()
    np.testing.assert_allclose(fitted.coef, ols.params, rtol=1e-8)
    np.testing.assert_allclose(np.sqrt(np.diag(fitted.cov)), ols.bse, rtol=1e-6)
