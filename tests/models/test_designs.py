"""Sparse groups and sampling designs: Firth's penalised logistic fits, conditional logistic
fits of matched sets, and case-control extracts recalibrated to a prevalence."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import optimize, special, stats
from statsmodels.discrete.conditional_models import ConditionalLogit

from unbin.models import Outcome, fit
from unbin.models.base import FitResult
from unbin.refit.sampling_design import prior_shift

RefitFrame = Callable[[pd.DataFrame, dict[str, Any]], Any]


def _firth(X: np.ndarray, y: np.ndarray, names: tuple[str, ...] | None = None,
           weights: np.ndarray | None = None) -> FitResult:
    X = np.asarray(X, dtype=float).reshape(len(y), -1)
    names = names or tuple(f"x{j}" for j in range(X.shape[1]))
    res = fit("binary", X, Outcome("binary", y, weights=weights, penalty="firth"), names)
    assert res.ok, res.message
    return res


# ----------------------------------------------------------------------------- Firth


@pytest.mark.parametrize(("a", "b", "c", "d"), [(6, 24, 0, 20), (7, 13, 3, 27), (0, 9, 5, 5),
                                                  (12, 0, 4, 9)])
def test_firth_on_a_two_by_two_table_adds_one_half_to_every_cell(a: int, b: int, c: int,
                                                                 d: int) -> None:
    # Published property (Firth 1993; Heinze & Schemper 2002): with one binary
    # covariate, Firth's estimates equal the log odds with 1/2 added to each cell, also when a
    # cell is empty (separation; the ML estimate is then infinite).
    x = np.r_[np.zeros(a + b), np.ones(c + d)]
    y = np.r_[np.ones(a), np.zeros(b), np.ones(c), np.zeros(d)]
    res = _firth(x, y)
    assert res.coef[0] == pytest.approx(np.log((a + 0.5) / (b + 0.5)), abs=1e-8)
    assert res.coef[1] == pytest.approx(np.log((c + 0.5) / (d + 0.5) * (b + 0.5) / (a + 0.5)),
                                        abs=1e-8)
    assert res.extra["penalty"] == "firth"
    assert res.extra["variance"] == "model; Firth-penalised"


def _penalised_loglik(beta: np.ndarray, X1: np.ndarray, y: np.ndarray) -> float:
    """log L + 1/2 log|X' W X| written out (Firth 1993: the Jeffreys-prior penalty)."""
    eta = X1 @ beta
    mu = special.expit(eta)
    ll = float(np.sum(y * eta - np.logaddexp(0.0, eta)))
    info = (X1 * (mu * (1 - mu))[:, None]).T @ X1
    return ll + 0.5 * float(np.linalg.slogdet(info)[1])


def _sparse_legacy_design(seed: int, n: int = 120) -> tuple[np.ndarray, np.ndarray]:
    """Invented clinic data: three legacy groups of a marker (the lowest has no events) and
    a continuous covariate."""
    rng = np.random.default_rng(seed)
    g = rng.integers(0, 3, n)
    age = rng.normal(0.0, 1.0, n)
    y = (rng.uniform(size=n) < special.expit(-1.0 + 0.8 * g + 0.5 * age)).astype(float)
    y[g == 0] = 0.0
    X = np.c_[(g == 1).astype(float), (g == 2).astype(float), 10.0 * age + 50.0]
    return X, y


def test_firth_maximises_the_penalised_likelihood_written_out_independently() -> None:
    X, y = _sparse_legacy_design(3)
    # the ML fit separates (the reference group has no events)
    ml = fit("binary", X, Outcome("binary", y), ("g1", "g2", "age"))
    assert not ml.ok and "separation" in ml.message and "design: {firth: true}" in ml.message
    res = _firth(X, y, ("g1", "g2", "age"))
    X1 = np.c_[np.ones(len(y)), X]
    # Independent computation: scipy's BFGS on the penalised log-likelihood written out above,
    # started far from the answer.
    ref = optimize.minimize(lambda b: -_penalised_loglik(b, X1, y), np.zeros(4), method="BFGS",
                            options={"gtol": 1e-10})
    np.testing.assert_allclose(res.coef, ref.x, atol=2e-5)
    assert res.extra["penalised_loglik"] == pytest.approx(-ref.fun, abs=1e-8)
    mu = special.expit(X1 @ res.coef)
    np.testing.assert_allclose(res.loglik, np.sum(y * np.log(mu) + (1 - y) * np.log1p(-mu)),
                               rtol=1e-10)
    # Wald covariance: the inverse Fisher information at the penalised estimate
    info = (X1 * (mu * (1 - mu))[:, None]).T @ X1
    np.testing.assert_allclose(res.cov, np.linalg.inv(info), rtol=1e-7)


