"""Checks of the proportional-hazards engine (unbin.models.cox) against outside references.

References: lifelines (CoxPHFitter, CoxTimeVaryingFitter, utils.concordance_index),
statsmodels (PHReg with ties="breslow"), the published Rossi recidivism fit (Fox & Weisberg,
"Cox proportional-hazards regression for survival data", appendix to An R Companion to Applied
Regression, 2nd ed., 2011; values from memory), and brute-force pair counts written here.

lifelines is fitted with tight ``fit_options``: its default stops (Newton decrement or step
norm below 1e-7, relative change of the log likelihood below 1e-9, after damped Newton steps)
leave coefficient errors near 1e-6, which is the tolerance of the comparison itself.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from lifelines import CoxPHFitter, CoxTimeVaryingFitter
from lifelines.datasets import load_rossi
from lifelines.utils import concordance_index
from scipy import stats

from helpers import brute_pair_c, tied_survival_design
from unbin.models.base import Outcome
from unbin.models.cox import (
    CoxFit,
    NearStart,
    baseline_cumhaz,
    concordance,
    concordance_order,
    fit_cox,
    predict_risk,
    prepare_layout,
)
from unbin.models.discrimination import c_index, forget_c_indices, remembered_scores
from unbin.models.survival import fit_survival

TIGHT = {"precision": 1e-14, "r_precision": 1e-16}
ROSSI_COLS = ["fin", "age", "race", "wexp", "mar", "paro", "prio"]
COLS = ["x1", "x2", "x3"]


def _se(fit: CoxFit) -> np.ndarray:
    return np.sqrt(np.diag(fit.cov))


def _assert_matches_lifelines(fit: CoxFit, cph: CoxPHFitter) -> None:
    assert fit.converged, fit.message
    assert fit.message == ""
    np.testing.assert_allclose(fit.coef, cph.params_.to_numpy(), rtol=1e-6, atol=0)
    np.testing.assert_allclose(_se(fit), cph.standard_errors_.to_numpy(), rtol=1e-6, atol=0)
    assert fit.loglik == pytest.approx(cph.log_likelihood_, abs=1e-8)
    # public route to lifelines' log partial likelihood at zero: LR statistic = 2 (ll - ll0)
    ll0 = cph.log_likelihood_ - cph.log_likelihood_ratio_test().test_statistic / 2
    assert fit.loglik0 == pytest.approx(ll0, abs=1e-8)


@pytest.fixture(scope="module")
def rossi() -> pd.DataFrame:
    return load_rossi()


@pytest.fixture(scope="module")
def sim() -> pd.DataFrame:
    """Simulated cohort with heavy ties (24 distinct times), 3 strata, late entry, weights."""
    rng = np.random.default_rng(20111)
    n = 2000
    x = np.column_stack([rng.normal(size=n), rng.binomial(1, 0.4, n), rng.normal(50, 10, n)])
    stratum = rng.integers(0, 3, n)
    latent = rng.exponential(1 / np.exp(x @ np.array([0.5, -0.4, 0.03]) - 1.5 + 0.3 * stratum))
    censor = rng.exponential(2.0, n)
    time = np.ceil(np.minimum(latent, censor) * 4)
    late = rng.uniform(size=n) < 0.5
    entry = np.floor(rng.uniform(0, 0.8, n) * time * late)
    return pd.DataFrame(x, columns=COLS).assign(
        T=time,
        E=(latent <= censor).astype(int),
        S=stratum,
        entry=entry,
        W=rng.integers(1, 4, n),  # integer weights: lifelines warns on non-integer ones
    )


def _x(df: pd.DataFrame) -> np.ndarray:
    return df[COLS].to_numpy(float)


# ------------------------------------------------------------------------------ Rossi


def test_rossi_efron_matches_lifelines(rossi: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter (Efron ties) on lifelines.datasets.load_rossi
    fit = fit_cox(rossi[ROSSI_COLS].to_numpy(float), rossi["week"], rossi["arrest"])
    cph = CoxPHFitter().fit(rossi, "week", "arrest", fit_options=TIGHT)
    _assert_matches_lifelines(fit, cph)
    assert (fit.n, fit.events) == (432, 114)


def test_rossi_matches_published_values(rossi: pd.DataFrame) -> None:
    # source: Rossi recidivism data, Fox & Weisberg 2011 appendix on Cox regression (from memory),
    # printed to 5 decimals (coefficients, SEs), 3 (log-likelihood, C) and 2 (LR)
    X = rossi[ROSSI_COLS].to_numpy(float)
    fit = fit_cox(X, rossi["week"], rossi["arrest"])
    coef = [-0.37942, -0.05744, 0.31390, -0.14980, -0.43370, -0.08487, 0.09150]
    se = [0.19138, 0.02200, 0.30799, 0.21222, 0.38187, 0.19576, 0.02865]
    np.testing.assert_allclose(fit.coef, coef, atol=5.1e-6)
    np.testing.assert_allclose(_se(fit), se, atol=5.1e-6)
    assert fit.loglik == pytest.approx(-658.748, abs=5e-4)
    assert 2 * (fit.loglik - fit.loglik0) == pytest.approx(33.27, abs=5e-3)
    assert concordance(rossi["week"], X @ fit.coef, rossi["arrest"]) == pytest.approx(
        0.640, abs=5e-4
    )


def test_rossi_breslow_matches_statsmodels(rossi: pd.DataFrame) -> None:
    # source: statsmodels PHReg(ties="breslow")
    X = rossi[ROSSI_COLS].to_numpy(float)
    fit = fit_cox(X, rossi["week"], rossi["arrest"], ties="breslow")
    ref = sm.PHReg(rossi["week"].to_numpy(float), X, status=rossi["arrest"], ties="breslow").fit()
    np.testing.assert_allclose(fit.coef, ref.params, rtol=1e-6)
    np.testing.assert_allclose(_se(fit), ref.bse, rtol=1e-6)
    assert fit.loglik == pytest.approx(ref.llf, abs=1e-8)


# ------------------------------------------------------------- ties, strata, delayed entry


def test_heavy_ties_efron_matches_lifelines(sim: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter (Efron ties)
    assert sim["T"].nunique() < 30 and sim["E"].sum() > 1000
    fit = fit_cox(_x(sim), sim["T"], sim["E"])
    cph = CoxPHFitter().fit(sim[COLS + ["T", "E"]], "T", "E", fit_options=TIGHT)
    _assert_matches_lifelines(fit, cph)


def test_strata_match_lifelines(sim: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter(strata=...)
    fit = fit_cox(_x(sim), sim["T"], sim["E"], strata=sim["S"])
    cph = CoxPHFitter().fit(sim[COLS + ["T", "E", "S"]], "T", "E", strata=["S"], fit_options=TIGHT)
    _assert_matches_lifelines(fit, cph)


def test_delayed_entry_matches_lifelines(sim: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter(entry_col=...) (Efron ties, left truncation)
    assert (sim["entry"] > 0).mean() > 0.15
    assert sim["entry"].isin(sim.loc[sim["E"] == 1, "T"]).sum() > 100  # entry == an event time
    fit = fit_cox(_x(sim), sim["T"], sim["E"], entry=sim["entry"])
    cph = CoxPHFitter().fit(
        sim[COLS + ["T", "E", "entry"]], "T", "E", entry_col="entry", fit_options=TIGHT
    )
    _assert_matches_lifelines(fit, cph)


def test_weights_strata_and_entry_together_match_lifelines(sim: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter(weights_col=, strata=, entry_col=)
    fit = fit_cox(
        _x(sim), sim["T"], sim["E"], entry=sim["entry"], strata=sim["S"], weights=sim["W"]
    )
    cph = CoxPHFitter().fit(
        sim, "T", "E", weights_col="W", entry_col="entry", strata=["S"], fit_options=TIGHT
    )
    _assert_matches_lifelines(fit, cph)


def test_weights_match_lifelines(sim: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter(weights_col=...) (model-based variance, not robust)
    fit = fit_cox(_x(sim), sim["T"], sim["E"], weights=sim["W"])
    cph = CoxPHFitter().fit(
        sim[COLS + ["T", "E", "W"]], "T", "E", weights_col="W", fit_options=TIGHT
    )
    _assert_matches_lifelines(fit, cph)


def test_many_small_strata_with_entry_match_lifelines() -> None:
    # source: lifelines CoxPHFitter(strata=, entry_col=); 150 strata of about 10 rows each
    rng = np.random.default_rng(11)
    n = 1500
    x = rng.normal(size=(n, 2))
    stratum = rng.integers(0, 150, n)
    time = np.ceil(rng.exponential(1 / np.exp(x @ [0.5, -0.3] + 0.02 * stratum)) * 3)
    entry = np.where(rng.uniform(size=n) < 0.3, np.floor(time * rng.uniform(size=n)), 0.0)
    event = rng.binomial(1, 0.7, n)
    frame = pd.DataFrame(x, columns=["a", "b"]).assign(T=time, E=event, S=stratum, en=entry)
    cph = CoxPHFitter().fit(frame, "T", "E", strata=["S"], entry_col="en", fit_options=TIGHT)
    _assert_matches_lifelines(fit_cox(x, time, event, strata=stratum, entry=entry), cph)


def test_breslow_strata_and_entry_match_statsmodels(sim: pd.DataFrame) -> None:
    # source: statsmodels PHReg(ties="breslow", strata=, entry=). statsmodels keeps a row
    # entering exactly at an event time in that risk set (entry <= t; ours and lifelines':
    # entry < t), so the entries are moved off the (integer) event times here
    entry = np.where(sim["entry"] > 0, sim["entry"] + 0.5, 0.0)
    fit = fit_cox(_x(sim), sim["T"], sim["E"], entry=entry, strata=sim["S"], ties="breslow")
    ref = sm.PHReg(
        sim["T"].to_numpy(float),
        _x(sim),
        status=sim["E"].to_numpy(),
        strata=sim["S"].to_numpy(),
        entry=entry,
        ties="breslow",
    ).fit()
    np.testing.assert_allclose(fit.coef, ref.params, rtol=1e-6)
    np.testing.assert_allclose(_se(fit), ref.bse, rtol=1e-6)
    assert fit.loglik == pytest.approx(ref.llf, abs=1e-8)


def test_no_covariates_gives_null_loglik(sim: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter log-likelihood at zero (via its LR test)
    fit = fit_cox(np.zeros((len(sim), 0)), sim["T"], sim["E"])
    cph = CoxPHFitter().fit(sim[COLS + ["T", "E"]], "T", "E", fit_options=TIGHT)
    ll0 = cph.log_likelihood_ - cph.log_likelihood_ratio_test().test_statistic / 2
    assert fit.converged and fit.message == "" and fit.coef.shape == (0,)
    assert fit.loglik == pytest.approx(ll0, abs=1e-8) and fit.loglik0 == fit.loglik


@pytest.mark.parametrize("extras", ["none", "strata_entry_weights", "breslow"])
def test_subsample_start_reaches_lifelines_fit(
    sim: pd.DataFrame, extras: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    # source: lifelines CoxPHFitter (statsmodels PHReg for Breslow). Data with many events
    # start Newton's method from a fit to a subsample; the event threshold is lowered here so
    # that this path (nested: 2000 rows -> 250 -> 32) runs on small data
    import unbin.models.cox.fit as engine

    monkeypatch.setattr(engine, "_WARM_EVENTS", 8)
    outcomes: list[bool] = []
    real = engine._warm_start

    def spy(*args):  # type: ignore[no-untyped-def]
        out = real(*args)
        outcomes.append(out is not None)
        return out

    monkeypatch.setattr(engine, "_warm_start", spy)
    X = _x(sim)
    if extras == "breslow":
        fit = fit_cox(X, sim["T"], sim["E"], ties="breslow")
        ref = sm.PHReg(sim["T"].to_numpy(float), X, status=sim["E"].to_numpy(), ties="breslow")
        res = ref.fit()
        np.testing.assert_allclose(fit.coef, res.params, rtol=1e-6)
        np.testing.assert_allclose(_se(fit), res.bse, rtol=1e-6)
        assert fit.loglik == pytest.approx(res.llf, abs=1e-8)
    elif extras == "none":
        fit = fit_cox(X, sim["T"], sim["E"])
        cph = CoxPHFitter().fit(sim[COLS + ["T", "E"]], "T", "E", fit_options=TIGHT)
        _assert_matches_lifelines(fit, cph)
    else:
        fit = fit_cox(X, sim["T"], sim["E"], entry=sim["entry"], strata=sim["S"], weights=sim["W"])
        cph = CoxPHFitter().fit(
            sim, "T", "E", weights_col="W", entry_col="entry", strata=["S"], fit_options=TIGHT
        )
        _assert_matches_lifelines(fit, cph)
    assert len(outcomes) >= 2 and outcomes[-1]  # the outermost subsample fit was used
    assert fit.converged and fit.message == ""


def test_start_at_the_estimate_converges_at_once(rossi: pd.DataFrame) -> None:
    # common practice (Newton's method started at its fixed point); reference: lifelines
    cph = CoxPHFitter().fit(rossi, "week", "arrest", fit_options=TIGHT)
    X = rossi[ROSSI_COLS].to_numpy(float)
    fit = fit_cox(X, rossi["week"], rossi["arrest"], init=cph.params_.to_numpy())
    assert fit.converged and fit.iterations == 1
    np.testing.assert_allclose(fit.coef, cph.params_.to_numpy(), rtol=1e-6)


# ------------------------------------------------------------------ baseline and risk


def test_baseline_cumhaz_matches_lifelines_with_strata_and_weights(sim: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter.baseline_cumulative_hazard_ (Breslow, at the column means,
    # one column per stratum); ours is at covariates = 0, hence the exp(mean' b) factor
    X = _x(sim)
    fit = fit_cox(X, sim["T"], sim["E"], strata=sim["S"], weights=sim["W"])
    cph = CoxPHFitter().fit(
        sim[COLS + ["T", "E", "S", "W"]], "T", "E", strata=["S"], weights_col="W", fit_options=TIGHT
    )
    base = baseline_cumhaz(X, sim["T"], sim["E"], fit.coef, strata=sim["S"], weights=sim["W"])
    assert list(base.columns) == ["stratum", "time", "cumhaz"]
    assert sorted(base["stratum"].unique()) == [0, 1, 2]
    at_mean = np.exp(X.mean(axis=0) @ fit.coef)
    for label, part in base.groupby("stratum"):
        ref = cph.baseline_cumulative_hazard_[label].loc[part["time"]].to_numpy()
        np.testing.assert_allclose(part["cumhaz"].to_numpy() * at_mean, ref, rtol=1e-6)


def test_baseline_cumhaz_under_delayed_entry_matches_lifelines_start_stop(
    sim: pd.DataFrame,
) -> None:
    # source: lifelines CoxTimeVaryingFitter.baseline_cumulative_hazard_ with (entry, time]
    # intervals (CoxPHFitter's baseline ignores entry_col, so it is not the reference here)
    X = _x(sim)
    fit = fit_cox(X, sim["T"], sim["E"], entry=sim["entry"])
    ctv = CoxTimeVaryingFitter().fit(
        sim[COLS + ["T", "E", "entry"]].assign(id=np.arange(len(sim))),
        id_col="id",
        event_col="E",
        start_col="entry",
        stop_col="T",
    )
    np.testing.assert_allclose(fit.coef, ctv.params_.to_numpy(), rtol=1e-6)
    base = baseline_cumhaz(X, sim["T"], sim["E"], fit.coef, entry=sim["entry"])
    ref = ctv.baseline_cumulative_hazard_.iloc[:, 0].loc[base["time"]].to_numpy()
    at_mean = np.exp(X.mean(axis=0) @ fit.coef)
    np.testing.assert_allclose(base["cumhaz"].to_numpy() * at_mean, ref, rtol=1e-6)


def test_predict_risk_matches_lifelines(sim: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter.predict_survival_function (risk = 1 - S(horizon | x));
    # the horizon is an observed time, where lifelines does not interpolate
    X = _x(sim)
    fit = fit_cox(X, sim["T"], sim["E"], strata=sim["S"])
    cph = CoxPHFitter().fit(sim[COLS + ["T", "E", "S"]], "T", "E", strata=["S"], fit_options=TIGHT)
    base = baseline_cumhaz(X, sim["T"], sim["E"], fit.coef, strata=sim["S"])
    new = sim.iloc[:25]
    horizon = 6.0
    risk = predict_risk(_x(new), fit.coef, base, horizon, strata_new=new["S"].to_numpy())
    surv_df = cph.predict_survival_function(new[COLS + ["S"]], times=[horizon])
    surv = surv_df[new.index].to_numpy().ravel()  # lifelines groups the columns by stratum
    np.testing.assert_allclose(risk, 1 - surv, rtol=1e-6)
    # before the first event time the baseline is zero (common practice: step function)
    early = predict_risk(_x(new), fit.coef, base, 0.0, strata_new=new["S"].to_numpy())
    assert np.all(early == 0)
    with pytest.raises(ValueError, match="strata_new"):
        predict_risk(_x(new), fit.coef, base, horizon)


# ------------------------------------------------------------------------ concordance


def test_concordance_matches_lifelines_with_ties_and_censoring() -> None:
    # source: lifelines.utils.concordance_index(time, -score, event)
    rng = np.random.default_rng(7)
    for _ in range(60):
        n = int(rng.integers(2, 50))
        t = rng.integers(0, rng.integers(1, 9), n).astype(float)
        score = rng.integers(0, rng.integers(1, 6), n).astype(float)
        event = rng.binomial(1, rng.uniform(0.1, 1.0), n)
        try:
            ref = concordance_index(t, -score, event)
        except ZeroDivisionError:  # lifelines: no admissible pair
            assert np.isnan(concordance(t, score, event))
            continue
        assert concordance(t, score, event) == pytest.approx(ref, abs=1e-12)
    n = 5000
    t = rng.exponential(size=n).round(2)
    score = rng.normal(size=n).round(1)
    event = rng.binomial(1, 0.4, n)
    assert concordance(t, score, event) == pytest.approx(
        concordance_index(t, -score, event), abs=1e-12
    )


def test_one_time_order_serves_many_scores_exactly() -> None:
    # source: lifelines.utils.concordance_index(time, -score, event); heavy ties in time (with
    # events tied in time and in score) and in score; the shared time order gives the same C
    rng = np.random.default_rng(17)
    n = 3000
    t = rng.integers(1, 40, n).astype(float)
    event = rng.binomial(1, 0.5, n)
    order = concordance_order(t, event)
    for k in range(4):
        score = rng.normal(size=n).round(k)  # k = 0: few distinct scores
        with_order = concordance(t, score, event, time_order=order)
        assert with_order == concordance(t, score, event)
        assert with_order == pytest.approx(concordance_index(t, -score, event), abs=1e-12)
    with pytest.raises(ValueError, match="risk_score must be one-dimensional with 3000"):
        concordance(t, np.zeros(10), event, time_order=order)


@pytest.fixture
def concordance_calls(monkeypatch: pytest.MonkeyPatch) -> list[int]:
    """One entry per call of the engine's Harrell's C (``unbin.models.cox.concordance``)."""
    import unbin.models.cox as engine

    calls: list[int] = []
    real = engine.concordance

    def spy(*args, **kwargs):  # type: ignore[no-untyped-def]
        calls.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(engine, "concordance", spy)
    return calls


def test_c_index_is_computed_once_per_linear_predictor(
    sim: pd.DataFrame, concordance_calls: list[int]
) -> None:
    # source: lifelines.utils.concordance_index(time, -lp, event); the second request for the
    # same array is answered from outcome.cache, a new array is computed
    calls = concordance_calls
    outcome = Outcome("survival", sim["E"].to_numpy(float), time=sim["T"].to_numpy(float))
    lp = _x(sim) @ np.array([0.5, -0.4, 0.03])
    ref = concordance_index(sim["T"], -lp, sim["E"])
    assert c_index(outcome, lp) == pytest.approx(ref, abs=1e-12)
    assert c_index(outcome, lp) == pytest.approx(ref, abs=1e-12)
    assert len(calls) == 1
    assert c_index(outcome, lp.copy()) == pytest.approx(ref, abs=1e-12)
    assert len(calls) == 2


def test_forgetting_c_indices_keeps_only_the_predictors_asked_for(
    sim: pd.DataFrame, concordance_calls: list[int]
) -> None:
    # source: lifelines.utils.concordance_index(time, -lp, event). The memo keeps a reference
    # to each predictor; forget_c_indices drops every entry but those kept (by identity), and a
    # forgotten predictor's C-index is computed again, to the same value.
    calls = concordance_calls
    outcome = Outcome("survival", sim["E"].to_numpy(float), time=sim["T"].to_numpy(float))
    forget_c_indices(outcome)  # nothing kept yet: nothing to do
    a = _x(sim) @ np.array([0.5, -0.4, 0.03])
    b = _x(sim) @ np.array([-0.2, 0.1, 0.01])
    refs = {id(lp): concordance_index(sim["T"], -lp, sim["E"]) for lp in (a, b)}
    for lp in (a, b):
        assert c_index(outcome, lp) == pytest.approx(refs[id(lp)], abs=1e-12)
    assert [id(lp) for lp in remembered_scores(outcome)] == [id(a), id(b)]
    forget_c_indices(outcome, keep=[b, None])
    assert [id(lp) for lp in remembered_scores(outcome)] == [id(b)]
    assert c_index(outcome, b) == pytest.approx(refs[id(b)], abs=1e-12)
    assert len(calls) == 2  # b answered from the memo
    assert c_index(outcome, a) == pytest.approx(refs[id(a)], abs=1e-12)
    assert len(calls) == 3  # a computed again
    forget_c_indices(outcome)
    assert remembered_scores(outcome) == []


@pytest.mark.parametrize("family", ["survival", "binary"])
def test_c_index_counts_rounding_level_differences_as_ties(family: str) -> None:
    """A linear predictor with many exact ties, and the same predictor moved by rounding-level
    amounts (~1e-15, what another order of operations gives): the same C-index, equal to
    X
    (binary) on the exactly tied scores, ties counting one half."""
    rng = np.random.default_rng(21)
    n = 600
    lp = rng.integers(0, 6, n) * 0.1 + rng.integers(0, 3, n) * 0.3  # sums tie exactly or nearly
    nudged = lp + rng.choice([-1.0, 0.0, 1.0], n) * 4e-16 * np.maximum(np.abs(lp), 1)
    assert (nudged != lp).sum() > 100
    t = rng.exponential(1 / np.exp(lp))
    e = (rng.random(n) < 0.7).astype(float)
    exact = np.round(lp, 12)
    if family == "survival":
        outcome = Outcome("survival", e, time=t)
        ref = concordance_index(t, -exact, e)  # lifelines, ties one half
    else:
        outcome = Outcome("binary", e)
        ranks = stats.rankdata(exact)  # Mann-Whitney: ties get average ranks (scipy)
        n1 = e.sum()
        ref = (ranks[e > 0].sum() - n1 * (n1 + 1) / 2) / (n1 * (n - n1))
    assert c_index(outcome, lp) == pytest.approx(ref, abs=1e-12)
    assert c_index(outcome, nudged) == pytest.approx(ref, abs=1e-12)


def test_concordance_within_strata_and_risk_sets_matches_brute_force() -> None:
    # source: brute-force pair count (helpers.brute_pair_c); ties in time, in score and between an event
    # time and an entry time (entry_j = t_i: j not yet at risk)
    rng = np.random.default_rng(41)
    for it in range(300):
        n = int(rng.integers(2, 60))
        t, s, e, entry, strata = tied_survival_design(
            rng, n, int(rng.integers(1, 10)), int(rng.integers(1, 6)), int(rng.integers(1, 4)))
        use_entry = entry if it % 3 else None
        use_strata = strata if it % 2 else None
        ref = brute_pair_c(t, s, e, None, use_entry, use_strata)
        got = concordance(t, s, e, entry=use_entry, strata=use_strata)
        if np.isnan(ref):
            assert np.isnan(got)
        else:
            assert got == pytest.approx(ref, abs=1e-13)


def test_concordance_large_sample_matches_brute_force() -> None:
    # source: brute-force pair count (helpers.brute_pair_c) on 3000 rows (about 4.5 million pairs), with
    # every level of the bit recursion in use
    rng = np.random.default_rng(42)
    t, s, e, entry, strata = tied_survival_design(rng, 3000, 60, 200, 4)
    s = s + rng.normal(size=t.size).round(1)
    order = concordance_order(t, e, entry, strata)
    for score in (s, s.round(-1), -s):
        ref = brute_pair_c(t, score, e, None, entry, strata)
        assert concordance(t, score, e, time_order=order) == pytest.approx(ref, abs=1e-13)
        assert concordance(t, score, e, entry=entry, strata=strata) == pytest.approx(
            ref, abs=1e-13)


def test_concordance_of_one_stratum_equals_lifelines() -> None:
    # source: lifelines.utils.concordance_index(time, -score, event) on each stratum alone;
    # the within-strata C pools their concordant and comparable pairs (brute-force counts
    # of the comparable pairs as weights)
    rng = np.random.default_rng(43)
    t, s, e, _, strata = tied_survival_design(rng, 1500, 30, 50, 3)
    num = den = 0.0
    for g in range(3):
        m = strata == g
        pairs = sum(((strata == g) & ((t > t[i]) | ((t == t[i]) & ~e))).sum()
                    for i in np.flatnonzero(m & e))
        num += concordance_index(t[m], -s[m], e[m]) * pairs
        den += pairs
    assert concordance(t, s, e, strata=strata) == pytest.approx(num / den, abs=1e-12)


def test_within_strata_concordance_recovers_the_true_value() -> None:
    """Two strata whose baseline hazards differ 20-fold, one covariate with log hazard ratio 1,
    no censoring. Within a stratum a pair is concordant with probability
    E[expit(|b (x_i - x_j)|)], x_i - x_j ~ N(0, 2) (the earlier of two exponential times
    belongs to i with probability h_i / (h_i + h_j)): 0.7252 by numerical integration
    (scipy.integrate.quad). Pairs across strata are ordered mostly by the stratum, so ignoring
    the strata pulls C towards 1/2. Seeded, Monte-Carlo tolerance 0.015 (about 3 SE)."""
    from scipy import integrate
    from scipy.special import expit
    from scipy.stats import norm

    truth = integrate.quad(lambda d: expit(abs(d)) * norm.pdf(d, scale=np.sqrt(2)),
                           -np.inf, np.inf)[0]
    rng = np.random.default_rng(44)
    n = 4000
    x = rng.normal(size=n)
    stratum = np.repeat([0, 1], n // 2)
    t = rng.exponential(1 / (np.exp(x) * np.where(stratum == 1, 20.0, 1.0)))
    e = np.ones(n, dtype=bool)
    within = concordance(t, x, e, strata=stratum)
    across = concordance(t, x, e)
    assert truth == pytest.approx(0.7252, abs=5e-5)
    assert within == pytest.approx(truth, abs=0.015)
    assert across < truth - 0.05
    outcome = Outcome("survival", e.astype(float), time=t, strata=stratum)
    assert c_index(outcome, x) == pytest.approx(within, abs=1e-15)


def test_c_index_passes_strata_and_entry_and_keys_its_time_order() -> None:
    # source: brute-force pair count (helpers.brute_pair_c); an Outcome with strata and delayed entry, and a
    # second Outcome sharing the cache but not the strata gets its own time order
    rng = np.random.default_rng(45)
    t, s, e, entry, strata = tied_survival_design(rng, 800, 25, 40, 3)
    outcome = Outcome("survival", e.astype(float), time=t, entry=entry, strata=strata)
    assert c_index(outcome, s) == pytest.approx(brute_pair_c(t, s, e, None, entry, strata),
                                                abs=1e-13)
    other = Outcome("survival", e.astype(float), time=t, cache=outcome.cache)
    score = s + 0.5
    assert c_index(other, score) == pytest.approx(brute_pair_c(t, score, e), abs=1e-13)
    with pytest.raises(ValueError, match="time must be greater than entry"):
        concordance(t, s, e, entry=t)


# ------------------------------------------------------------------- prepared layouts


def test_prepared_layout_gives_the_same_fit_bit_for_bit(sim: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter(weights_col=, entry_col=, strata=) for the fit itself; the
    # fits with and without a prepared layout must agree exactly, for several designs
    X = _x(sim)
    args = dict(entry=sim["entry"], strata=sim["S"], weights=sim["W"])
    layout = prepare_layout(sim["T"], sim["E"], **args)
    for cols in ([0, 1, 2], [0], [2, 1]):
        for ties in ("efron", "breslow"):
            plain = fit_cox(X[:, cols], sim["T"], sim["E"], ties=ties, **args)
            again = fit_cox(X[:, cols], sim["T"], sim["E"], ties=ties, layout=layout, **args)
            assert np.array_equal(plain.coef, again.coef)
            assert np.array_equal(plain.cov, again.cov)
            assert (plain.loglik, plain.loglik0, plain.iterations) == (
                again.loglik,
                again.loglik0,
                again.iterations,
            )
    cph = CoxPHFitter().fit(
        sim, "T", "E", weights_col="W", entry_col="entry", strata=["S"], fit_options=TIGHT
    )
    _assert_matches_lifelines(fit_cox(X, sim["T"], sim["E"], layout=layout, **args), cph)
    coef = np.array([0.5, -0.4, 0.03])
    base = baseline_cumhaz(X, sim["T"], sim["E"], coef, **args)
    pd.testing.assert_frame_equal(
        base, baseline_cumhaz(X, sim["T"], sim["E"], coef, layout=layout, **args)
    )


def test_subsample_start_with_a_prepared_layout(
    sim: pd.DataFrame, monkeypatch: pytest.MonkeyPatch
) -> None:
    # the subsample start (lowered event threshold, as above) runs on the prepared layout too
    import unbin.models.cox.fit as engine

    monkeypatch.setattr(engine, "_WARM_EVENTS", 8)
    layout = prepare_layout(sim["T"], sim["E"], strata=sim["S"])
    plain = fit_cox(_x(sim), sim["T"], sim["E"], strata=sim["S"])
    again = fit_cox(_x(sim), sim["T"], sim["E"], strata=sim["S"], layout=layout)
    assert np.array_equal(plain.coef, again.coef) and np.array_equal(plain.cov, again.cov)
    assert plain.loglik == again.loglik
    kept = dict(layout.subsamples)  # the subsample layout, made by the first fit, is reused
    assert kept
    third = fit_cox(_x(sim), sim["T"], sim["E"], strata=sim["S"], layout=layout)
    assert np.array_equal(plain.coef, third.coef) and plain.loglik == third.loglik
    assert all(layout.subsamples[k] is v for k, v in kept.items())


def test_survival_fits_of_one_outcome_share_its_layout(sim: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter(entry_col=, strata=); the layout is made at the first fit,
    # kept in outcome.cache and reused; every fit equals a fit without it
    outcome = Outcome(
        "survival",
        sim["E"].to_numpy(float),
        time=sim["T"].to_numpy(float),
        entry=sim["entry"].to_numpy(float),
        strata=sim["S"].to_numpy(),
    )
    X = _x(sim)
    first = fit_survival(X[:, :1], outcome, ("x1",))
    layout = outcome.cache["cox_layout"]
    second = fit_survival(X, outcome, tuple(COLS))
    assert outcome.cache["cox_layout"] is layout
    for res, cols in ((first, [0]), (second, [0, 1, 2])):
        ref = fit_cox(X[:, cols], sim["T"], sim["E"], entry=sim["entry"], strata=sim["S"])
        assert res.ok and np.array_equal(res.coef, ref.coef) and res.loglik == ref.loglik
    cph = CoxPHFitter().fit(
        sim[COLS + ["T", "E", "S", "entry"]],
        "T",
        "E",
        entry_col="entry",
        strata=["S"],
        fit_options=TIGHT,
    )
    np.testing.assert_allclose(second.coef, cph.params_.to_numpy(), rtol=1e-6)
    assert outcome.subset(np.arange(len(sim)) < 1000).cache == {}


def test_layout_for_other_rows_is_refused(sim: pd.DataFrame) -> None:
    # common practice: a mismatch is refused with a message naming the problem
    layout = prepare_layout(sim["T"][:100], sim["E"][:100])
    with pytest.raises(ValueError, match="layout was prepared for 100 rows but X has 2000"):
        fit_cox(_x(sim), sim["T"], sim["E"], layout=layout)
    with pytest.raises(ValueError, match="layout must come from prepare_layout"):
        fit_cox(_x(sim), sim["T"], sim["E"], layout="cached")
    with pytest.raises(ValueError, match="greater than entry"):
        prepare_layout([1.0, 2.0], [1, 0], entry=[0.0, 2.0])


# ------------------------------------------------------------------ failures and inputs


def test_monotone_likelihood_is_reported_not_silent() -> None:
    # common practice: with no events in one group of a binary column the estimate is infinite
    rng = np.random.default_rng(3)
    n = 200
    group = rng.binomial(1, 0.5, n)
    X = np.column_stack([rng.normal(size=n), group])
    event = np.where(group == 1, rng.binomial(1, 0.7, n), 0)
    fit = fit_cox(X, rng.exponential(size=n), event)
    assert not fit.converged
    assert "column(s) [1]" in fit.message and "infinite" in fit.message


@pytest.mark.parametrize(
    ("make", "expected"),
    [
        (lambda x: np.column_stack([x, 2 * x + 1]), "collinear"),
        (lambda x: np.column_stack([x, np.ones_like(x)]), "constant"),
    ],
)
def test_singular_information_is_reported(make, expected) -> None:  # type: ignore[no-untyped-def]
    # common practice: a collinear or constant column makes the information singular
    rng = np.random.default_rng(4)
    n = 150
    fit = fit_cox(make(rng.normal(size=n)), rng.exponential(size=n), rng.binomial(1, 0.5, n))
    assert not fit.converged and expected in fit.message
    assert np.isnan(fit.coef).all() and np.isfinite(fit.loglik0)


def test_iteration_limit_is_reported(rossi: pd.DataFrame) -> None:
    # common practice: hitting max_iter is non-convergence, with the last iterate kept
    X = rossi[ROSSI_COLS].to_numpy(float)
    fit = fit_cox(X, rossi["week"], rossi["arrest"], max_iter=1)
    assert not fit.converged and fit.iterations == 1
    assert "max_iter" in fit.message and np.isfinite(fit.coef).all()


def test_invalid_inputs_raise_value_errors() -> None:
    # common practice: bad input is refused with a message naming the problem
    X = np.arange(6.0)[:, None]
    time = np.array([1.0, 2, 3, 4, 5, 6])
    with pytest.raises(ValueError, match="event must be 0/1"):
        fit_cox(X, time, [0, 1, 2, 1, 0, 1])
    with pytest.raises(ValueError, match="greater than entry"):
        fit_cox(X, time, [0, 1, 1, 1, 0, 1], entry=[0, 0, 3, 0, 0, 0])
    with pytest.raises(ValueError, match="missing or infinite"):
        fit_cox(X, [1.0, np.nan, 3, 4, 5, 6], [0, 1, 1, 1, 0, 1])
    with pytest.raises(ValueError, match="weights must be positive"):
        fit_cox(X, time, [0, 1, 1, 1, 0, 1], weights=[1, 1, 0, 1, 1, 1])
    with pytest.raises(ValueError, match="ties"):
        fit_cox(X, time, [0, 1, 1, 1, 0, 1], ties="exact")



@pytest.mark.parametrize(
    ("bad", "message"),
    [
        ({"entry": [0, 0, 3, 0, 0, 0]}, r"1 row\(s\) have time <= entry, e.g. row 2"),
        ({"entry": [0, 0, 0]}, "entry has 3 values but time has 6 rows"),
        ({"entry": [0, np.inf, 0, 0, 0, 0]}, r"entry has 1 missing or infinite value\(s\)"),
        ({"strata": ["a", None, "b", "a", "b", "a"]}, r"strata has 1 missing value\(s\)"),
        ({"strata": ["a", "b"]}, "strata must be one-dimensional with 6 values"),
    ],
)
def test_every_entry_point_refuses_bad_entry_and_strata_alike(
    bad: dict[str, object], message: str
) -> None:
    # common practice: one check of entry times and strata serves the fit, the prepared
    # layout, the baseline hazard and Harrell's C, so each refuses the same input in the
    # same words
    X = np.arange(6.0)[:, None]
    time = np.array([1.0, 2, 3, 4, 5, 6])
    event = [0, 1, 1, 1, 0, 1]
    calls = [
        lambda: fit_cox(X, time, event, **bad),
        lambda: prepare_layout(time, event, **bad),
        lambda: baseline_cumhaz(X, time, event, [0.1], **bad),
        lambda: concordance_order(time, event, **bad),
        lambda: concordance(time, X[:, 0], event, **bad),
    ]
    for call in calls:
        with pytest.raises(ValueError, match=message):
            call()

def test_chord_refits_near_a_start_reach_the_full_fit() -> None:
    """``refit_near`` (one Newton step, then chord steps with the start's information) reaches
    the maximum that ``fit_cox`` finds, on Rossi data shipped by lifelines with its published
    Efron fit as the reference (lifelines CoxPHFitter); from a start far off it
    declines (None) rather than return a poor estimate."""
    from unbin.models.cox import refit_near

    ro = load_rossi()
    cols = ["fin", "age", "race", "wexp", "mar", "paro", "prio"]
    X = ro[cols].to_numpy(float)
    layout = prepare_layout(ro["week"].to_numpy(float), ro["arrest"].to_numpy(float))
    published = np.array([-0.37942, -0.05744, 0.31390, -0.14980, -0.43370, -0.08487, 0.09150])
    near = refit_near(X, layout, published + 0.01)
    assert near is not None
    np.testing.assert_allclose(near, published, atol=6e-5)
    full = fit_cox(X, ro["week"], ro["arrest"], tol=1e-13)
    np.testing.assert_allclose(near, full.coef, rtol=1e-7, atol=1e-9)
    assert refit_near(X, layout, np.full(7, 5.0)) is None
    with pytest.raises(ValueError, match="prepared for 432 rows"):
        refit_near(X[:10], layout, published)


def test_efron_information_is_the_derivative_of_the_score(sim: pd.DataFrame) -> None:
    """The information (the per-tied-time sums of Efron's tied-event terms) against a
    brute-force central difference of the score, on the heavily tied sample with strata,
    delayed entry and weights (24 distinct times); and the score against a central difference
    of the log partial likelihood. Reference: numerical differentiation (common practice)."""
    from unbin.models.cox.likelihood import _evaluate, _standardised

    layout = prepare_layout(sim["T"], sim["E"], entry=sim["entry"], strata=sim["S"],
                            weights=sim["W"])
    assert layout.ties
    D, _, _ = _standardised(_x(sim), layout)
    beta = np.array([0.4, -0.3, 0.2])
    _, score, info = _evaluate(layout, D, beta, True)
    h = 1e-6
    for j in range(3):
        e = np.zeros(3)
        e[j] = h
        ll_p, s_p, _ = _evaluate(layout, D, beta + e, True)
        ll_m, s_m, _ = _evaluate(layout, D, beta - e, True)
        np.testing.assert_allclose(-(s_p - s_m) / (2 * h), info[:, j], rtol=1e-6, atol=1e-6)
        assert (ll_p - ll_m) / (2 * h) == pytest.approx(score[j], rel=1e-6, abs=1e-6)


def test_chord_refit_with_loglik_equals_the_full_fit(sim: pd.DataFrame) -> None:
    """``refit_near_loglik`` on a bootstrap replicate (rows repeated as drawn: more tied
    events) from the full-sample estimate gives the estimate and log partial likelihood of
    ``fit_cox`` iterated to full precision (the reference), with strata and delayed entry."""
    from unbin.models.cox import refit_near_loglik

    X = _x(sim)
    full = fit_cox(X, sim["T"], sim["E"], entry=sim["entry"], strata=sim["S"])
    rng = np.random.default_rng(5)
    m = np.sort(rng.integers(0, len(sim), len(sim)))
    t, e, en, st = (sim[c].to_numpy(float)[m] for c in ("T", "E", "entry", "S"))
    layout = prepare_layout(t, e, entry=en, strata=st)
    near = refit_near_loglik(X[m], layout, full.coef)
    assert near is not None
    ref = fit_cox(X[m], t, e, entry=en, strata=st, tol=1e-13)
    np.testing.assert_allclose(near[0], ref.coef, rtol=1e-7, atol=1e-9)
    assert near[1] == pytest.approx(ref.loglik, rel=1e-12, abs=1e-9)


# ------------------------------------------------------------ times in days, chord steps


@pytest.fixture(scope="module")
def days() -> pd.DataFrame:
    """A registry-like cohort whose times are whole days (about 1,100 distinct values for
    6,000 rows, so most event times are tied), with strata, late entry in whole days and
    integer weights: large enough for the layout's integer sort (4,096 rows or more)."""
    rng = np.random.default_rng(365)
    n = 6000
    x = np.column_stack([rng.normal(size=n), rng.binomial(1, 0.3, n), rng.uniform(40, 80, n)])
    stratum = rng.integers(0, 2, n)
    latent = rng.exponential(1 / np.exp(x @ np.array([0.4, 0.5, 0.02]) - 1.6 + 0.2 * stratum))
    follow = np.minimum(rng.exponential(4.0, n), 3.0)
    time = np.ceil(np.minimum(latent, follow) * 365.25)
    late = rng.uniform(size=n) < 0.3
    entry = np.floor(rng.uniform(0, 0.7, n) * time * late)
    return pd.DataFrame(x, columns=COLS).assign(
        T=time, E=(latent <= follow).astype(int), S=stratum, entry=entry,
        W=rng.integers(1, 3, n),
    )


def test_time_order_is_a_stable_sort_on_every_time_scale() -> None:
    # reference: numpy's stable argsort of the float times; whole numbers of small span take
    # the 16-bit path, others the general sort, both stable (rows tied in time in input order,
    # checked directly too)
    from unbin.models.cox.layout import _time_order

    rng = np.random.default_rng(7)
    days = np.ceil(rng.exponential(400.0, 10_000))
    for t in (days, days - 5_000.0, np.minimum(days, 3.0),  # ties, negative, nearly all tied
              days + 0.25, days * 70.0, np.round(days / 365.25, 3),  # fractions; wide span
              rng.normal(size=10_000), days[:100] / 7.0):  # no ties; few rows
        order = _time_order(t)
        assert np.array_equal(order, np.argsort(t, kind="stable"))
        ts = t[order]
        assert np.all(np.diff(ts) >= 0)
        tied = ts[1:] == ts[:-1]
        assert np.all(order[1:][tied] > order[:-1][tied])


def test_times_in_days_match_lifelines(days: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter (Efron ties; strata, entry_col, weights_col) and
    # statsmodels PHReg (Breslow ties), on times in whole days
    assert days["T"].nunique() < 1200 and days["E"].sum() > 1000
    X = _x(days)
    fit = fit_cox(X, days["T"], days["E"])
    cph = CoxPHFitter().fit(days[COLS + ["T", "E"]], "T", "E", fit_options=TIGHT)
    _assert_matches_lifelines(fit, cph)
    fit = fit_cox(X, days["T"], days["E"], entry=days["entry"], strata=days["S"],
                  weights=days["W"])
    cph = CoxPHFitter().fit(days[COLS + ["T", "E", "S", "entry", "W"]], "T", "E",
                            weights_col="W", entry_col="entry", strata=["S"], fit_options=TIGHT)
    _assert_matches_lifelines(fit, cph)
    fit = fit_cox(X, days["T"], days["E"], ties="breslow")
    res = sm.PHReg(days["T"].to_numpy(float), X, status=days["E"].to_numpy(),
                   ties="breslow").fit()
    np.testing.assert_allclose(fit.coef, res.params, rtol=1e-6)
    np.testing.assert_allclose(_se(fit), res.bse, rtol=1e-6)


@pytest.mark.parametrize("extras", ["none", "strata_entry_weights", "breslow"])
def test_chord_steps_reach_the_plain_newton_fit(
    days: pd.DataFrame, extras: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    # reference: the same engine with the information evaluated at every point (plain Newton,
    # an independent path to the maximum), and lifelines CoxPHFitter above. The subsample
    # start is forced (lowered event threshold) so that the full data take chord steps.
    import unbin.models.cox.fit as engine
    import unbin.models.cox.likelihood as lik

    monkeypatch.setattr(engine, "_WARM_EVENTS", 200)
    kwargs: dict[str, object] = {}
    if extras == "strata_entry_weights":
        kwargs = {"entry": days["entry"], "strata": days["S"], "weights": days["W"]}
    elif extras == "breslow":
        kwargs = {"ties": "breslow"}
    X = _x(days)
    calls = {"point": 0, "information": 0}
    real_point, real_information = engine._point, engine._information

    def point(*args):  # type: ignore[no-untyped-def]
        calls["point"] += 1
        return real_point(*args)

    def information(*args):  # type: ignore[no-untyped-def]
        calls["information"] += 1
        return real_information(*args)

    monkeypatch.setattr(engine, "_point", point)
    monkeypatch.setattr(engine, "_information", information)
    chord = fit_cox(X, days["T"], days["E"], **kwargs)  # type: ignore[arg-type]
    assert calls["information"] < calls["point"]  # some points had no information of their own
    monkeypatch.setattr(engine, "_CHORD_CONTRACTION", 0.0)  # every point gets its information
    plain = fit_cox(X, days["T"], days["E"], **kwargs)  # type: ignore[arg-type]
    assert chord.converged and plain.converged and chord.message == plain.message == ""
    np.testing.assert_allclose(chord.coef, plain.coef, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(chord.cov, plain.cov, rtol=1e-7)
    assert chord.loglik == pytest.approx(plain.loglik, abs=1e-8)
    if extras == "none":
        cph = CoxPHFitter().fit(days[COLS + ["T", "E"]], "T", "E", fit_options=TIGHT)
        _assert_matches_lifelines(chord, cph)
    # the covariance is the inverse of the information at the estimate (evaluated here afresh;
    # the fit's is the last point's, where no exp(eta) differs by more than about 1e-7)
    sample = {k: v for k, v in kwargs.items() if k != "ties"}
    L = prepare_layout(days["T"], days["E"], **sample)  # type: ignore[arg-type]
    D, scale, _ = lik._standardised(X, L)
    info = lik._evaluate(L, D, chord.coef * scale, extras != "breslow")[2]
    np.testing.assert_allclose(np.linalg.inv(info) / np.outer(scale, scale), chord.cov,
                               rtol=1e-6)


@pytest.mark.parametrize("layout_of", ["c_order", "f_order", "rows_dropped"])
def test_standardised_design_is_the_two_pass_computation(layout_of: str) -> None:
    # reference: numpy's two-pass mean and standard deviation of the sorted, kept rows
    # (brute force, written here), including a near-constant column far from zero (where a
    # one-pass variance would be rounding only) and a constant column
    from unbin.models.cox import likelihood as lik

    rng = np.random.default_rng(11)
    n = 9_000  # more than two blocks of rows, and a partial one
    time = np.ceil(rng.exponential(300.0, n))
    event = rng.uniform(size=n) < 0.4
    X = np.column_stack([
        rng.normal(size=n), rng.lognormal(3.0, 1.0, n), 1e6 + 1e-3 * rng.normal(size=n),
        np.full(n, 7.5), rng.integers(0, 2, n).astype(float),
    ])
    entry = None
    if layout_of == "f_order":
        X = np.asfortranarray(X)
    if layout_of == "rows_dropped":  # rows entering after their own time's last event go
        entry = np.where(rng.uniform(size=n) < 0.2, time - 0.5, 0.0)
    L = prepare_layout(time, event, entry=entry)
    if layout_of == "rows_dropped":
        assert L.order.size < n
    D, scale, sd = lik._standardised(X, L)
    kept = X[L.order]
    mean, ref_sd = kept.mean(axis=0), kept.std(axis=0)
    np.testing.assert_allclose(sd[:3], ref_sd[:3], rtol=1e-9)
    assert sd[3] == 0.0 and scale[3] == 1.0  # the constant column
    np.testing.assert_allclose(sd[4], ref_sd[4], rtol=1e-12)
    assert D.X1.flags.c_contiguous and np.all(D.X1[:, 0] == 1.0)
    # each column is the kept rows less one centre, divided by the scale; the centre is the
    # mean up to rounding (any centre gives the same fit: the partial likelihood is invariant
    # to shifts of a column)
    centre = kept - D.X1[:, 1:] * scale
    size = np.maximum(1.0, np.abs(mean))
    assert np.all(np.ptp(centre, axis=0) <= 1e-12 * size)
    np.testing.assert_allclose(centre[0], mean, rtol=1e-12, atol=1e-12)
    ref = (kept - mean) / np.where(sd > 0, ref_sd, 1.0)
    np.testing.assert_allclose(D.X1[:, 1:][:, [0, 1, 3, 4]], ref[:, [0, 1, 3, 4]], rtol=1e-9,
                               atol=1e-9)
    np.testing.assert_allclose(D.reach, np.abs(D.X1[:, 1:]).max(axis=0), rtol=1e-9)
    np.testing.assert_allclose(D.xwe, D.X1[:, 1:].T @ L.we, rtol=1e-12, atol=1e-9)


# ------------------------------------------------- refits of bootstrap replicates (secant)


def _replicate(df: pd.DataFrame, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """A bootstrap replicate as count weights: the rows drawn at least once and how often each
    was drawn (times its own weight ``W``)."""
    n = len(df)
    counts = np.random.default_rng(seed).multinomial(n, np.full(n, 1.0 / n))
    m = np.flatnonzero(counts)
    return m, counts[m] * df["W"].to_numpy(float)[m]


def _replicate_fits(
    df: pd.DataFrame, seed: int, ties: str, tol: float = 1e-9
) -> tuple[np.ndarray, list[np.ndarray], CoxFit, np.ndarray | None, np.ndarray]:
    """The replicate's design, the points the secant refit evaluated (last: its estimate),
    the engine's Newton fit to 1e-13 (the reference), the refit's estimate and the start."""
    from unbin.models.cox.fit import _near

    X = _x(df)
    kw = {"entry": df["entry"].to_numpy(float), "strata": df["S"].to_numpy()}
    start = fit_cox(X, df["T"], df["E"], weights=df["W"], ties=ties, **kw).coef  # type: ignore[arg-type]
    m, w = _replicate(df, seed)
    t, e = df["T"].to_numpy(float)[m], df["E"].to_numpy(float)[m]
    rep = {k: v[m] for k, v in kw.items()}
    layout = prepare_layout(t, e, weights=w, **rep)
    assert layout.ties and layout.late_entry and layout.n_strata == 2
    trace: list[np.ndarray] = []
    got = _near(X[m], layout, start, ties, tol, 50, False, trace)
    ref = fit_cox(X[m], t, e, weights=w, ties=ties, tol=1e-13, **rep)
    assert ref.converged, ref.message
    return X[m], trace, ref, None if got is None else got[0], start


@pytest.mark.parametrize("ties", ["efron", "breslow"])
def test_secant_refits_of_replicates_equal_a_newton_fit_to_1e_13(
    days: pd.DataFrame, ties: str
) -> None:
    """``refit_near`` on bootstrap replicates (count weights on weighted rows, tied days, two
    strata, delayed entry), started at the full-sample estimate, gives the estimate of the
    engine's own Newton fit iterated to tol 1e-13 (the reference), to a tenth of the stopping
    rule's bound on the linear predictor (1e-7 at tol 1e-9)."""
    from unbin.models.cox import refit_near

    for seed in range(6):
        Xm, trace, ref, got, start = _replicate_fits(days, seed, ties)
        assert got is not None
        assert float(np.abs(Xm @ (got - ref.coef)).max()) <= 1e-8
        np.testing.assert_allclose(got, ref.coef, rtol=1e-8, atol=1e-12)
        assert len(trace) >= 4  # a Newton step and at least two secant steps were needed
        m, w = _replicate(days, seed)
        layout = prepare_layout(days["T"].to_numpy(float)[m], days["E"].to_numpy(float)[m],
                                entry=days["entry"].to_numpy(float)[m],
                                strata=days["S"].to_numpy()[m], weights=w)
        assert np.array_equal(refit_near(Xm, layout, start, ties=ties), got)


def test_secant_refit_of_a_replicate_matches_lifelines(days: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter(weights_col=, strata=, entry_col=) on the replicate's rows
    # with their count weights (Efron ties), fitted to lifelines' tightest precision
    _, _, _, got, _ = _replicate_fits(days, 11, "efron")
    m, w = _replicate(days, 11)
    rows = days.iloc[m][COLS + ["T", "E", "S", "entry"]].assign(W=w)
    cph = CoxPHFitter().fit(rows, "T", "E", weights_col="W", entry_col="entry", strata=["S"],
                            fit_options=TIGHT)
    assert got is not None
    np.testing.assert_allclose(got, cph.params_.to_numpy(), rtol=1e-6)


@pytest.mark.parametrize("tol", [1e-9, 1e-11])
def test_secant_refit_does_not_stop_before_its_steps_settle(
    days: pd.DataFrame, tol: float
) -> None:
    """The estimate returned is within a tenth of the stopping bound (``100 * tol`` on every
    row's linear predictor) of the maximum (the engine's Newton fit to 1e-13), while every
    point the iteration passed through before its last one is farther than the bound itself:
    an iteration that returned any earlier point, or took the settling test on a step before
    the last, fails here."""
    bound = 100.0 * tol
    for seed in (3, 4):
        Xm, trace, ref, got, _ = _replicate_fits(days, seed, "efron", tol)
        assert got is not None and np.array_equal(trace[-1], got)
        off = [float(np.abs(Xm @ (b - ref.coef)).max()) for b in trace]
        assert off[-1] <= 0.1 * bound
        assert min(off[:-2]) > bound  # the points before the last evaluated one
        assert len(off) >= 4, off


def test_secant_steps_need_fewer_scores_than_chord_steps(
    days: pd.DataFrame, monkeypatch: pytest.MonkeyPatch
) -> None:
    """With the secant update switched off (the start's information kept: chord steps) the
    refit reaches the same maximum (reference: the engine's Newton fit to 1e-13) through as many
    points or more: the update is what saves score evaluations, not a looser stop. Replicates
    of 1,000 rows, whose estimates lie farther from the start than the full cohort's."""
    import unbin.models.cox.fit as engine

    small = days.iloc[:1000].reset_index(drop=True)
    fewer = 0
    for seed in range(8):
        Xm, secant, ref, got, _ = _replicate_fits(small, seed, "efron")
        with monkeypatch.context() as mp:
            mp.setattr(engine, "secant_update", lambda H, step, y: H)
            _, chord, _, got_chord, _ = _replicate_fits(small, seed, "efron")
        assert got is not None and got_chord is not None
        assert float(np.abs(Xm @ (got - ref.coef)).max()) <= 1e-8
        assert float(np.abs(Xm @ (got_chord - ref.coef)).max()) <= 1e-7
        assert len(secant) <= len(chord)
        fewer += len(secant) < len(chord)
    assert fewer >= 3


# ------------------------------- refits of replicates sharing the full sample's design and start


def _full_start(df: pd.DataFrame, ties: str) -> tuple[np.ndarray, NearStart]:
    """The full sample's estimate (weights ``W``, strata, delayed entry) and what its
    replicates' refits share (``near_start`` on the full sample's layout)."""
    from unbin.models.cox import near_start

    X = _x(df)
    kw = {"entry": df["entry"].to_numpy(float), "strata": df["S"].to_numpy(),
          "weights": df["W"].to_numpy(float)}
    full = fit_cox(X, df["T"], df["E"], ties=ties, **kw)  # type: ignore[arg-type]
    start = near_start(X, full.coef, prepare_layout(df["T"], df["E"], **kw), ties=ties)
    assert start is not None and start.H is not None
    return full.coef, start


def _drawn(df: pd.DataFrame, rows: np.ndarray, weights: np.ndarray) -> dict[str, np.ndarray]:
    return {"time": df["T"].to_numpy(float)[rows], "event": df["E"].to_numpy(float)[rows],
            "entry": df["entry"].to_numpy(float)[rows], "strata": df["S"].to_numpy()[rows],
            "weights": weights}


@pytest.mark.parametrize("ties", ["efron", "breslow"])
def test_replicate_refits_from_the_shared_start_equal_a_newton_fit_to_1e_13(
    days: pd.DataFrame, ties: str
) -> None:
    """``refit_replicate`` (the full sample's standardisation and information, scaled, shared
    by the replicates) on bootstrap replicates of the tied, stratified, late-entry cohort:
    (a) count weights on the rows drawn at least once (the rows drawn 0 times are absent) and
    (b) the drawn rows repeated as often as drawn (Efron: copies tie with each other), gives
    the engine's own Newton fit to tol 1e-13 (the reference) on every row's linear predictor
    to 1e-8, and, with the log partial likelihood, the reference's log partial likelihood."""
    from unbin.models.cox import refit_replicate

    _, start = _full_start(days, ties)
    X = _x(days)
    w_all = days["W"].to_numpy(float)
    for seed in range(4):
        m, w = _replicate(days, seed)  # (a): counts x W as case weights
        counts = np.random.default_rng(seed).multinomial(len(days), np.full(len(days), 1 / 6000))
        rep = np.repeat(np.arange(len(days)), counts)  # (b): rows repeated, weights W
        for rows, weights in ((m, w), (rep, w_all[rep])):
            arrays = _drawn(days, rows, weights)
            layout = prepare_layout(arrays["time"], arrays["event"], entry=arrays["entry"],
                                    strata=arrays["strata"], weights=weights)
            got = refit_replicate(start, X, rows, layout, with_loglik=True)
            ref = fit_cox(X[rows], ties=ties, tol=1e-13, **arrays)
            assert ref.converged and got is not None
            assert float(np.abs(X[rows] @ (got[0] - ref.coef)).max()) <= 1e-8
            assert got[1] == pytest.approx(ref.loglik, rel=1e-12, abs=1e-9)
        assert not np.array_equal(np.unique(rep), np.arange(len(days)))  # some counts are 0


def test_replicate_refit_from_the_shared_start_matches_lifelines(days: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter(weights_col=, strata=, entry_col=) on the replicate's rows
    # with their count weights (Efron ties), fitted to lifelines' tightest precision
    from unbin.models.cox import refit_replicate

    _, start = _full_start(days, "efron")
    m, w = _replicate(days, 11)
    arrays = _drawn(days, m, w)
    layout = prepare_layout(arrays["time"], arrays["event"], entry=arrays["entry"],
                            strata=arrays["strata"], weights=w)
    got = refit_replicate(start, _x(days), m, layout)
    rows = days.iloc[m][COLS + ["T", "E", "S", "entry"]].assign(W=w)
    cph = CoxPHFitter().fit(rows, "T", "E", weights_col="W", entry_col="entry", strata=["S"],
                            fit_options=TIGHT)
    assert got is not None
    np.testing.assert_allclose(got[0], cph.params_.to_numpy(), rtol=1e-6)


def test_replicate_refit_declines_where_a_column_is_constant(days: pd.DataFrame) -> None:
    """A replicate in which the binary column x2 is 0 on every drawn row: its coefficient is
    not estimable there (``fit_cox`` on the replicate says the information is singular, the
    reference), and ``refit_replicate`` returns None (its caller then fits with ``fit_cox``)
    instead of an arbitrary value along the flat direction; a start from far off is declined
    too."""
    from unbin.models.cox import refit_replicate

    coef, start = _full_start(days, "efron")
    X = _x(days)
    m = np.flatnonzero(days["x2"].to_numpy() == 0)[::2]
    arrays = _drawn(days, m, days["W"].to_numpy(float)[m])
    layout = prepare_layout(arrays["time"], arrays["event"], entry=arrays["entry"],
                            strata=arrays["strata"], weights=arrays["weights"])
    assert refit_replicate(start, X, m, layout) is None
    ref = fit_cox(X[m], **arrays)
    assert not ref.converged and "singular" in ref.message
    with pytest.raises(ValueError, match="prepared for"):
        refit_replicate(start, X, m[:-1], layout)
    with pytest.raises(ValueError, match="pass the same design"):
        refit_replicate(start, X[:, :2], m, layout)
    far = dataclasses.replace(start, beta=start.beta + 5.0)
    m2, w2 = _replicate(days, 2)
    arrays2 = _drawn(days, m2, w2)
    layout2 = prepare_layout(arrays2["time"], arrays2["event"], entry=arrays2["entry"],
                             strata=arrays2["strata"], weights=w2)
    assert refit_replicate(far, X, m2, layout2, max_iter=3) is None


def test_shared_starts_are_kept_per_design_without_keeping_the_design_alive(
    days: pd.DataFrame,
) -> None:
    """``cox_near_starts`` prepares a design's start once for every chunk of replicates (the
    same object back for the same array and start, a new one for another start), and its
    cache in the outcome does not keep the design alive once the caller drops it (a table's
    designs at registry size are hundreds of MB). Behaviour of the cache (no statistical
    reference)."""
    import gc
    import weakref

    from unbin.models.weighted import cox_near_starts

    o = Outcome("survival", days["E"].to_numpy(float), time=days["T"].to_numpy(float),
                entry=days["entry"].to_numpy(float), strata=days["S"].to_numpy(),
                weights=days["W"].to_numpy(float))
    X = np.ascontiguousarray(_x(days))
    coef, _ = _full_start(days, "efron")
    first = cox_near_starts(o, [X], [coef])[0]
    assert first is not None
    assert cox_near_starts(o, [X], [coef])[0] is first
    assert cox_near_starts(o, [X], [coef + 0.01])[0] is not first
    alive = weakref.ref(X)
    del X
    gc.collect()
    assert alive() is None


def _tie_runs_sample() -> pd.DataFrame:
    """Whole-day times with tied-event groups of 1, 2 and many (one time holds 30 events in
    stratum 0 and 3 in stratum 1), two strata sharing event times, delayed entry exactly at
    tied event times, and case weights (integers, which lifelines takes without warning)."""
    rng = np.random.default_rng(4711)
    n = 500
    x = np.column_stack([rng.normal(size=n), rng.binomial(1, 0.5, n)])
    stratum = rng.integers(0, 2, n)
    latent = rng.exponential(1 / np.exp(x @ np.array([0.6, -0.5]) - 3.0 + 0.4 * stratum))
    censor = rng.uniform(5, 60, n)
    time = np.ceil(np.minimum(latent, censor))
    event = (latent <= censor).astype(int)
    many = np.r_[np.flatnonzero(stratum == 0)[:30], np.flatnonzero(stratum == 1)[:3]]
    time[many], event[many] = 12.0, 1
    late = rng.uniform(size=n) < 0.35
    entry = np.where(late, np.floor(rng.uniform(0, 1, n) * time), 0.0)
    entry[np.flatnonzero(late & (time > 12))[:15]] = 12.0  # enter at the big tied time
    return pd.DataFrame(x, columns=["a", "b"]).assign(
        T=time, E=event, S=stratum, entry=entry, W=rng.integers(1, 4, n)
    )


def test_tied_event_runs_have_every_group_size() -> None:
    # the sample above holds what the run-based Efron sums must get right (checked, not assumed)
    df = _tie_runs_sample()
    d = df[df["E"] == 1].groupby(["S", "T"]).size()
    assert {1, 2}.issubset(set(d)) and d.max() >= 30
    shared = d.reset_index().groupby("T")["S"].nunique()
    assert (shared > 1).sum() > 5  # event times that fall in both strata
    assert ((df["entry"] == 12.0) & (df["T"] > 12)).sum() >= 15


@pytest.mark.parametrize("beta", [[0.0, 0.0], [0.7, -0.4], [-1.5, 2.0]])
def test_efron_runs_match_statsmodels_at_any_coefficients(beta: list[float]) -> None:
    # source: statsmodels PHReg(ties="efron", strata=, entry=).loglike/score/hessian at given
    # coefficients (not only at the maximum). statsmodels counts a row entering exactly at an
    # event time in that risk set (ours: entry < t), so the entries are moved off by half a day
    from unbin.models.cox.likelihood import _evaluate, _standardised

    df = _tie_runs_sample()
    entry = np.where(df["entry"] > 0, df["entry"] - 0.5, 0.0)
    X = df[["a", "b"]].to_numpy(float)
    ref = sm.PHReg(df["T"].to_numpy(float), X, status=df["E"].to_numpy(),
                   strata=df["S"].to_numpy(), entry=entry, ties="efron")
    for kwargs in ({"strata": df["S"], "entry": entry}, {"strata": df["S"]}, {}):
        layout = prepare_layout(df["T"], df["E"], **kwargs)  # type: ignore[arg-type]
        if len(kwargs) < 2:
            ref = sm.PHReg(df["T"].to_numpy(float), X, status=df["E"].to_numpy(),
                           strata=df["S"].to_numpy() if kwargs else None, ties="efron")
        D, scale, _ = _standardised(X, layout)
        b = np.asarray(beta)
        ll, score, info = _evaluate(layout, D, b * scale, True)
        assert ll == pytest.approx(ref.loglike(b), rel=1e-12)
        # (unbin works on standardised columns: coefficients times scale, score divided by it)
        np.testing.assert_allclose(score * scale, ref.score(b), rtol=1e-10, atol=1e-9)
        np.testing.assert_allclose(info * np.outer(scale, scale), -ref.hessian(b), rtol=1e-10)


def test_efron_runs_with_entry_at_tied_times_match_lifelines() -> None:
    # source: lifelines CoxPHFitter(strata=, entry_col=, weights_col=) (Efron ties; entry < t)
    df = _tie_runs_sample()
    fit = fit_cox(df[["a", "b"]].to_numpy(float), df["T"], df["E"], entry=df["entry"],
                  strata=df["S"], weights=df["W"])
    cph = CoxPHFitter().fit(df[["a", "b", "T", "E", "S", "entry", "W"]], "T", "E",
                            strata=["S"], entry_col="entry", weights_col="W", fit_options=TIGHT)
    _assert_matches_lifelines(fit, cph)
    fit = fit_cox(df[["a", "b"]].to_numpy(float), df["T"], df["E"], entry=df["entry"])
    cph = CoxPHFitter().fit(df[["a", "b", "T", "E", "entry"]], "T", "E", entry_col="entry",
                            fit_options=TIGHT)
    _assert_matches_lifelines(fit, cph)


@pytest.mark.parametrize("with_entry", [False, True])
def test_no_events_with_strata_is_reported_like_without(with_entry: bool) -> None:
    """A sample with no events has no estimable coefficients (common practice: the partial
    likelihood is constant). With strata the layout used to stop with numpy's broadcasting
    error; it now gives the same unconverged fit and message as without strata."""
    rng = np.random.default_rng(31)
    n = 40
    time = rng.uniform(1, 10, n)
    X = rng.normal(size=(n, 2))
    strata = np.repeat([0, 1, 2, 3], n // 4)
    entry = time * 0.2 if with_entry else None
    plain = fit_cox(X, time, np.zeros(n), entry=entry)
    stratified = fit_cox(X, time, np.zeros(n), entry=entry, strata=strata)
    assert not plain.converged and not stratified.converged
    assert stratified.message == plain.message
    assert "no events" in stratified.message
    layout = prepare_layout(time, np.zeros(n), entry=entry, strata=strata)
    assert layout.n == n
