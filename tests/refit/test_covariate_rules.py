"""The README's covariate and sample rules, one test each: numeric columns with at most 5
distinct values enter as factors unless ``variables.<name>.type`` says otherwise; grouped
adjusters enter in their legacy groups; survival rows with time <= entry are dropped and counted;
a real Stata file that a package ships is read."""

from __future__ import annotations

import json
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf

from unbin.data import extract_columns, extract_rows, read_extract
from unbin.pipeline.jobs import analyse
from unbin.questions.fits import fits_table
from unbin.spec import parse_spec


def _frame(seed: int, n: int = 800) -> pd.DataFrame:
    """Invented: a kidney marker, disease stage 1-4 (numeric codes), a score with 6 values,
    age, and a binary outcome depending on all of them."""
    rng = np.random.default_rng(seed)
    marker = rng.normal(60.0, 15.0, n)
    stage = rng.integers(1, 5, n).astype(float)
    score = rng.integers(0, 6, n).astype(float)  # 6 distinct values
    age = rng.uniform(30.0, 85.0, n).round(0)
    lp = -1.0 - 0.02 * (marker - 60) + 0.3 * (stage == 3) + 0.6 * (stage == 4) + 0.1 * score \
        + 0.02 * (age - 55)
    y = (rng.random(n) < 1 / (1 + np.exp(-lp))).astype(float)
    return pd.DataFrame({"marker": marker, "stage": stage, "score": score, "age": age, "y": y})


def _spec_fits(refit_frame: Any, one_analysis: Any, frame: pd.DataFrame, adjust: list[str],
               **extra: Any) -> pd.DataFrame:
    raw = one_analysis({"type": "binary", "event": "y"}, "marker", {"cuts": [45, 60]},
                       continuous={"forms": ["linear"]}, **extra)
    raw["analyses"][0]["adjust"] = adjust
    spec, r = refit_frame(frame, raw)
    return fits_table(r, spec)


def _row(fits: pd.DataFrame, form: str, coding: str) -> pd.Series:
    return fits[(fits["form"] == form) & (fits["adjustment"] == coding)].iloc[0]


def _terms(row: pd.Series) -> dict[str, str]:
    return {t["variable"]: t["term"] for t in json.loads(row["adjustment_terms"])}


def test_numeric_columns_with_few_values_enter_as_factors(refit_frame: Any,
                                                          one_analysis: Any) -> None:
    # README: numeric columns with at most 5 distinct values enter as factors (first sorted
    # level as reference). Reference library: statsmodels GLM binomial with C(stage) (treatment
    # coding, lowest level as reference) and score linear (6 values: not a factor).
    frame = _frame(1)
    fits = _spec_fits(refit_frame, one_analysis, frame, ["stage", "score"])
    row = _row(fits, "linear", "legacy")
    assert _terms(row) == {"stage": "categorical", "score": "linear"}
    assert json.loads(row["adjustment_terms"])[0]["levels"] == ["1.0", "2.0", "3.0", "4.0"]
    ref = smf.glm("y ~ marker + C(stage) + score", frame,
                  family=sm.families.Binomial()).fit(tol=1e-12)
    assert row["loglik"] == pytest.approx(ref.llf, rel=1e-10)
    assert row["n_params"] == len(ref.params) == 6
    # The factor coding matters: stage entered linearly gives a different fit.
    linear_stage = smf.glm("y ~ marker + stage + score", frame,
                           family=sm.families.Binomial()).fit(tol=1e-12)
    assert abs(linear_stage.llf - ref.llf) > 0.05  # far beyond the 1e-10 agreement above
    # Under continuous adjustment the factor stays a factor; the 6-valued score becomes a spline.
    cont = _terms(_row(fits, "linear", "continuous"))
    assert cont == {"stage": "categorical", "score": "spline"}


def test_variable_type_overrides_the_factor_rule(refit_frame: Any, one_analysis: Any) -> None:
    # README: `variables.<name>.type` overrides the rule both ways. Reference: statsmodels GLM
    # binomial with stage linear and score as C(score).
    frame = _frame(2)
    fits = _spec_fits(refit_frame, one_analysis, frame, ["stage", "score"],
                      variables={"stage": {"type": "numeric"}, "score": {"type": "categorical"}})
    row = _row(fits, "linear", "legacy")
    assert _terms(row) == {"stage": "linear", "score": "categorical"}
    ref = smf.glm("y ~ marker + stage + C(score)", frame,
                  family=sm.families.Binomial()).fit(tol=1e-12)
    assert row["loglik"] == pytest.approx(ref.llf, rel=1e-10)
    assert row["n_params"] == len(ref.params) == 8