def test_firth_on_a_shipped_small_dataset_matches_the_written_out_penalised_likelihood() -> None:
    # statsmodels' shipped Spector & Mazzeo (1980) data (32 students: grade ~ GPA, TUCE, PSI),
    # a small sample where Firth's correction matters; the reference is scipy's BFGS on the
    # penalised log-likelihood written out above, and the ML fit (statsmodels Logit) lies
    # farther from zero on every slope (Firth's estimate shrinks towards zero).
    data = sm.datasets.spector.load_pandas().data
    X = data[["GPA", "TUCE", "PSI"]].to_numpy(float)
    y = data["GRADE"].to_numpy(float)
    res = _firth(X, y, ("GPA", "TUCE", "PSI"))
    X1 = np.c_[np.ones(len(y)), X]
    ref = optimize.minimize(lambda b: -_penalised_loglik(b, X1, y), np.zeros(4), method="BFGS",
                            options={"gtol": 1e-10})
    np.testing.assert_allclose(res.coef, ref.x, atol=2e-5)
    ml = sm.Logit(y, X1).fit(disp=0, method="newton", tol=1e-12)
    assert np.all(np.abs(res.coef[1:]) < np.abs(ml.params[1:]))


def test_firth_frequency_weights_equal_replicated_rows() -> None:
    X, y = _sparse_legacy_design(4, n=60)
    w = np.random.default_rng(5).integers(1, 4, len(y)).astype(float)
    res = _firth(X, y, weights=w)
    rep = np.repeat(np.arange(len(y)), w.astype(int))
    brute = _firth(X[rep], y[rep])  # brute force: each row repeated w times
    np.testing.assert_allclose(res.coef, brute.coef, atol=1e-8)
    np.testing.assert_allclose(res.cov, brute.cov, rtol=1e-6)


def test_firth_approaches_maximum_likelihood_as_the_sample_grows() -> None:
    # Firth's correction removes the O(1/n) bias term, so penalised - ML = O(1/n) (Firth 1993);
    # reference ML: statsmodels Logit.
    gaps = []
    for n in (150, 1200, 9600):
        rng = np.random.default_rng(n)
        x = rng.normal(size=n)
        y = (rng.uniform(size=n) < special.expit(-0.5 + 0.8 * x)).astype(float)
        ml = sm.Logit(y, sm.add_constant(x)).fit(disp=0, method="newton", tol=1e-12)
        gaps.append(float(np.max(np.abs(_firth(x, y).coef - ml.params))))
    assert gaps[0] > gaps[1] > gaps[2]
    assert gaps[2] < 2e-3
    assert gaps[2] / gaps[0] < 0.1  # 64 times the rows: about 1/64 of the gap expected


def test_firth_reduces_small_sample_bias_and_its_wald_intervals_cover() -> None:
    # Seeded simulation with a known truth (beta = 1, n = 40): ML is biased away from zero in
    # small samples (and infinite under separation); Firth's estimate is nearly unbiased
    # (Firth 1993; Heinze & Schemper 2002). Monte-Carlo tolerance: 600 replicates; the
    # coverage band is two-sided (too wide fails too).
    rng = np.random.default_rng(11)
    reps, n, beta = 600, 40, 1.0
    firth_est, ml_est, cover = [], [], []
    for _ in range(reps):
        x = rng.normal(size=n)
        y = (rng.uniform(size=n) < special.expit(-0.5 + beta * x)).astype(float)
        res = _firth(x, y)
        firth_est.append(res.coef[1])
        lo, hi = res.coef[1] + np.array([-1, 1]) * 1.959964 * res.se()[1]
        cover.append(lo <= beta <= hi)
        ml = fit("binary", x[:, None], Outcome("binary", y), ("x",))
        if ml.ok:
            ml_est.append(ml.coef[1])
    firth_bias = np.mean(firth_est) - beta
    ml_bias = np.mean(ml_est) - beta  # on the replicates where ML is finite (favours ML)
    assert ml_bias > 0.06
    assert abs(firth_bias) < 0.5 * ml_bias
    assert abs(firth_bias) < 0.06  # about 3 Monte-Carlo standard errors (sd ~ 0.4 / sqrt 600)
    assert 0.93 <= np.mean(cover) <= 0.98


