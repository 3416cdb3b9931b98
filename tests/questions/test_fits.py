"""The fits table: log-likelihood, AIC, BIC, parameter counts and LR chi-square against
statsmodels and lifelines fits of the same designs; the C-index against brute-force pair counts;
and what the table records when fits fail (separation, a monotone likelihood)."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from reference.tablerefs import (
    MARKER_GROUPING,
    OUTCOMES,
    auc_pairs,
    clinic_frame,
    harrell_c_pairs,
    lifelines_fit,
    reference_fit,
)
from unbin.pipeline.jobs import QUESTION_TABLES, analyse
from unbin.questions.fits import fits_table
from unbin.spec import parse_spec

# FP rows count their estimated powers differently (changed elsewhere); their parameter count is
# not checked here, everything else is.
CHECKED_FORMS = ("null", "legacy", "linear", "spline", "common_spline", "test_spline",
                 "legacy+test_spline")


def _refit(refit_frame: Any, one_analysis: Any, family: str, n: int, seed: int,
           **continuous: Any) -> tuple[pd.DataFrame, pd.DataFrame]:
    frame = clinic_frame(family, n, seed)
    raw = one_analysis(OUTCOMES[family], "marker", dict(MARKER_GROUPING),
                       **({"continuous": continuous} if continuous else {}))
    raw["analyses"][0]["adjust"] = ["age", "sex"]
    spec, r = refit_frame(frame, raw)
    return frame, fits_table(r, spec)


@pytest.mark.parametrize("family", ["binary", "count", "continuous"])
def test_aic_bic_and_loglik_equal_statsmodels(refit_frame: Any, one_analysis: Any,
                                              family: str) -> None:
    # Reference library: statsmodels GLM (binomial; Poisson with log person-time offset)
    # .llf/.aic/.bic_llf and OLS .llf/.aic/.bic. statsmodels' OLS AIC/BIC leave out the
    # residual variance; unbin counts it (README: n_params counts every estimated parameter), so
    # its AIC is statsmodels' + 2 and its BIC statsmodels' + log(n).
    frame, fits = _refit(refit_frame, one_analysis, family, 900,
                         {"binary": 41, "count": 42, "continuous": 43}[family])
    n = len(frame)
    rows = fits[fits["form"].isin(CHECKED_FORMS)]
    assert set(rows["form"]) == set(CHECKED_FORMS)
    nulls = {}
    for _, row in rows.iterrows():
        ref = reference_fit(row, frame, family, "marker", OUTCOMES[family])
        if row["form"] == "null":
            nulls[row["adjustment"]] = ref.loglik
        assert row["status"] == "ok" and bool(row["converged"])
        assert row["n"] == n
        assert row["n_params"] == ref.n_params, (row["form"], row["adjustment"])
        assert row["loglik"] == pytest.approx(ref.loglik, rel=1e-10)
        if family == "continuous":
            assert row["aic"] == pytest.approx(ref.aic + 2.0, rel=1e-10)
        else:
            assert row["aic"] == pytest.approx(ref.aic, rel=1e-10)
        assert row["bic"] == pytest.approx(-2 * ref.loglik + np.log(n) * ref.n_params,
                                           rel=1e-10)
    # LR chi-square against the library's adjustment-only fit of the same coding.
    for _, row in rows.iterrows():
        want = 2 * (row["loglik"] - nulls[row["adjustment"]])
        assert row["lr_chi2"] == pytest.approx(want, abs=1e-6), (row["form"], row["adjustment"])
    expected_events = {"binary": frame.get("flare", pd.Series()).sum(),
                       "count": frame.get("visits", pd.Series()).sum()}
    if family in expected_events:
        assert (rows["events"] == int(expected_events[family])).all()
    else:
        assert rows["events"].isna().all()


@pytest.mark.parametrize("family", ["binary", "count", "continuous"])
def test_bic_equals_the_librarys_own(refit_frame: Any, one_analysis: Any, family: str) -> None:
    # Reference library: statsmodels' own BIC, GLM .bic_llf = -2 llf + log(n) (df_model + 1),
    # OLS .bic (without the residual variance: + log(n) for unbin's count).
    import statsmodels.api as sm

    frame, fits = _refit(refit_frame, one_analysis, family, 700, 50, forms=["linear"])
    row = fits[(fits["form"] == "linear") & (fits["adjustment"] == "legacy")].iloc[0]
    X = sm.add_constant(np.column_stack([frame["marker"], frame["age"], frame["sex"]]))
    if family == "binary":
        res = sm.GLM(frame["flare"], X, family=sm.families.Binomial()).fit(tol=1e-12)
        assert row["bic"] == pytest.approx(res.bic_llf, rel=1e-10)
    elif family == "count":
        res = sm.GLM(frame["visits"], X, family=sm.families.Poisson(),
                     offset=np.log(frame["years"])).fit(tol=1e-12)
        assert row["bic"] == pytest.approx(res.bic_llf, rel=1e-10)
    else:
        res = sm.OLS(frame["score"], X).fit()
        assert row["bic"] == pytest.approx(res.bic + np.log(len(frame)), rel=1e-10)
        assert row["r2"] == pytest.approx(res.rsquared, rel=1e-10)


def test_cox_loglik_aic_and_bic_with_events_as_n(refit_frame: Any, one_analysis: Any) -> None:
    # Reference libraries: statsmodels PHReg (Efron ties) .llf on every checked row; lifelines
    # CoxPHFitter (Efron ties) .log_likelihood_ and .AIC_partial_ on the legacy, linear and
    # 3-knot spline rows; BIC with the number of events as n (Volinsky & Raftery 2000,
    # Biometrics 56:256).
    frame = clinic_frame("survival", 800, 44, censor_max=2.0)
    raw = one_analysis(OUTCOMES["survival"], "marker", dict(MARKER_GROUPING))
    raw["analyses"][0]["adjust"] = ["age", "sex"]
    spec, r = refit_frame(frame, raw)
    fits = fits_table(r, spec)
    events = int(frame["flare"].sum())
    assert events < len(frame) / 2  # events and n differ clearly: the BIC check can tell
    rows = fits[fits["form"].isin(CHECKED_FORMS) & (fits["form"] != "null")]
    for _, row in rows.iterrows():
        ref = reference_fit(row, frame, "survival", "marker", OUTCOMES["survival"])
        assert row["n_params"] == ref.n_params  # no intercept in a Cox model
        assert row["loglik"] == pytest.approx(ref.loglik, rel=1e-9)
        assert row["aic"] == pytest.approx(-2 * ref.loglik + 2 * ref.n_params, rel=1e-9)
        assert row["bic"] == pytest.approx(-2 * ref.loglik + np.log(events) * ref.n_params,
                                           rel=1e-9)
        assert row["events"] == events and row["n"] == len(frame)
    n_lifelines = 0
    for _, row in rows[rows["form"].isin(("legacy", "linear", "spline"))].iterrows():
        if row["form"] == "spline" and "3 knots" not in row["detail"]:
            continue
        ref = lifelines_fit(row, frame, OUTCOMES["survival"])
        assert row["loglik"] == pytest.approx(ref.loglik, rel=1e-9)
        assert row["aic"] == pytest.approx(ref.aic, rel=1e-9)
        n_lifelines += 1
    assert n_lifelines == 9


def test_auc_equals_the_brute_force_pair_count(refit_frame: Any, one_analysis: Any) -> None:
    # Brute force (Hanley & McNeil 1982): every (event, non-event) pair of the reference fit's
    # linear predictor, concordant 1, tied 1/2.
    frame, fits = _refit(refit_frame, one_analysis, "binary", 600, 45)
    for _, row in fits[fits["form"].isin(CHECKED_FORMS)].iterrows():
        ref = reference_fit(row, frame, "binary", "marker", OUTCOMES["binary"])
        assert ref.lp is not None
        want = auc_pairs(frame["flare"].to_numpy(), ref.lp)
        assert row["c_index"] == pytest.approx(want, abs=1e-12), (row["form"], row["adjustment"])


def test_harrells_c_equals_the_brute_force_pair_count(refit_frame: Any, one_analysis: Any
                                                      ) -> None:
    # Brute force (Harrell et al. 1982) over every pair, no strata and no delayed entry;
    # continuous times, so no pair is tied in time.
    frame, fits = _refit(refit_frame, one_analysis, "survival", 300, 46)
    assert frame["years"].nunique() == len(frame)
    t, e = frame["years"].to_numpy(), frame["flare"].to_numpy().astype(bool)
    for _, row in fits[fits["form"].isin(("legacy", "linear", "spline"))].iterrows():
        ref = reference_fit(row, frame, "survival", "marker", OUTCOMES["survival"])
        assert ref.lp is not None
        assert row["c_index"] == pytest.approx(harrell_c_pairs(t, e, ref.lp), abs=1e-6), (
            row["form"], row["adjustment"])


# --------------------------------------------------------------------------- failures


def _analyse(tmp_path: Path, one_analysis: Any, family: str, frame: pd.DataFrame
             ) -> tuple[dict[str, pd.DataFrame], dict[str, Any]]:
    raw = one_analysis(OUTCOMES[family], "marker", dict(MARKER_GROUPING))
    raw["analyses"][0]["adjust"] = ["age", "sex"]
    spec = parse_spec(raw, base=tmp_path)
    return analyse(spec, "sim", "a", frame, resampling=False)


def test_perfect_separation_is_recorded_and_every_table_completes(tmp_path: Path,
                                                                  one_analysis: Any) -> None:
    # Common practice (Albert & Anderson 1984): with the outcome a step of the marker the
    # logistic MLE of every exposure form is infinite.
    frame = clinic_frame("binary", 500, seed=47)
    frame["flare"] = (frame["marker"] > 6.0).astype(float)
    tables, status = _analyse(tmp_path, one_analysis, "binary", frame)
    assert status["status"] == "partial"
    assert set(QUESTION_TABLES) <= set(tables)
    fits = tables["fits"]
    exposure = fits[(fits["form"] != "null") & fits["selected"]]
    # whatever the fitter reports per form, a failed row says so in converged/status/message
    failed = exposure[exposure["status"] == "failed"]
    assert len(failed) >= 3 and (~failed["converged"].astype(bool)).all()
    assert failed["message"].str.len().gt(20).all()
    direct = failed[failed["form"].isin(("legacy", "linear", "spline", "common_spline"))]
    assert len(direct) >= 3 and direct["message"].str.contains("separation").all()
    assert failed["aic"].isna().all() and failed["c_index"].isna().all()
    legacy = exposure[exposure["form"] == "legacy"]
    assert (legacy["status"] == "failed").all()
    assert (fits.loc[fits["form"] == "null", "status"] == "ok").all()
    # The effects and curves of failed fits are rows with NaN numbers and the failed status.
    for name in ("effects", "curves"):
        t = tables[name]
        bad = t[t["form"] == "legacy"]
        assert len(bad) and (bad["status"] == "failed").all()
        assert bad[["estimate", "se", "lower", "upper"]].isna().all(axis=None)
    assert len(tables["information"]) == 3 and len(tables["density"]) == 40


def test_a_monotone_cox_likelihood_is_recorded_and_every_table_completes(
        tmp_path: Path, one_analysis: Any) -> None:
    # Common practice (Bryson & Johnson 1981): no events in one legacy group makes that group's
    # Cox coefficient diverge (a monotone likelihood); the continuous forms are still estimable.
    frame = clinic_frame("survival", 800, seed=48)
    frame.loc[frame["marker"] < 2.5, "flare"] = 0.0
    tables, status = _analyse(tmp_path, one_analysis, "survival", frame)
    assert status["status"] == "partial"
    assert set(QUESTION_TABLES) <= set(tables)
    fits = tables["fits"]
    legacy = fits[fits["form"].isin(("legacy", "legacy+test_spline"))]
    assert len(legacy) == 6
    assert (legacy["status"] == "failed").all() and (~legacy["converged"].astype(bool)).all()
    assert legacy["message"].str.len().gt(20).all()
    first = legacy["message"].iloc[0]
    assert status["message"].count(first) == 1  # one line per cause
    fits_named = ("legacy/legacy, legacy+test_spline/legacy, legacy/continuous, "
                  "legacy+test_spline/continuous, legacy/none, legacy+test_spline/none")
    assert f"{fits_named}: {first}" in status["message"]
    others = fits[fits["form"].isin(("linear", "spline", "fp"))]
    assert (others["status"] == "ok").all() and others["converged"].astype(bool).all()
    eff = tables["effects"]
    assert eff.loc[eff["form"] == "legacy", "estimate"].isna().all()
    assert eff.loc[eff["form"] == "spline", "estimate"].notna().all()
    assert tables["curves"].loc[lambda c: c["form"] == "linear", "se"].gt(0).any()


def test_a_poisson_group_without_counts_is_not_reported_as_a_finite_fit(
        tmp_path: Path, one_analysis: Any) -> None:
    # Common practice: with no counts in a group the Poisson MLE of its log rate ratio is -inf.
    frame = clinic_frame("count", 800, seed=5)
    frame.loc[frame["marker"] < 2.5, "visits"] = 0.0
    with np.errstate(over="ignore"):
        tables, status = _analyse(tmp_path, one_analysis, "count", frame)
    legacy = tables["fits"][tables["fits"]["form"] == "legacy"]
    assert (legacy["status"] == "failed").all()


@pytest.mark.parametrize("family", ["survival", "count", "binary"])
def test_person_time_is_the_samples_follow_up(refit_frame: Any, one_analysis: Any,
                                              family: str) -> None:
    # Reference: pandas sums of the extract's own follow-up column over the rows the fits used
    # (the clinic frame has no missing values, so the sample is the whole frame).
    frame, fits = _refit(refit_frame, one_analysis, family, 400, 57)
    assert (fits["n"] == len(frame)).all()
    if family == "binary":
        assert fits["person_time"].isna().all()
        return
    column = OUTCOMES[family]["time" if family == "survival" else "persontime"]
    expected = float(frame[column].sum())
    assert np.allclose(fits["person_time"].to_numpy(float), expected, rtol=1e-12)


def test_exposure_df_selection_and_small_sample_warnings(refit_frame: Any,
                                                         one_analysis: Any) -> None:
    # exposure_df by hand (groups - 1, 1 for linear, knots - 1 for a spline, both for
    # legacy + test spline); per coding exactly one candidate spline is selected, the one with
    # the lowest AIC (recomputed from statsmodels' own AIC of each candidate); few events per
    # coefficient are flagged (Peduzzi et al. 1996: at least 10).
    frame, fits = _refit(refit_frame, one_analysis, "binary", 180, 44,
                         spline_knots=[3, 4, 5], forms=["linear", "spline"])
    df_of = {"null": 0, "legacy": 3, "linear": 1, "test_spline": 3, "legacy+test_spline": 6}
    for form, want in df_of.items():
        assert (fits.loc[fits["form"] == form, "exposure_df"] == want).all(), form
    for coding in ("legacy", "continuous", "none"):
        cand = fits[(fits["form"] == "spline") & (fits["adjustment"] == coding)]
        assert len(cand) == 3 and cand["selected"].sum() == 1
        assert sorted(cand["exposure_df"]) == [2, 3, 4]
        aic = {}
        for _, row in cand.iterrows():
            ref = reference_fit(row, frame, "binary", "marker", OUTCOMES["binary"])
            aic[row["exposure_df"]] = ref.aic
            assert row["aic"] == pytest.approx(ref.aic, rel=1e-9)
        assert int(cand.loc[cand["selected"], "exposure_df"].iloc[0]) == min(aic, key=aic.get)
    events = int(frame["flare"].sum())
    k_needed = min(events, len(frame) - events) / 10
    wide = fits[(fits["form"] == "legacy+test_spline") & (fits["adjustment"] == "continuous")]
    row = wide.iloc[0]
    assert int(row["n_params"]) - 1 > k_needed  # too many coefficients for the events: the warning must show
    assert "per coefficient" in row["warnings"]
    assert (fits.loc[fits["form"] == "null", "warnings"] == "").all()
    assert fits["events"].dtype == "Int64" and "EVENTS" not in fits.columns
    assert list(fits.columns) == [  # the README's columns, nothing else
        "form", "detail", "adjustment", "selected", "n", "events", "person_time", "n_params",
        "exposure_df", "loglik", "lr_chi2", "aic", "bic", "c_index", "r2", "variance",
        "dispersion", "nb_alpha", "nb_alpha_se", "converged", "status", "message",
        "warnings", "exposure_basis", "adjustment_terms"]
    # R^2 is the linear model's only: a missing number (float NaN) for the logistic rows
    assert fits["r2"].dtype == np.float64 and fits["r2"].isna().all()
    # the recorded designs are canonical JSON (sorted keys), so reruns compare byte for byte
    for col in ("exposure_basis", "adjustment_terms"):
        for s in fits[col]:
            assert s == json.dumps(json.loads(s), sort_keys=True)