def test_grouped_adjusters_enter_in_their_legacy_groups(refit_frame: Any,
                                                        one_analysis: Any) -> None:
    # README: "legacy adjustment (grouped variables in their legacy groups ...)". Reference
    # library: statsmodels GLM binomial with age indicators built by pandas (pd.cut, right=False:
    # closed left, value 50 and 70 go to the group above) and the marker's groups likewise.
    frame = _frame(3)
    frame.loc[:9, "age"] = 50.0  # values on a cut: the cut semantics matter
    frame.loc[10:19, "age"] = 70.0
    raw = one_analysis({"type": "binary", "event": "y"}, "marker", {"cuts": [45, 60]},
                       continuous={"forms": ["linear"]})
    raw["groupings"]["age"] = {"cuts": [50, 70]}
    raw["analyses"][0]["adjust"] = ["age"]
    spec, r = refit_frame(frame, raw)
    fits = fits_table(r, spec)
    d = frame.assign(
        agegrp=pd.cut(frame["age"], [-np.inf, 50, 70, np.inf], right=False, labels=False),
        mgrp=pd.cut(frame["marker"], [-np.inf, 45, 60, np.inf], right=False, labels=False))
    for form, formula in (("legacy", "y ~ C(mgrp) + C(agegrp)"),
                          ("linear", "y ~ marker + C(agegrp)"), ("null", "y ~ C(agegrp)")):
        row = _row(fits, form, "legacy")
        assert _terms(row) == {"age": "grouped"}
        ref = smf.glm(formula, d, family=sm.families.Binomial()).fit(tol=1e-12)
        assert row["loglik"] == pytest.approx(ref.llf, rel=1e-10), form
        assert row["n_params"] == len(ref.params)
    # Grouped age as a linear term would be a different model (the check can fail).
    lin_age = smf.glm("y ~ marker + age", d, family=sm.families.Binomial()).fit(tol=1e-12)
    assert abs(lin_age.llf - _row(fits, "linear", "legacy")["loglik"]) > 0.01
    # Continuous adjustment: age as a restricted cubic spline instead of its groups.
    assert _terms(_row(fits, "linear", "continuous")) == {"age": "spline"}


def test_rows_with_time_at_or_before_entry_are_dropped_and_counted(tmp_path: Path,
                                                                   one_analysis: Any) -> None:
    # README "Samples": impossible follow-up (time <= 0 or <= entry) is dropped after the
    # missing values, and every step's dropped rows are counted in samples.parquet.
    rng = np.random.default_rng(4)
    n = 400
    entry = rng.uniform(0.0, 2.0, n)
    time = entry + rng.exponential(3.0, n)
    frame = pd.DataFrame({"marker": rng.normal(60, 15, n), "entry": entry, "time": time,
                          "died": (rng.random(n) < 0.4).astype(float)})
    frame.loc[0:6, "time"] = frame.loc[0:6, "entry"]           # 7 rows: time == entry
    frame.loc[7:11, "time"] = frame.loc[7:11, "entry"] - 0.5   # 5 rows: time < entry
    frame.loc[12:14, "time"] = 0.0                              # 3 rows: time 0 (entry > 0)
    frame.loc[15:17, "marker"] = np.nan                         # 3 rows: missing exposure
    frame.loc[16, "time"] = frame.loc[16, "entry"]              # counted once, as missing
    expected_bad = int(((frame["time"] <= frame["entry"]) | (frame["time"] <= 0))
                       [frame["marker"].notna()].sum())
    assert expected_bad == 15
    raw = one_analysis({"type": "survival", "time": "time", "event": "died", "entry": "entry"},
                       "marker", {"cuts": [45, 60]}, continuous={"forms": ["linear"]})
    spec = parse_spec(raw, base=tmp_path)
    tables, status = analyse(spec, "sim", "a", frame, resampling=False)
    assert status["status"] == "ok", status["message"]
    samples = dict(zip(tables["samples"]["step"], tables["samples"]["rows"], strict=True))
    assert samples["rows in extract"] == n
    assert samples["dropped: missing marker"] == 3
    follow_up = [k for k in samples if "follow-up" in k]
    assert len(follow_up) == 1 and "entry" in follow_up[0]
    assert samples[follow_up[0]] == expected_bad
    assert samples["analysis sample"] == n - 3 - expected_bad == status["n_used"]
    fits = tables["fits"]
    assert (fits["n"] == n - 18).all()


def test_a_real_stata_file_shipped_by_statsmodels_is_read(tmp_path: Path,
                                                          one_analysis: Any) -> None:
    # A real .dta file: statsmodels ships its macrodata dataset both as Stata
    # (statsmodels/datasets/macrodata/macrodata.dta) and as CSV, which statsmodels' own loader
    # reads. unbin's reader must return the same numbers as the CSV. (No installed package ships
    # a .sas7bdat file, so the SAS reader is not exercised on a real file here.)
    import statsmodels.datasets.macrodata as macro
    from statsmodels.datasets import macrodata

    src = Path(macro.__file__).with_name("macrodata.dta")
    assert src.is_file()
    path = tmp_path / "macro.dta"
    shutil.copy(src, path)
    csv = macrodata.load_pandas().data
    assert extract_columns(path) == list(csv.columns)
    assert extract_rows(path) == len(csv) == 203
    got = read_extract(path, ["unemp", "infl", "realgdp"])
    assert list(got.columns) == ["unemp", "infl", "realgdp"]
    for col in got.columns:  # the .dta stores float32, the CSV decimals
        np.testing.assert_allclose(got[col].to_numpy(float), csv[col].to_numpy(float),
                                   rtol=1e-6, atol=1e-5)
    # ... and an analysis of it runs end to end through the job function (linear model).
    raw = one_analysis({"type": "continuous", "value": "infl"}, "unemp", {"cuts": [5, 7]},
                       continuous={"forms": ["linear"]})
    raw["cohorts"][0]["path"] = "macro.dta"
    spec = parse_spec(raw, base=tmp_path)
    tables, status = analyse(spec, "sim", "a", read_extract(path, ["infl", "unemp"]),
                             resampling=False)
    assert status["status"] == "ok" and status["n_used"] == 203
    ref = sm.OLS(csv["infl"], sm.add_constant(csv["unemp"])).fit()
    lin = tables["fits"]
    lin = lin[(lin["form"] == "linear") & (lin["adjustment"] == "none")].iloc[0]
    assert lin["r2"] == pytest.approx(ref.rsquared, rel=1e-4)