def _sparse_frame(seed: int, n: int = 400) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    marker = rng.uniform(0.0, 10.0, n)
    y = (rng.uniform(size=n) < special.expit(-3.0 + 0.45 * marker)).astype(float)
    y[marker < 1.5] = 0.0  # the lowest legacy group has no events
    return pd.DataFrame({"relapse": y, "marker": marker,
                         "centre": rng.integers(0, 8, n)})


def _binary_raw(**extra: Any) -> dict[str, Any]:
    a: dict[str, Any] = {"name": "a", "outcome": {"type": "binary", "event": "relapse"},
                         "exposure": "marker",
                         "continuous": {"forms": ["linear", "spline"], "spline_knots": [3]}}
    a.update(extra)
    return {"study": "sim", "cohorts": [{"name": "sim", "path": "sim.parquet"}],
            "groupings": {"marker": {"cuts": [1.5, 5.0]}}, "risk_thresholds": [0.2],
            "analyses": [a]}


def test_a_legacy_group_without_events_is_reproduced_by_the_firth_option(
        refit_frame: RefitFrame) -> None:
    from unbin.questions.effects import effects_table
    from unbin.questions.fits import fits_table

    df = _sparse_frame(7)
    spec, r = refit_frame(df, _binary_raw())
    legacy = r.get("legacy", "legacy").result
    assert not legacy.ok and "separation" in legacy.message
    spec, r = refit_frame(df, _binary_raw(design={"firth": True}))
    legacy = r.get("legacy", "legacy").result
    assert legacy.ok
    # reference: the 3-group design fitted by the penalised likelihood written out in this test
    g = np.digitize(df["marker"], [1.5, 5.0])
    X1 = np.c_[np.ones(len(df)), g == 1, g == 2].astype(float)
    ref = optimize.minimize(lambda b: -_penalised_loglik(b, X1, df["relapse"].to_numpy()),
                            np.zeros(3), method="BFGS", options={"gtol": 1e-10})
    np.testing.assert_allclose(legacy.coef, ref.x, atol=2e-5)
    fits = fits_table(r, spec)
    assert set(fits.loc[fits["status"] == "ok", "variance"]) == {"model; Firth-penalised"}
    eff = effects_table(r, spec)
    assert set(eff.loc[eff["estimate"].notna(), "variance"]) == {"model; Firth-penalised"}
    # with a cluster the label names both
    spec, r = refit_frame(df, _binary_raw(design={"firth": True}, cluster="centre"))
    assert r.get("linear", "none").result.extra["variance"] == (
        "cluster-robust (8 clusters); Firth-penalised")


# ----------------------------------------------------------------------------- Firth, Cox


def _penalised_partial_loglik(beta: np.ndarray, X: np.ndarray, time: np.ndarray,
                              event: np.ndarray) -> float:
    """l(b) + 1/2 log|I(b)| of the Cox model, written out over event times (no tied times:
    Breslow = Efron = exact); Heinze & Schemper 2001."""
    eta = X @ beta
    ll, info = 0.0, np.zeros((X.shape[1], X.shape[1]))
    for i in np.flatnonzero(event):
        at_risk = time >= time[i]
        w = np.exp(eta[at_risk])
        xs = X[at_risk]
        mean = w @ xs / w.sum()
        ll += eta[i] - np.log(w.sum())
        info += (xs * w[:, None]).T @ xs / w.sum() - np.outer(mean, mean)
    return ll + 0.5 * float(np.linalg.slogdet(info)[1])


