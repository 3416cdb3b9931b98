"""The refit keeps per-row linear predictors only for the fits a question reads row by row
(unbin.refit.analysis, ``_release_predictors``); the others keep their C-index, which must be
the value computed from the predictor: checked against scipy's Mann-Whitney U of statsmodels'
own fit (AUC = U / (n1 n0); Hanley & McNeil 1982)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from unbin.data import analysis_sample
from unbin.models.discrimination import remembered_scores
from unbin.questions.fits import fits_table
from unbin.refit.analysis import needs_predictor, refit_analysis, with_predictor
from unbin.spec import parse_spec


def _refit() -> tuple[object, pd.DataFrame]:
    rng = np.random.default_rng(12)
    n = 3000
    x = rng.normal(50, 10, n)
    age = rng.normal(60, 8, n)
    y = (rng.random(n) < 1 / (1 + np.exp(-(-1 + 0.04 * (x - 50) + 0.03 * (age - 60))))
         ).astype(float)
    df = pd.DataFrame({"x": x, "age": age, "y": y})
    raw = {"study": "sim", "cohorts": [{"name": "c", "path": "unused.csv"}],
           "groupings": {"x": {"cuts": [45.0, 55.0]}, "age": {"cuts": [60.0]}},
           "analyses": [{"name": "a", "outcome": {"type": "binary", "event": "y"},
                         "exposure": "x", "adjust": ["age"]}]}
    spec = parse_spec(raw, base=Path("."))
    a = spec.analyses[0]
    return refit_analysis(analysis_sample(df, a, spec), a, spec, "sim"), df


def test_only_the_risk_models_keep_their_predictors_and_the_rest_their_c_index() -> None:
    r, df = _refit()
    kept = [f for f in r.fits if f.result.linear_predictor is not None]
    released = [f for f in r.fits if f.result.ok and f.result.linear_predictor is None]
    assert kept and released
    assert all(needs_predictor(f) for f in kept)
    assert not any(needs_predictor(f) for f in released)
    assert all(f.c_index is not None for f in released)
    # the C-index memo no longer holds the released predictors: only kept ones
    held = {id(f.result.linear_predictor) for f in kept}
    assert {id(lp) for lp in remembered_scores(r.outcome)} <= held
    # the linear model under legacy adjustment (age in two groups) was released: its C-index
    # is the AUC of statsmodels' linear predictor of the same model
    lin = r.get("linear", "legacy")
    assert lin is not None and lin.result.linear_predictor is None
    X = sm.add_constant(np.column_stack([df["x"], (df["age"] >= 60).astype(float)]))
    ref = sm.GLM(df["y"].to_numpy(), X, family=sm.families.Binomial()).fit()
    eta = X @ ref.params
    y = df["y"].to_numpy() == 1
    u = stats.mannwhitneyu(eta[y], eta[~y]).statistic
    auc = u / (y.sum() * (~y).sum())
    tab = fits_table(r)
    row = tab[(tab["form"] == "linear") & (tab["adjustment"] == "legacy")].iloc[0]
    assert row["c_index"] == pytest.approx(auc, abs=1e-12)
    # asked for, the released predictor is computed again: statsmodels' without the intercept
    again = with_predictor(r, lin).linear_predictor
    assert again is not None
    np.testing.assert_allclose(again, eta - ref.params[0], rtol=1e-7, atol=1e-9)