def _sparse_survival(seed: int, n: int, empty_group: bool = True) -> dict[str, np.ndarray]:
    """Invented follow-up: three legacy groups (the lowest without events when
    ``empty_group``), a continuous covariate, uniform censoring."""
    rng = np.random.default_rng(seed)
    g = rng.integers(0, 3, n)
    age = rng.normal(size=n)
    t = rng.exponential(1.0 / np.exp(0.5 * g + 0.3 * age))
    c = rng.uniform(0.0, 2.0, n)
    event = (t <= c).astype(float)
    if empty_group:
        event[g == 0] = 0.0
    return {"X": np.c_[g == 1, g == 2, age].astype(float), "time": np.minimum(t, c),
            "event": event}


def test_firth_cox_maximises_the_penalised_partial_likelihood_written_out() -> None:
    d = _sparse_survival(3, 150)
    names = ("g1", "g2", "age")
    ml = fit("survival", d["X"], Outcome("survival", d["event"], time=d["time"]), names)
    assert not ml.ok and "monotone likelihood" in ml.message and "firth: true" in ml.message
    res = fit("survival", d["X"], Outcome("survival", d["event"], time=d["time"],
                                          penalty="firth"), names)
    assert res.ok and res.extra["variance"] == "model; Firth-penalised"
    # Independent computation: scipy's BFGS on the penalised partial likelihood above.
    ref = optimize.minimize(
        lambda b: -_penalised_partial_loglik(b, d["X"], d["time"], d["event"]), np.zeros(3),
        method="BFGS", options={"gtol": 1e-9})
    np.testing.assert_allclose(res.coef, ref.x, atol=2e-5)
    assert res.extra["penalised_loglik"] == pytest.approx(-ref.fun, abs=1e-7)


def test_firth_cox_approaches_the_partial_likelihood_estimate_as_the_sample_grows() -> None:
    # Reference: statsmodels PHReg (Breslow; continuous times have no ties); the Firth
    # correction is O(1/events) (Heinze & Schemper 2001).
    from statsmodels.duration.hazard_regression import PHReg

    gaps = []
    for n in (120, 960, 7680):
        d = _sparse_survival(n, n, empty_group=False)
        res = fit("survival", d["X"], Outcome("survival", d["event"], time=d["time"],
                                              penalty="firth"), ("g1", "g2", "age"))
        ref = PHReg(d["time"], d["X"], status=d["event"], ties="breslow").fit()
        gaps.append(float(np.max(np.abs(res.coef - ref.params))))
    assert gaps[0] > gaps[1] > gaps[2]
    assert gaps[2] / gaps[0] < 0.1


def test_firth_cox_wald_intervals_cover_in_small_samples() -> None:
    # Seeded simulation with a known truth (log hazard ratio 1 per unit, n = 40, about 60%
    # events; 300 replicates): the Wald interval at the penalised estimate covers within a
    # two-sided Monte-Carlo band (0.95 +- 0.035, about 3 MC standard errors), and the
    # estimate is close to unbiased (Heinze & Schemper 2001).
    rng = np.random.default_rng(21)
    reps, n, beta = 300, 40, 1.0
    est, cover = [], []
    for _ in range(reps):
        x = rng.normal(size=n)
        t = rng.exponential(1.0 / np.exp(beta * x))
        c = rng.exponential(1.5, n)
        res = fit("survival", x[:, None], Outcome("survival", (t <= c).astype(float),
                                                  time=np.minimum(t, c), penalty="firth"), ("x",))
        est.append(res.coef[0])
        cover.append(abs(res.coef[0] - beta) <= 1.959964 * res.se()[0])
    assert 0.915 <= np.mean(cover) <= 0.985
    assert abs(np.mean(est) - beta) < 0.05  # MC standard error about 0.015


# ----------------------------------------------------------------------------- matched sets


def _matched(seed: int, sets: int, beta: float, cases_per_set: int = 1) -> dict[str, np.ndarray]:
    """Invented matched study: each set has its own baseline (the matching factor), 1 to 4
    controls, and the case(s) drawn within the set with odds exp(beta x + 0.4 z)."""
    rng = np.random.default_rng(seed)
    xs, zs, ys, ss = [], [], [], []
    for s in range(sets):
        m = cases_per_set + int(rng.integers(1, 5))
        shift = rng.normal()
        x = rng.normal(shift, 1.0, m)
        z = rng.normal(size=m)
        y = np.zeros(m)
        w = np.exp(beta * x + 0.4 * z)
        y[rng.choice(m, cases_per_set, replace=False, p=w / w.sum())] = 1.0
        xs.append(x), zs.append(z), ys.append(y), ss.append(np.full(m, s))
    return {"x": np.concatenate(xs), "z": np.concatenate(zs), "y": np.concatenate(ys),
            "set": np.concatenate(ss)}


def test_matched_sets_match_statsmodels_conditional_logit() -> None:
    d = _matched(1, 150, 0.6)
    X = np.c_[d["x"], d["z"]]
    res = fit("binary", X, Outcome("binary", d["y"], strata=d["set"]), ("x", "z"))
    assert res.ok and res.names == ("x", "z") and not res.warnings
    ref = ConditionalLogit(d["y"], X, groups=d["set"]).fit(method="newton", disp=0, tol=1e-12,
                                                           maxiter=100)
    np.testing.assert_allclose(res.coef, ref.params, atol=1e-6)
    np.testing.assert_allclose(res.se(), ref.bse, atol=1e-6)
    assert res.loglik == pytest.approx(ref.llf, abs=1e-6)
    assert res.extra["variance"] == "model; conditional on the matched set"


def test_matched_c_index_counts_case_control_pairs_within_sets() -> None:
    from unbin.models.discrimination import c_index

    d = _matched(4, 80, 0.6, cases_per_set=2)
    lp = np.round(d["x"], 1)  # ties within sets count one half
    # brute force: every (case, control) pair of one set
    hits = pairs = 0.0
    for s in np.unique(d["set"]):
        idx = d["set"] == s
        case, ctrl = lp[idx & (d["y"] == 1)], lp[idx & (d["y"] == 0)]
        diff = case[:, None] - ctrl[None, :]
        hits += np.sum(diff > 0) + 0.5 * np.sum(diff == 0)
        pairs += diff.size
    got = c_index(Outcome("binary", d["y"], strata=d["set"]), lp)
    assert got == pytest.approx(hits / pairs, abs=1e-12)


def test_matched_sets_with_several_cases_warn_of_the_approximation() -> None:
    d = _matched(2, 60, 0.6, cases_per_set=2)
    res = fit("binary", d["x"][:, None], Outcome("binary", d["y"], strata=d["set"]), ("x",))
    assert res.ok
    assert any("more than one case" in w for w in res.warnings)


def test_matched_wald_test_keeps_its_size_under_the_null() -> None:
    # Seeded simulation under the null (beta = 0) with a strong matching factor that an
    # unconditional fit would have to estimate; 400 replicates, band 0.05 +- 3 MC SE.
    reps = 400
    rejected = 0
    for rep in range(reps):
        d = _matched(100 + rep, 60, 0.0)
        res = fit("binary", d["x"][:, None], Outcome("binary", d["y"], strata=d["set"]), ("x",))
        p = 2 * stats.norm.sf(abs(res.coef[0] / res.se()[0]))
        rejected += p < 0.05
    band = 3 * np.sqrt(0.05 * 0.95 / reps)
    assert 0.05 - band <= rejected / reps <= 0.05 + band


def test_a_matched_analysis_gives_conditional_effects_and_no_absolute_risks(
        refit_frame: RefitFrame) -> None:
    from unbin.questions.confounding import confounding_table
    from unbin.questions.effects import effects_table
    from unbin.questions.net_benefit import net_benefit_table
    from unbin.questions.thresholds import thresholds_table

    d = _matched(3, 200, 0.5)
    df = pd.DataFrame({"case": d["y"], "marker": d["x"], "smoker": (d["z"] > 0).astype(float),
                       "set_id": d["set"]})
    raw = _binary_raw(outcome={"type": "binary", "event": "case"}, adjust=["smoker"],
                      design={"matched_set": "set_id"})
    raw["groupings"] = {"marker": {"cuts": [0.0]}}
    spec, r = refit_frame(df, raw)
    lin = r.get("linear", "continuous").result
    ref = ConditionalLogit(df["case"], df[["marker", "smoker"]], groups=df["set_id"]).fit(
        method="newton", disp=0, tol=1e-12, maxiter=100)
    np.testing.assert_allclose(lin.coef, ref.params.to_numpy(), atol=1e-6)
    eff = effects_table(r, spec)
    per_unit = eff[(eff["form"] == "linear") & (eff["adjustment"] == "continuous")
                   & (eff["contrast_type"] == "per_unit")].iloc[0]
    assert per_unit["estimate"] == pytest.approx(ref.params["marker"], abs=1e-6)
    assert per_unit["se"] == pytest.approx(ref.bse["marker"], abs=1e-6)
    assert per_unit["variance"] == "model; conditional on the matched set"
    assert (eff.loc[eff["form"] == "legacy", "status"] == "ok").all()
    for table in (thresholds_table(r, spec), net_benefit_table(r, spec)):
        assert set(table["status"]) == {"skipped"}
        assert "no intercept" in table["reason"].iloc[0]
    conf = confounding_table(r, spec)
    assert set(conf["status"]) == {"skipped"} and "matched" in conf["message"].iloc[0]


# ----------------------------------------------------------------------------- case-control


def _population(seed: int) -> tuple[pd.DataFrame, pd.DataFrame]:
    """An invented population (prevalence about 5%) and a case-control extract of it: every
    case and a random sample of twice as many controls."""
    rng = np.random.default_rng(seed)
    n = 40000
    marker = rng.normal(0.0, 1.0, n)
    y = (rng.uniform(size=n) < special.expit(-3.4 + 0.8 * marker)).astype(float)
    cases = np.flatnonzero(y == 1)
    controls = rng.choice(np.flatnonzero(y == 0), 2 * cases.size, replace=False)
    population = pd.DataFrame({"relapse": y, "marker": marker})
    return population, population.iloc[np.r_[cases, controls]].reset_index(drop=True)


def _case_control(seed: int) -> tuple[pd.DataFrame, float]:
    population, extract = _population(seed)
    return extract, float(population["relapse"].mean())


def test_prior_correction_recovers_the_population_intercept() -> None:
    # King & Zeng 2001: logit fits to outcome-sampled data give the right slope and an
    # intercept off by log[(1 - tau)/tau * ybar/(1 - ybar)]. Seeded simulation, truth -3.4;
    # tolerance 0.15, about 3 standard errors of the intercept at ~2,000 cases.
    df, tau = _case_control(5)
    o = Outcome("binary", df["relapse"].to_numpy())
    res = fit("binary", df[["marker"]].to_numpy(), o, ("marker",))
    assert res.coef[1] == pytest.approx(0.8, abs=0.1)
    assert res.coef[0] > -2.0  # the extract's own intercept is far off
    from unbin.spec import parse_spec

    spec = parse_spec(_binary_raw(design={"prevalence": tau}), base=__import__("pathlib").Path())
    corrected = res.coef[0] + prior_shift(spec.analyses[0], o)
    assert corrected == pytest.approx(-3.4, abs=0.15)


def test_case_control_decisions_need_the_prevalence(refit_frame: RefitFrame) -> None:
    from unbin.questions.net_benefit import net_benefit_table
    from unbin.questions.thresholds import thresholds_table

    df, tau = _case_control(6)
    spec, r = refit_frame(df, _binary_raw(design={"case_control": True}))
    for table in (thresholds_table(r, spec), net_benefit_table(r, spec)):
        assert set(table["status"]) == {"skipped"} and "prevalence" in table["reason"].iloc[0]
    spec, r = refit_frame(df, _binary_raw(design={"prevalence": tau}))
    nb = net_benefit_table(r, spec)
    ok = nb[nb["status"] == "ok"]
    # treat-all in the population: prevalence - (1 - prevalence) pt / (1 - pt) (Vickers &
    # Elkin 2006), not the extract's case fraction of about 1/3
    all_ = ok[ok["rule"] == "treat all"]
    expected = tau - (1 - tau) * all_["threshold"] / (1 - all_["threshold"])
    np.testing.assert_allclose(all_["net_benefit"], expected, atol=1e-12)
    # the recalibrated linear model's mean risk is close to the population prevalence
    from unbin.questions.decisions import decision_models

    d = decision_models(r, spec)
    lin = next(c for c in d.curves if c.model == "linear")
    risk = lin.risk
    # population mean risk = controls' mean weighted up: sum over cases/tau equals the
    # population size, so reweight rows by tau/ybar (cases) and (1-tau)/(1-ybar) (controls)
    y = r.outcome.y
    ybar = y.mean()
    w = np.where(y == 1, tau / ybar, (1 - tau) / (1 - ybar))
    assert np.average(risk, weights=w) == pytest.approx(tau, rel=0.08)
    th = thresholds_table(r, spec)
    # the implied threshold of the linear model (no adjustment variables) is where the
    # population risk expit(-3.4 + 0.8 x) reaches 0.2: x = (logit 0.2 + 3.4) / 0.8 = 2.52
    # (seeded truth; tolerance 0.25, several Monte-Carlo standard errors)
    row = th[(th["model"] == "linear") & (th["status"] == "ok")].iloc[0]
    assert row["threshold"] == 0.2
    assert row["exposure_value"] == pytest.approx((special.logit(0.2) + 3.4) / 0.8, abs=0.25)
    # without the recalibration (the extract's own case fraction of 1/3) it would sit far lower
    assert row["exposure_value"] > 2.0


def test_case_control_net_benefit_estimates_the_population_net_benefit(
        refit_frame: RefitFrame) -> None:
    # Seeded simulation: the same rule ("treat when the recalibrated linear model's risk >=
    # p_t") applied to the whole invented population gives the population's net benefit
    # (Vickers & Elkin 2006) directly; the extract's reweighted estimate must be close
    # (tolerance 0.003: a few Monte-Carlo SEs with about 2,000 cases and 4,000 controls).
    from unbin.questions.decisions import decision_models
    from unbin.questions.net_benefit import net_benefit_table

    population, extract = _population(8)
    tau = float(population["relapse"].mean())
    spec, r = refit_frame(extract, _binary_raw(design={"prevalence": tau}))
    lin = next(c for c in decision_models(r, spec).curves if c.model == "linear")
    nb = net_benefit_table(r, spec)
    rows = nb[(nb["rule"] == "risk: linear") & nb["threshold"].isin([0.05, 0.1, 0.2])]
    assert len(rows) == 3
    y = population["relapse"].to_numpy()
    risk = special.expit(lin.curve(population["marker"].to_numpy()) + float(lin.rest[0]))
    for _, row in rows.iterrows():
        pt = row["threshold"]
        treat = risk >= pt
        truth = np.mean(treat & (y == 1)) - np.mean(treat & (y == 0)) * pt / (1 - pt)
        assert row["net_benefit"] == pytest.approx(truth, abs=0.003)
        assert row["treated"] == pytest.approx(np.mean(treat), abs=0.02)


# ----------------------------------------------------------------------------- the spec


@pytest.mark.parametrize(("change", "says"), [
    ({"outcome": {"type": "count", "count": "relapse", "persontime": "marker"},
      "design": {"firth": True}}, "design: the design block is for binary outcomes"),
    ({"outcome": {"type": "survival", "event": "relapse", "time": "marker"},
      "design": {"firth": True, "matched_set": "centre"}}, "takes none of ['matched_set']"),
    ({"design": {"matched_set": "marker"}}, "design.matched_set: 'marker' is also the exposure"),
    ({"design": {"matched_set": "centre", "firth": True}}, "firth is not available"),
    ({"design": {"case_control": False, "prevalence": 0.1}}, "case_control is false"),
])
def test_design_block_problems_name_the_field(change: dict[str, Any], says: str) -> None:
    from unbin.spec.checks import semantic_problems

    problems = semantic_problems(_binary_raw(**change))
    assert any(says in p for p in problems), problems


def test_firth_alone_is_accepted_for_a_survival_outcome() -> None:
    from unbin.spec.checks import semantic_problems

    raw = _binary_raw(outcome={"type": "survival", "event": "relapse", "time": "marker"},
                      design={"firth": True})
    assert not [p for p in semantic_problems(raw) if "design" in p]


def test_design_prevalence_outside_zero_one_is_refused_by_the_schema() -> None:
    from unbin.spec.load import schema_problems

    problems = schema_problems(_binary_raw(design={"prevalence": 1.5}))
    assert any("prevalence" in p for p in problems), problems


def test_a_missing_matched_set_column_is_named_before_any_fit(tmp_path: Any) -> None:
    from unbin.data.checks import data_problems
    from unbin.spec import parse_spec

    _sparse_frame(1).to_parquet(tmp_path / "sim.parquet")
    spec = parse_spec(_binary_raw(design={"matched_set": "centr"}), base=tmp_path)
    problems = data_problems(spec)
    assert any("design.matched_set: column 'centr' is not in the extract" in p
               and "Did you mean 'centre'" in p for p in problems), problems


def _every_table(refit_frame: RefitFrame, df: pd.DataFrame,
                 raw: dict[str, Any]) -> dict[str, pd.DataFrame]:
    import importlib

    import unbin.questions as q

    raw["resampling"] = {"bootstrap": 10, "permutations": 19}
    spec, r = refit_frame(df, raw)
    out = {}
    for name, ref in {**q.QUESTION_TABLES, **q.RESAMPLING_TABLES}.items():
        module, fn = ref.split(":")
        out[name] = getattr(importlib.import_module(f"unbin.{module}"), fn)(r, spec)
    return out


def test_every_table_runs_for_a_matched_design_with_a_modifier(refit_frame: RefitFrame) -> None:
    d = _matched(3, 150, 0.5)
    df = pd.DataFrame({"case": d["y"], "marker": d["x"], "smoker": (d["z"] > 0).astype(float),
                       "statin": (d["z"] > 0.5).astype(float), "set_id": d["set"]})
    raw = _binary_raw(outcome={"type": "binary", "event": "case"}, adjust=["smoker"],
                      by="statin", design={"matched_set": "set_id"})
    raw["groupings"] = {"marker": {"cuts": [0.0]}}
    tables = _every_table(refit_frame, df, raw)
    for name in ("fits", "effects", "curves", "ranges"):
        assert set(tables[name]["status"]) == {"ok"}, (name, tables[name]["message"].unique())
    for name in ("thresholds", "net_benefit"):
        assert set(tables[name]["status"]) == {"skipped"}


def test_every_table_runs_for_a_firth_cox_analysis_with_an_empty_group(
        refit_frame: RefitFrame) -> None:
    s = _sparse_survival(3, 300)
    marker = (2 * s["X"][:, 1] + s["X"][:, 0]
              + np.random.default_rng(1).uniform(0.0, 0.9, 300))  # groups 0, 1, 2 -> cuts 1, 2
    df = pd.DataFrame({"t": s["time"], "e": s["event"], "marker": marker, "age": s["X"][:, 2]})
    raw = _binary_raw(outcome={"type": "survival", "event": "e", "time": "t", "horizon": 1.0},
                      adjust=["age"], design={"firth": True})
    raw["groupings"] = {"marker": {"cuts": [1.0, 2.0]}}
    tables = _every_table(refit_frame, df, raw)
    for name in ("fits", "effects", "curves", "thresholds", "net_benefit"):
        assert set(tables[name]["status"]) == {"ok"}, (name, tables[name]["status"].unique())
    assert set(tables["confounding"]["status"]) == {"skipped"}


def test_the_report_line_names_the_cluster_and_the_design() -> None:
    from pathlib import Path

    from unbin.refit.sampling_design import design_notes
    from unbin.spec import parse_spec

    raw = _binary_raw(cluster="centre", design={"prevalence": 0.04, "firth": True})
    raw["variables"] = {"centre": {"label": "Treating centre"}}
    spec = parse_spec(raw, base=Path())
    assert design_notes(spec.analyses[0], spec.label) == [
        "cluster-robust variances by Treating centre",
        "case-control extract, risks recalibrated to a prevalence of 0.04",
        "Firth-penalised fits"]
    spec = parse_spec(_binary_raw(design={"matched_set": "centre"}), base=Path())
    assert design_notes(spec.analyses[0]) == [
        "matched sets centre (conditional logistic regression)"]
