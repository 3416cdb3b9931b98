"""Tests of residual confounding (unbin.questions.confounding): Cochran's (1968) removed shares for a
grouped normal confounder, the ranking of confounders, and the weighted refits behind the
bootstrap against reference libraries."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from lifelines import CoxPHFitter
from lifelines.datasets import load_rossi
from scipy import stats

from helpers import bare_refit as _refit
from unbin.models.base import Outcome
from unbin.models.cox import fit_cox
from unbin.models.weighted import resample_weights, weighted_cox, weighted_cox_designs, weighted_glm
from unbin.questions.confounding import confounding_table

# Cochran 1968 (Biometrics 24:295): % of the bias removed by adjusting for a normal confounder
# cut into c equal-frequency groups (his table, reproduced by cochran_formula below)
COCHRAN = {2: 63.66, 3: 79.32, 4: 86.06, 5: 89.70}


def _raw(outcome: dict[str, Any], groupings: dict[str, Any], adjust: list[str],
         **top: Any) -> dict[str, Any]:
    return {"study": "sim", "cohorts": [{"name": "c", "path": "unused.csv"}],
            "groupings": {"x": {"quantiles": 2}, **groupings},
            "analyses": [{"name": "a", "outcome": outcome, "exposure": "x", "adjust": adjust}],
            **top}


def cochran_formula(c: int) -> float:
    """Cochran's (1968) removed share of a grouped normal confounder, var(E[z | group]) / var(z)
    = sum_j [phi(a_{j-1}) - phi(a_j)]^2 / p_j, for c equal-frequency groups (p_j = 1/c)."""
    a = stats.norm.ppf(np.arange(c + 1) / c)
    phi = stats.norm.pdf(a)
    return float(np.sum((phi[:-1] - phi[1:]) ** 2 * c))


@pytest.mark.parametrize("c", [2, 3, 4, 5])
def test_cochran_removed_share_of_a_grouped_normal_confounder(c: int) -> None:
    """Normal confounder z, linear effects: y = 0.5 x + z + e, x = alpha z + u, z adjusted for in
    c equal-frequency groups; the removed share must be within 2 points of Cochran's value.

    Cochran's share is var(E[z | group]) / var(z). In the regression it is exact as alpha -> 0
    (the grouped model leaves gamma * alpha v_r / (alpha^2 v_r + 1) of gamma * alpha /
    (alpha^2 + 1)), and with alpha = 0.05 the difference is under 0.1 point. A small alpha makes
    the confounding small, so a random sample would need ~10^7 rows to pin the share down to
    0.5 point; instead (z, u) form a full grid of normal quantiles (300 x 300 = 90,000 rows):
    z is exactly normal in the sample and u exactly uncorrelated with every function of z, and
    the outcome noise e is random."""
    m = 300
    q = stats.norm.ppf((np.arange(m) + 0.5) / m)
    z, u = (g.ravel() for g in np.meshgrid(q, q, indexing="ij"))
    rng = np.random.default_rng(1968)
    x = 0.05 * z + u
    y = 0.5 * x + 1.0 * z + rng.normal(0, 0.5, m * m)
    df = pd.DataFrame({"x": x, "z": z, "y": y})
    raw = _raw({"type": "continuous", "value": "y"}, {"z": {"quantiles": c}}, ["z"],
               resampling={"bootstrap": 0})
    r, spec = _refit(df, raw)
    tab = confounding_table(r, spec)
    lin = tab[(tab["exposure_form"] == "linear") & (tab["scope"] == "all")]
    assert cochran_formula(c) * 100 == pytest.approx(COCHRAN[c], abs=0.01)  # Cochran's table
    # the mean difference is collapsible: the marginal (standardised) row and the conditional
    # row hold the same contrast, and the conditional change-in-estimate has no
    # non-collapsibility part
    for kind in ("marginal", "conditional"):
        row = lin[lin["scale_kind"] == kind].iloc[0]
        assert 100 * row["share_removed"] == pytest.approx(COCHRAN[c], abs=2.0)
        # the continuous adjustment removes all of it: b_continuous is the true 0.5 per unit
        # (the contrast is the 75th vs the 25th percentile of x)
        per_unit = row["estimate_continuous"] / (row["x_value"] - row["x_reference"])
        assert per_unit == pytest.approx(0.5, abs=0.01)
    row = lin[lin["scale_kind"] == "conditional"].iloc[0]
    assert row["change_noncollapsibility"] == pytest.approx(0.0, abs=1e-9)
    assert row["change_confounding"] == pytest.approx(row["confounding"], abs=1e-9)


def test_the_coarser_grouping_leaves_the_most() -> None:
    """Two equally strong normal confounders, one dichotomised and one in fifths: by Cochran the
    median split leaves 36% and fifths leave 10%, so the split is the one flagged ``largest``."""
    rng = np.random.default_rng(5)
    n = 20_000
    z1, z2 = rng.normal(size=(2, n))
    x = 0.3 * z1 + 0.3 * z2 + rng.normal(size=n)
    y = 0.5 * x + z1 + z2 + rng.normal(size=n)
    df = pd.DataFrame({"x": x, "z1": z1, "z2": z2, "y": y})
    raw = _raw({"type": "continuous", "value": "y"},
               {"z1": {"quantiles": 2}, "z2": {"quantiles": 5}}, ["z1", "z2"],
               resampling={"bootstrap": 40}, seed=3)
    r, spec = _refit(df, raw)
    tab = confounding_table(r, spec)
    lin = tab[(tab["exposure_form"] == "linear") & tab["primary"]].set_index("scope")
    assert bool(lin.loc["z1", "largest"]) and not bool(lin.loc["z2", "largest"])
    assert lin.loc["z1", "share_left"] > lin.loc["z2", "share_left"]
    for scope in ("all", "z1", "z2"):
        assert lin.loc[scope, "share_left_lower"] <= lin.loc[scope, "share_left"] \
            <= lin.loc[scope, "share_left_upper"]
        assert bool(lin.loc[scope, "confounding_clear"])
    # both grouped leave about the sum of what each leaves alone (each holds half the bias)
    assert lin.loc["all", "share_left"] == pytest.approx(
        lin.loc["z1", "share_left"] + lin.loc["z2", "share_left"], abs=0.05)
    # seeded: the same spec gives the same table
    pd.testing.assert_frame_equal(tab, confounding_table(r, spec))


def test_no_adjustment_variables_is_a_recorded_skip() -> None:
    rng = np.random.default_rng(1)
    df = pd.DataFrame({"x": rng.normal(size=100), "y": rng.normal(size=100)})
    r, spec = _refit(df, _raw({"type": "continuous", "value": "y"}, {}, []))
    tab = confounding_table(r, spec)
    assert tab["status"].tolist() == ["skipped"]
    assert "no adjustment" in tab["message"].iloc[0]


# --------------------------------------------------------------------------- weighted refits


def test_weighted_glm_matches_statsmodels_frequency_weights() -> None:
    """Vectorised Newton on frequency weights vs statsmodels GLM(freq_weights) / WLS."""
    rng = np.random.default_rng(12)
    n = 600
    X = np.column_stack([rng.normal(size=n), rng.integers(0, 3, n) == 1, rng.uniform(size=n)])
    X = X.astype(float)
    W = resample_weights(np.random.default_rng(0), n, 3)
    assert np.all(W.sum(axis=1) == n)
    eta = 0.4 * X[:, 0] - 0.5 * X[:, 1] + 0.3 * X[:, 2]
    t = rng.uniform(0.5, 2, n)
    cases = {
        "binary": (Outcome("binary", (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(float)),
                   lambda y, w: sm.GLM(y, sm.add_constant(X), family=sm.families.Binomial(),
                                       freq_weights=w).fit(tol=1e-12)),
        "count": (Outcome("count", rng.poisson(t * np.exp(eta)).astype(float), offset=np.log(t)),
                  lambda y, w: sm.GLM(y, sm.add_constant(X), family=sm.families.Poisson(),
                                      offset=np.log(t), freq_weights=w).fit(tol=1e-12)),
        "continuous": (Outcome("continuous", eta + rng.normal(size=n)),
                       lambda y, w: sm.WLS(y, sm.add_constant(X), weights=w).fit()),
    }
    for family, (outcome, ref) in cases.items():
        coef = weighted_glm(family, X, outcome, W)
        for b in range(len(W)):
            expected = np.asarray(ref(outcome.y, W[b]).params)
            np.testing.assert_allclose(coef[b], expected, rtol=1e-7, atol=1e-9,
                                       err_msg=family)


def test_weighted_glm_marks_a_replicate_without_a_group_as_failed() -> None:
    rng = np.random.default_rng(2)
    n = 200
    g = np.zeros(n)
    g[:3] = 1.0  # a rare group
    X = np.column_stack([rng.normal(size=n), g])
    y = rng.normal(size=n)
    W = np.ones((2, n))
    W[1, :3] = 0.0  # the second replicate drew none of the rare rows
    coef = weighted_glm("continuous", X, Outcome("continuous", y), W)
    assert np.all(np.isfinite(coef[0])) and np.all(np.isnan(coef[1]))


def test_weighted_cox_matches_lifelines_on_repeated_rows() -> None:
    """Rossi data (shipped with lifelines): Cox fit with frequency weights equals lifelines'
    CoxPHFitter (Efron ties) on the data with rows repeated."""
    ro = load_rossi()
    X = ro[["fin", "age", "prio"]].to_numpy(float)
    W = resample_weights(np.random.default_rng(4), len(ro), 2)
    outcome = Outcome("survival", ro["arrest"].to_numpy(float), time=ro["week"].to_numpy(float))
    coef = weighted_cox(X, outcome, W)
    for b in range(2):
        rep = ro.loc[np.repeat(np.arange(len(ro)), W[b].astype(int)),
                     ["week", "arrest", "fin", "age", "prio"]].reset_index(drop=True)
        ref = CoxPHFitter().fit(rep, "week", "arrest").params_.to_numpy()
        np.testing.assert_allclose(coef[b], ref, rtol=1e-5, atol=1e-7)


def test_designs_sharing_a_replicate_layout_fit_as_one_at_a_time() -> None:
    """Several designs on one replicate's rows and Cox layout give the fits of ``fit_cox`` on
    the repeated rows, design by design (strata and delayed entry): bit for bit without a
    start (``fit_cox`` itself), and within the convergence tolerance with one (chord steps
    from the start, ``refit_near``; checked against a fit iterated to 1e-13); and the fuller
    design matches lifelines' CoxPHFitter on those rows."""
    rng = np.random.default_rng(12)
    n = 600
    x = rng.normal(size=(n, 3))
    time = np.ceil(rng.exponential(1 / np.exp(x @ [0.4, -0.3, 0.2])) * 6)
    entry = np.where(rng.uniform(size=n) < 0.3, np.floor(time * rng.uniform(size=n)), 0.0)
    event = rng.binomial(1, 0.7, n).astype(float)
    strata = rng.integers(0, 3, n)
    outcome = Outcome("survival", event, time=time, entry=entry, strata=strata)
    W = resample_weights(np.random.default_rng(5), n, 3)
    designs = [(x[:, :1], None), (x, np.array([0.4, -0.3, 0.2]))]
    coefs = weighted_cox_designs(designs, outcome, W)
    for (X, start), coef in zip(designs, coefs, strict=True):
        np.testing.assert_array_equal(coef, weighted_cox(X, outcome, W, start))
        for b in range(len(W)):
            m = np.repeat(np.arange(n), W[b].astype(int))
            ref = fit_cox(X[m], time[m], event[m], entry=entry[m], strata=strata[m], init=start,
                          tol=1e-13 if start is not None else 1e-9)
            assert ref.converged
            if start is None:
                np.testing.assert_array_equal(coef[b], ref.coef)
            else:
                np.testing.assert_allclose(coef[b], ref.coef, rtol=1e-8, atol=1e-10)
    m = np.repeat(np.arange(n), W[0].astype(int))
    rep = pd.DataFrame(x[m], columns=["a", "b", "c"]).assign(
        T=time[m], E=event[m], en=entry[m], S=strata[m])
    cph = CoxPHFitter().fit(rep, "T", "E", entry_col="en", strata=["S"])
    np.testing.assert_allclose(coefs[1][0], cph.params_.to_numpy(), rtol=1e-5, atol=1e-7)


def test_bootstrap_spread_matches_the_sandwich_standard_error() -> None:
    """The case-resampling bootstrap SD of an OLS slope estimates the heteroscedasticity-robust
    (HC0) standard error (statsmodels). 400 replicates: Monte Carlo error of an SD ~3.5%;
    tolerance 15% (common practice)."""
    rng = np.random.default_rng(21)
    n = 2000
    x = rng.normal(size=n)
    y = 1.0 + 0.5 * x + rng.normal(size=n) * (0.5 + np.abs(x))  # heteroscedastic
    W = resample_weights(np.random.default_rng(8), n, 400)
    coef = weighted_glm("continuous", x[:, None], Outcome("continuous", y), W)
    hc0 = sm.OLS(y, sm.add_constant(x)).fit(cov_type="HC0").bse[1]
    naive = sm.OLS(y, sm.add_constant(x)).fit().bse[1]
    assert np.std(coef[:, 1], ddof=1) == pytest.approx(hc0, rel=0.15)
    assert abs(hc0 / naive - 1) > 0.3  # the check can tell the two apart


# --------------------------------------------------------------------------- collapsible scale


def _logistic_sim(seed: int, rho: float, n: int = 500, boot: int = 100,
                  coef: tuple[float, float, float] = (-0.5, 0.5, 1.5)) -> pd.DataFrame:
    """Confounder z ~ N(0, 1), exposure x = rho z + sqrt(1 - rho^2) u, and
    logit P(y) = a + b x + c z; z adjusted for in thirds (legacy) or as a spline."""
    rng = np.random.default_rng(seed)
    z = rng.normal(size=n)
    x = rho * z + np.sqrt(1 - rho ** 2) * rng.normal(size=n)
    a, b, c = coef
    y = (rng.random(n) < 1 / (1 + np.exp(-(a + b * x + c * z)))).astype(float)
    raw = _raw({"type": "binary", "event": "y"}, {"z": {"quantiles": 3}}, ["z"],
               resampling={"bootstrap": boot}, seed=seed)
    r, spec = _refit(pd.DataFrame({"x": x, "z": z, "y": y}), raw)
    return confounding_table(r, spec)


def _pick(tab: pd.DataFrame, scale: str, form: str = "linear", kind: str = "") -> pd.Series:
    """The scope-"all" row of one scale; odds and hazard ratios are conditional only, the other
    scales marginal unless ``kind`` says otherwise."""
    kind = kind or ("conditional" if scale in ("odds ratio", "hazard ratio") else "marginal")
    sel = tab[(tab["exposure_form"] == form) & (tab["scope"] == "all") & (tab["scale"] == scale)
              & (tab["scale_kind"] == kind)]
    assert len(sel) == 1
    return sel.iloc[0]


def _covers(r: pd.Series, value: float, lo: str, hi: str) -> bool:
    return bool(r[lo] <= value <= r[hi])


def _null_confounding_runs(sims: int, seed0: int, boot: int = 100) -> dict[str, np.ndarray]:
    out: dict[str, list[float]] = {k: [] for k in (
        "rr", "rr_cover", "rr_halfwidth", "rd_cover", "cond_cover", "change_cover", "noncoll",
        "share_clear")}
    for s in range(sims):
        tab = _logistic_sim(seed0 + s, rho=0.0, boot=boot)
        rr, rd, cond = _pick(tab, "risk ratio"), _pick(tab, "risk difference"), \
            _pick(tab, "odds ratio")
        assert bool(rr["primary"]) and rr["scale_kind"] == "marginal"
        out["rr"].append(rr["confounding"])
        out["rr_cover"].append(_covers(rr, 0.0, "confounding_lower", "confounding_upper"))
        out["rr_halfwidth"].append((rr["confounding_upper"] - rr["confounding_lower"]) / 2)
        out["rd_cover"].append(_covers(rd, 0.0, "confounding_lower", "confounding_upper"))
        out["cond_cover"].append(_covers(cond, 0.0, "confounding_lower", "confounding_upper"))
        out["change_cover"].append(_covers(cond, 0.0, "change_confounding_lower",
                                           "change_confounding_upper"))
        out["noncoll"].append(cond["change_noncollapsibility"])
        out["share_clear"].append(bool(rr["confounding_clear"]))
    return {k: np.asarray(v, dtype=float) for k, v in out.items()}


def _check_null(res: dict[str, np.ndarray], lo: float, hi: float) -> None:
    sims = len(res["rr"])
    mc_sd = float(np.std(res["rr"], ddof=1))
    # the point estimate of the marginal confounding is 0 up to Monte-Carlo error (3 MC SE)
    assert abs(float(np.mean(res["rr"]))) < 3 * mc_sd / np.sqrt(sims)
    for key in ("rr_cover", "rd_cover", "change_cover"):
        assert lo <= float(np.mean(res[key])) <= hi, key
    # not too wide either: the mean half-width is 1.96 times the estimate's Monte-Carlo SD
    # (the SD from `sims` replicates has relative error ~1/sqrt(2 sims); band +-35%)
    assert 0.65 <= float(np.mean(res["rr_halfwidth"])) / (1.96 * mc_sd) <= 1.35
    # the conditional (odds ratio) change-in-estimate is mostly non-collapsibility: adjusting
    # for a strong outcome predictor moves the odds ratio away from 1 (Greenland, Robins &
    # Pearl 1999), so the conditional "confounding" interval misses 0 far more often than 5%
    nc = res["noncoll"]
    assert float(np.mean(nc)) + 3 * float(np.std(nc, ddof=1)) / np.sqrt(sims) < 0
    assert float(np.mean(res["cond_cover"])) < 0.8


def test_independent_confounder_leaves_no_marginal_confounding() -> None:
    """Confounder independent of the exposure with a strong outcome effect (logistic): the
    standardised (marginal) confounding is 0 and its percentile interval covers 0 at about the
    nominal 95%. 40 seeded simulations of n = 500 with 100 bootstrap replicates: binomial MC SD
    of a 95% coverage is 3.4 points, band 0.85..1.0 (with the width check below, too wide
    fails too)."""
    _check_null(_null_confounding_runs(40, 7_000), 0.85, 1.0)


@pytest.mark.slow
def test_independent_confounder_marginal_coverage_200_simulations() -> None:
    """As above with 200 simulations and 200 replicates each: coverage of 0 in 93..99% (MC SD
    1.5 points)."""
    _check_null(_null_confounding_runs(200, 9_000, boot=200), 0.93, 0.99)


def _designs_by_hand(df: pd.DataFrame, r: Any, spec: Any, form: str) -> dict[str, np.ndarray]:
    """Exposure column first, then adjustment: crude, the legacy groups of z (cuts -0.5, 0.5,
    closed left, built here) and z as unbin's restricted cubic spline (the basis is tested with
    the terms; what is checked here is the standardisation)."""
    from unbin.refit.analysis import adjustment_terms, design

    x, z = df["x"].to_numpy(float), df["z"].to_numpy(float)
    e = x[:, None] if form == "linear" else (x >= 0).astype(float)[:, None]
    zg = np.column_stack([(z >= -0.5) & (z < 0.5), z >= 0.5]).astype(float)
    cont = adjustment_terms(r.sample.frame, r.analysis, spec, "continuous")
    zs, _ = design(r.sample.frame, x, (), cont)
    return {"crude": e, "grouped": np.column_stack([e, zg]),
            "continuous": np.column_stack([e, zs])}


def _set_values(df: pd.DataFrame, form: str) -> tuple[float, float]:
    x = df["x"].to_numpy(float)
    if form == "linear":
        return float(np.percentile(x, 75)), float(np.percentile(x, 25))
    return 1.0, 0.0  # the indicator of x >= 0 (comparison) vs x < 0 (the reference group)


def _confounded_frame(n: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    z = rng.normal(size=n)
    x = 0.5 * z + rng.normal(size=n)
    t = rng.uniform(0.5, 3.0, n)
    eta = -1.0 + 0.4 * x + 0.8 * z
    return pd.DataFrame({"x": x, "z": z, "t": t,
                         "y": (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(float),
                         "k": rng.poisson(t * np.exp(eta)).astype(float)})


@pytest.mark.parametrize("family", ["binary", "count"])
def test_standardised_contrasts_match_statsmodels(family: str) -> None:
    """g-computation by hand with statsmodels: GLM fitted on the same design, predictions
    (``GLMResults.predict``) with the exposure set to the two contrast values, averaged over
    the sample (binary: risks; count: expected events with each row's person-time, divided by
    the total person-time) -> risk ratio and difference / rate ratio, for the crude, the grouped
    and the continuous adjustment, both exposure forms. Tolerance 1e-6 (both solvers converge
    to 1e-10 or better). Also the conditional row's decomposition: the non-collapsibility part
    is the log odds ratio of the standardised risks minus the conditional log odds ratio."""
    df = _confounded_frame(3000, 31)
    outcome = ({"type": "binary", "event": "y"} if family == "binary"
               else {"type": "count", "count": "k", "persontime": "t"})
    raw = _raw(outcome, {"x": {"cuts": [0.0]}, "z": {"cuts": [-0.5, 0.5]}}, ["z"],
               resampling={"bootstrap": 0})
    r, spec = _refit(df, raw)
    tab = confounding_table(r, spec)
    y = df["y" if family == "binary" else "k"].to_numpy(float)
    t = df["t"].to_numpy(float)
    fam = sm.families.Binomial() if family == "binary" else sm.families.Poisson()
    off = None if family == "binary" else np.log(t)
    for form in ("linear", "legacy"):
        v1, v0 = _set_values(df, form)
        marg: dict[str, tuple[float, float]] = {}
        cond: dict[str, float] = {}
        for what, D in _designs_by_hand(df, r, spec, form).items():
            res = sm.GLM(y, sm.add_constant(D), family=fam, offset=off).fit(tol=1e-12)
            means = []
            for v in (v1, v0):
                Dv = sm.add_constant(D)
                Dv[:, 1] = v
                mu = res.predict(Dv, offset=off)
                means.append(mu.mean() if family == "binary" else mu.sum() / t.sum())
            marg[what] = (means[0], means[1])
            cond[what] = float(res.params[1] * (v1 - v0))
        for scale in ("risk ratio", "risk difference") if family == "binary" else ("rate ratio",):
            row = _pick(tab, scale, form)
            for what, (m1, m0) in marg.items():
                ref = m1 - m0 if scale == "risk difference" else np.log(m1 / m0)
                assert row[f"estimate_{what}"] == pytest.approx(ref, rel=1e-6, abs=1e-9), \
                    (form, scale, what)
        row = _pick(tab, "odds ratio" if family == "binary" else "rate ratio", form,
                    "conditional")
        for what in cond:
            assert row[f"estimate_{what}"] == pytest.approx(cond[what], rel=1e-6)
        m1, m0 = marg["continuous"]
        link = (lambda p: np.log(p / (1 - p))) if family == "binary" else np.log
        noncoll = float(link(m1) - link(m0)) - cond["continuous"]
        assert row["change_noncollapsibility"] == pytest.approx(noncoll, rel=1e-5, abs=1e-9)
        assert row["change_confounding"] + row["change_noncollapsibility"] == \
            pytest.approx(row["confounding"], abs=1e-12)
        if family == "count":  # log link: collapsible, nothing is non-collapsibility
            assert abs(row["change_noncollapsibility"]) < 1e-9


def test_standardised_survival_matches_lifelines() -> None:
    """Cox: lifelines' CoxPHFitter (Efron ties, stratified) on the same design, standardised
    survival at the horizon by ``predict_survival_function`` with the exposure set, averaged
    over the sample; risk ratio and difference of 1 - S against the table's marginal rows.
    The horizon is an event time, where lifelines' interpolation of the baseline equals the
    step function. Tolerance: 1e-5 absolute on the risk difference, 1e-4 on the log risk
    ratio (both fitters converge to ~1e-8 in the coefficients)."""
    rng = np.random.default_rng(17)
    n = 1500
    z = rng.normal(size=n)
    x = 0.5 * z + rng.normal(size=n)
    s = rng.integers(0, 2, n)
    time = np.ceil(rng.exponential(1 / (0.1 * np.exp(0.4 * x + 0.7 * z + 0.5 * s))) * 4) / 4
    event = (rng.random(n) < 0.8).astype(float)
    time = np.minimum(time, 8.0)
    df = pd.DataFrame({"x": x, "z": z, "s": s, "T": time, "E": event})
    times = np.unique(time[event == 1])
    horizon = float(times[len(times) // 2])  # an event time
    raw = _raw({"type": "survival", "time": "T", "event": "E", "horizon": horizon},
               {"x": {"cuts": [0.0]}, "z": {"cuts": [-0.5, 0.5]}}, ["z"],
               resampling={"bootstrap": 0})
    raw["analyses"][0]["strata"] = ["s"]
    r, spec = _refit(df, raw)
    tab = confounding_table(r, spec)
    for form in ("linear", "legacy"):
        v1, v0 = _set_values(df, form)
        for what, D in _designs_by_hand(df, r, spec, form).items():
            cols = [f"d{j}" for j in range(D.shape[1])]
            data = pd.DataFrame(D, columns=cols).assign(T=time, E=event, s=s)
            cph = CoxPHFitter().fit(data, "T", "E", strata=["s"])
            risk = []
            for v in (v1, v0):
                dv = data.assign(d0=v)
                risk.append(1 - float(cph.predict_survival_function(dv, times=[horizon])
                                      .to_numpy().mean()))
            rd, rr = _pick(tab, "risk difference", form), _pick(tab, "risk ratio", form)
            assert rd["horizon"] == horizon
            assert rd[f"estimate_{what}"] == pytest.approx(risk[0] - risk[1], abs=1e-5)
            assert rr[f"estimate_{what}"] == pytest.approx(np.log(risk[0] / risk[1]), abs=1e-4)


def _true_risk(v: float, coef: tuple[float, float, float]) -> float:
    """E_z[expit(a + b v + c z)] for z ~ N(0, 1), by 80-point Gauss-Hermite quadrature (numpy):
    the population's standardised risk at exposure v."""
    nodes, w = np.polynomial.hermite_e.hermegauss(80)
    a, b, c = coef
    return float(np.sum(w / (1 + np.exp(-(a + b * v + c * nodes)))) / np.sqrt(2 * np.pi))


def _coverage_runs(sims: int, seed0: int, n: int = 500, boot: int = 100
                   ) -> dict[str, np.ndarray]:
    coef = (-0.5, 0.5, 1.0)
    out: dict[str, list[float]] = {"rd_err": [], "rd_cover": [], "rd_half": [], "rr_cover": []}
    for s in range(sims):
        tab = _logistic_sim(seed0 + s, rho=0.5, n=n, boot=boot, coef=coef)
        rd, rr = _pick(tab, "risk difference"), _pick(tab, "risk ratio")
        r1, r0 = _true_risk(rd["x_value"], coef), _true_risk(rd["x_reference"], coef)
        out["rd_err"].append(rd["estimate_continuous"] - (r1 - r0))
        out["rd_cover"].append(_covers(rd, r1 - r0, "lower_continuous", "upper_continuous"))
        out["rd_half"].append((rd["upper_continuous"] - rd["lower_continuous"]) / 2)
        out["rr_cover"].append(_covers(rr, np.log(r1 / r0), "lower_continuous",
                                       "upper_continuous"))
    return {k: np.asarray(v, dtype=float) for k, v in out.items()}


def _check_coverage(res: dict[str, np.ndarray], lo: float, hi: float) -> None:
    sims = len(res["rd_err"])
    sd = float(np.std(res["rd_err"], ddof=1))
    assert abs(float(np.mean(res["rd_err"]))) < 3 * sd / np.sqrt(sims)  # unbiased (3 MC SE)
    for key in ("rd_cover", "rr_cover"):
        assert lo <= float(np.mean(res[key])) <= hi, key
    assert 0.65 <= float(np.mean(res["rd_half"])) / (1.96 * sd) <= 1.35  # not too wide


def test_marginal_interval_covers_the_true_standardised_contrast() -> None:
    """Confounded logistic scenario (x correlated 0.5 with z, z in the outcome model): the
    continuously adjusted standardised risk difference and ratio (75th vs 25th percentile of
    x) against their true values E_z[expit(a + b v + c z)] (Gauss-Hermite). 40 seeded
    simulations, n = 500, 100 replicates: coverage band 0.85..1.0 (binomial MC SD 3.4 points)
    and half-width / (1.96 x MC SD of the error) within 0.65..1.35."""
    _check_coverage(_coverage_runs(40, 11_000), 0.85, 1.0)


@pytest.mark.slow
def test_marginal_interval_coverage_200_simulations() -> None:
    """As above with 200 simulations of n = 1000 with 200 replicates each: coverage 0.92..0.98
    (MC SD 1.5 points)."""
    _check_coverage(_coverage_runs(200, 13_000, n=1000, boot=200), 0.92, 0.98)


def test_contrast_runs_from_the_comparison_group_to_the_legacy_reference() -> None:
    """Legacy reference = the top third: the comparison is the group farthest from it (Q1) and
    the linear contrast runs the same way (25th vs 75th percentile). Linear outcome, crude
    estimates against brute force: the difference of group means and the least-squares slope
    (numpy) times p25 - p75."""
    rng = np.random.default_rng(40)
    n = 3000
    z = rng.normal(size=n)
    x = 0.4 * z + rng.normal(size=n)
    y = 0.7 * x + z + rng.normal(size=n)
    df = pd.DataFrame({"x": x, "z": z, "y": y})
    raw = _raw({"type": "continuous", "value": "y"}, {"z": {"quantiles": 3}}, ["z"],
               resampling={"bootstrap": 0})
    raw["groupings"]["x"] = {"quantiles": 3, "reference": "Q3"}
    r, spec = _refit(df, raw)
    tab = confounding_table(r, spec)
    p25, p75 = np.percentile(x, [25, 75])
    lin = _pick(tab, "mean difference")
    assert (lin["x_value"], lin["x_reference"]) == (pytest.approx(p25), pytest.approx(p75))
    assert lin["comparison"].startswith("25th") and lin["reference"].startswith("75th")
    assert lin["estimate_crude"] == pytest.approx(np.polyfit(x, y, 1)[0] * (p25 - p75), rel=1e-8)
    leg = _pick(tab, "mean difference", "legacy")
    assert (leg["comparison"], leg["reference"], leg["contrast"]) == ("Q1", "Q3", "Q1 vs Q3")
    q1, q2 = np.quantile(x, [1 / 3, 2 / 3])
    assert leg["estimate_crude"] == pytest.approx(y[x <= q1].mean() - y[x > q2].mean(),
                                                  rel=1e-8)
    assert leg["x_value"] < leg["x_reference"] and leg["estimate_continuous"] < 0


def test_failed_replicates_are_counted_in_every_row() -> None:
    """A confounder level held by 3 of 200 rows: a replicate that draws none of them cannot
    estimate it and fails. The failures counted in each row equal the replicates without a
    rare row, counted by brute force from the same seeded resampling weights."""
    rng = np.random.default_rng(3)
    n = 200
    w = np.where(np.arange(n) < 3, "rare", np.where(rng.random(n) < 0.5, "a", "b"))
    z = rng.normal(size=n)
    x = 0.3 * z + rng.normal(size=n)
    df = pd.DataFrame({"x": x, "z": z, "w": w, "y": x + z + rng.normal(size=n)})
    raw = _raw({"type": "continuous", "value": "y"}, {"z": {"quantiles": 3}}, ["z", "w"],
               resampling={"bootstrap": 120}, seed=5)
    r, spec = _refit(df, raw)
    tab = confounding_table(r, spec)
    W = resample_weights(spec.rng("a", "confounding-bootstrap"), n, 120)
    expected = int((W[:, :3].sum(axis=1) == 0).sum())
    assert expected > 0
    assert (tab["bootstrap_failed"] == expected).all()
    assert (tab["bootstrap_ok"] + tab["bootstrap_failed"] == 120).all()


def test_survival_without_horizon_skips_only_the_marginal_rows() -> None:
    rng = np.random.default_rng(8)
    n = 400
    z = rng.normal(size=n)
    x = 0.3 * z + rng.normal(size=n)
    df = pd.DataFrame({"x": x, "z": z, "T": rng.exponential(np.exp(-0.5 * x - z)),
                       "E": np.ones(n)})
    raw = _raw({"type": "survival", "time": "T", "event": "E"}, {"z": {"quantiles": 3}}, ["z"],
               resampling={"bootstrap": 10})
    r, spec = _refit(df, raw)
    tab = confounding_table(r, spec)
    marg = tab[tab["scale_kind"] == "marginal"]
    assert len(marg) and (marg["status"] == "skipped").all()
    assert marg["message"].str.contains("horizon").all()
    assert (tab.loc[tab["scale_kind"] == "conditional", "status"] == "ok").all()


def _competing_frame(n: int, seed: int, delayed: bool) -> pd.DataFrame:
    """Cause-specific hazards 0.3 exp(0.4 x + 0.6 z) (cause 1) and 0.2 exp(-0.3 x + 0.5 z)
    (cause 2), x confounded by z, censoring uniform on (0.5, 5); with delayed entry a third of
    the rows enter uniformly on (0, 0.5) (those still event-free then). Continuous times: no
    ties, so every ties rule gives the same fits."""
    rng = np.random.default_rng(seed)
    z = rng.normal(size=2 * n)
    x = 0.5 * z + rng.normal(size=2 * n)
    h1, h2 = 0.3 * np.exp(0.4 * x + 0.6 * z), 0.2 * np.exp(-0.3 * x + 0.5 * z)
    t = rng.exponential(1 / (h1 + h2))
    cause = np.where(rng.random(2 * n) < h1 / (h1 + h2), 1, 2)
    c = rng.uniform(0.5, 5.0, 2 * n)
    entry = (np.where(rng.random(2 * n) < 1 / 3, rng.uniform(0.0, 0.5, 2 * n), 0.0)
             if delayed else np.zeros(2 * n))
    T = np.minimum(t, c)
    seen = T > entry
    df = pd.DataFrame({"x": x, "z": z, "T": T, "E": np.where(t <= c, cause, 0), "L": entry})
    return df[seen].iloc[:n].reset_index(drop=True)


def _incidence_by_hand(D: np.ndarray, df: pd.DataFrame, v: float, horizon: float,
                       delayed: bool) -> float:
    """The g-formula written out: lifelines' CoxPHFitter per cause on design D (cause-specific:
    the other cause censored; its coefficients), Breslow's baseline increments by a loop over
    the cause's event times (risk set: entry < t <= T; lifelines' own baseline_hazard_ leaves
    delayed entry out of its risk sets), each row's hazard increments with its exposure column
    set to v, the all-cause survival just before each event time as a product over earlier
    times, the row's cumulative incidence of cause 1 by the horizon, averaged over rows."""
    cols = [f"d{j}" for j in range(D.shape[1])]
    T, L = df["T"].to_numpy(float), df["L"].to_numpy(float)
    data = pd.DataFrame(D, columns=cols).assign(T=T)
    if delayed:
        data["L"] = L
    Dv = D.copy()
    Dv[:, 0] = v
    inc, risk = [], []
    for c in (1, 2):
        event = (df["E"] == c).to_numpy()
        fit = CoxPHFitter().fit(data.assign(E=event.astype(float)), "T", "E",
                                entry_col="L" if delayed else None)
        b = fit.params_[cols].to_numpy(float)
        r = np.exp(D @ b)
        times = np.sort(T[event & (T <= horizon)])
        inc.append(pd.Series([1.0 / r[(L < t) & (T >= t)].sum() for t in times], index=times))
        risk.append(np.exp(Dv @ b))
    surv = np.ones(len(df))
    cif = np.zeros(len(df))
    for t in np.union1d(inc[0].index.to_numpy(float), inc[1].index.to_numpy(float)):
        d1 = float(inc[0].get(t, 0.0)) * risk[0]
        d2 = float(inc[1].get(t, 0.0)) * risk[1]
        cif += surv * d1
        surv = surv * np.clip(1.0 - d1 - d2, 0.0, None)
    return float(cif.mean())


@pytest.mark.parametrize("delayed", [False, True])
def test_standardised_incidence_matches_a_cause_specific_g_formula(delayed: bool) -> None:
    """With competing events the marginal rows standardise the cumulative incidence of the
    event of interest: against the g-formula written out in this test from lifelines'
    CoxPHFitter fitted per cause (``_incidence_by_hand``), for the crude, the grouped and
    the continuous adjustment and both exposure forms, with and without delayed entry.
    Tolerance 1e-5 absolute on the risk difference, 1e-4 on the log risk ratio (both fitters
    converge to ~1e-8). The conditional row keeps the cause-specific scale (its split uses one
    minus the cause-specific survival) and the rows say which risk they hold."""
    df = _competing_frame(600, 23, delayed)
    horizon = 2.0
    outcome: dict[str, Any] = {"type": "survival", "time": "T", "event": "E", "horizon": horizon,
                               "event_of_interest": 1, "competing": [2]}
    if delayed:
        outcome["entry"] = "L"
    raw = _raw(outcome, {"x": {"cuts": [0.0]}, "z": {"cuts": [-0.5, 0.5]}}, ["z"],
               resampling={"bootstrap": 0})
    r, spec = _refit(df, raw)
    tab = confounding_table(r, spec)
    assert (tab["status"] == "ok").all(), tab["message"].tolist()
    marginal = tab[tab["scale_kind"] == "marginal"]
    assert (marginal["risk_kind"] == "cumulative incidence (cause-specific Cox models of every "
                                     "cause)").all()
    assert (tab.loc[tab["scale_kind"] == "conditional", "risk_kind"]
            == "1 - cause-specific survival (competing events censored)").all()
    for form in ("linear", "legacy"):
        v1, v0 = _set_values(df, form)
        for what, D in _designs_by_hand(df, r, spec, form).items():
            risk = [_incidence_by_hand(D, df, v, horizon, delayed) for v in (v1, v0)]
            rd, rr = _pick(tab, "risk difference", form), _pick(tab, "risk ratio", form)
            assert rd[f"estimate_{what}"] == pytest.approx(risk[0] - risk[1], abs=1e-5), \
                (form, what)
            assert rr[f"estimate_{what}"] == pytest.approx(np.log(risk[0] / risk[1]),
                                                           abs=1e-4), (form, what)


@pytest.mark.parametrize("strata", [False, True])
def test_incidence_without_covariates_is_aalen_johansen(strata: bool) -> None:
    """No covariates: the standardised cumulative incidence is lifelines'
    AalenJohansenFitter's estimate at the horizon (delayed entry), and with strata the
    stratum estimates averaged with the strata's shares of the rows (standardisation over
    the strata). Tolerance 1e-12."""
    from lifelines import AalenJohansenFitter

    from unbin.refit.standardise import cif_risks

    rng = np.random.default_rng(5)
    n = 500
    t = rng.exponential(1.0, n) + 0.2
    c = rng.choice([0, 1, 2, 3], n, p=[0.25, 0.35, 0.25, 0.15])
    e = rng.uniform(0.0, 0.2, n)
    s = rng.integers(0, 2, n) if strata else np.zeros(n, dtype=int)
    got, _ = cif_risks(np.zeros((n, 0)), 0, [np.zeros(0)] * 3, [np.zeros(0)], t, c, [1, 2, 3],
                       1.0, entry=e, strata=s if strata else None)
    ref = 0.0
    for lab in np.unique(s):
        m = s == lab
        aj = AalenJohansenFitter(calculate_variance=False).fit(t[m], c[m], event_of_interest=1,
                                                               entry=e[m])
        ref += m.mean() * float(aj.cumulative_density_.loc[:1.0].iloc[-1, 0])
    assert got[0] == pytest.approx(ref, abs=1e-12)


def test_incidence_bootstrap_intervals_under_competing_events() -> None:
    """The bootstrap refits every cause's model: intervals exist and hold the estimates, and
    the cumulative incidence of the crude linear contrast lies below one minus the
    cause-specific survival (competing events remove people from the risk of the event)."""
    df = _competing_frame(300, 29, True)
    outcome = {"type": "survival", "time": "T", "event": "E", "horizon": 2.0, "entry": "L",
               "event_of_interest": 1, "competing": [2]}
    raw = _raw(outcome, {"x": {"cuts": [0.0]}, "z": {"cuts": [-0.5, 0.5]}}, ["z"],
               resampling={"bootstrap": 30})
    r, spec = _refit(df, raw)
    tab = confounding_table(r, spec)
    rd = _pick(tab, "risk difference", "linear")
    assert rd["bootstrap_ok"] >= 25
    for what in ("crude", "grouped", "continuous"):
        assert rd[f"lower_{what}"] < rd[f"estimate_{what}"] < rd[f"upper_{what}"]
    from unbin.questions.confounding import _Designs
    from unbin.terms import LinearTerm

    designs = _Designs(r, 2.0)
    q25, q75 = np.percentile(df["x"], [25, 75])
    key = designs.add((LinearTerm("x"),), (), (np.array([q75]), np.array([q25])))
    cif, cs = designs.means(key), designs.cs_means(key)
    assert np.all((cif > 0) & (cif < cs))
    # the table's crude contrast is the cumulative incidence one
    assert rd["estimate_crude"] == pytest.approx(cif[0] - cif[1], abs=1e-12)


def test_incidence_on_repeated_rows_matches_a_row_by_row_g_formula() -> None:
    """A bootstrap replicate's rows (drawn with repeats; strata, delayed entry, tied times,
    three causes), at given coefficients: ``cif_risks``, which computes each distinct row once
    and counts it as often as it was drawn, equals the g-formula written out row by row —
    Breslow's increments by a loop over each stratum's event times (risk set: entry < t <= T,
    at the centred linear predictor as in ``cif_risks``), every row's all-cause survival
    before t as a product over earlier times. With the causes' layouts passed in, the same
    numbers. Brute force; tolerance 1e-12."""
    from unbin.models.cox import prepare_layout
    from unbin.refit.standardise import cif_risks

    rng = np.random.default_rng(11)
    n0 = 120
    X0 = np.column_stack([rng.normal(size=n0), rng.integers(0, 3, n0), rng.normal(size=n0)])
    t0 = np.round(rng.exponential(1.0, n0) + 0.05, 1)  # ties
    c0 = rng.choice([0, 1, 2, 3], n0, p=[0.3, 0.35, 0.2, 0.15])
    e0 = np.where(rng.random(n0) < 0.3, rng.uniform(0.0, 0.04, n0), 0.0)
    s0 = rng.integers(0, 2, n0)
    m = rng.integers(0, n0, n0)  # the replicate's rows
    X, t, c, e, s = X0[m], t0[m], c0[m], e0[m], s0[m]
    coefs = [np.array([0.5, -0.2, 0.3]), np.array([-0.4, 0.1, 0.2]), np.array([0.2, 0.3, -0.1])]
    at = [np.array([1.0]), np.array([-0.5])]
    horizon, k = 1.0, 1
    got, _ = cif_risks(X, k, coefs, at, t, c, [1, 2, 3], horizon, entry=e, strata=s)
    lays = [prepare_layout(t, (c == cc).astype(float), entry=e, strata=s) for cc in (2, 3)]
    again, _ = cif_risks(X, k, coefs, at, t, c, [1, 2, 3], horizon, entry=e, strata=s,
                         layout=prepare_layout(t, (c == 1).astype(float), entry=e, strata=s),
                         other_layouts=lays)
    np.testing.assert_array_equal(got, again)
    for a_i, a in enumerate(at):
        Xa = X.copy()
        Xa[:, 0] = a[0]
        total = 0.0
        for lab in (0, 1):
            rows = np.flatnonzero(s == lab)
            times = np.unique(t[rows][(c[rows] > 0) & (t[rows] <= horizon)])
            incs = []
            for cc, b in zip((1, 2, 3), coefs, strict=True):
                eta = X @ b - np.mean(X @ b)
                d = []
                for u in times:
                    at_risk = rows[(e[rows] < u) & (t[rows] >= u)]
                    events = np.sum((t[rows] == u) & (c[rows] == cc))
                    d.append(events / np.exp(eta[at_risk]).sum())
                incs.append((np.array(d), np.exp(eta - X[:, 0] * b[0] + Xa[:, 0] * b[0])))
            for i in rows:
                surv, cif = 1.0, 0.0
                for j in range(times.size):
                    steps = [d[j] * r[i] for d, r in incs]
                    cif += surv * steps[0]
                    surv *= max(1.0 - sum(steps), 0.0)
                total += cif
        assert got[a_i] == pytest.approx(total / len(m), abs=1e-12)


def test_incidence_over_the_cell_limit_is_withheld_with_its_reason(
        monkeypatch: pytest.MonkeyPatch) -> None:
    """Where the interpolation cannot be used (forced here: no relative hazard box passes its
    factor check), the standardised cumulative incidence is summed row by row, rows x event
    times per design and evaluation; past the limit its bootstrap (or the rows) are withheld,
    the message says why, and what is still computed is unchanged (the conditional rows; the
    estimates when only the bootstrap is withheld). With the interpolation forced on every
    stratum instead, the table equals the row-by-row one to 1e-10. Equality with the
    unlimited run is the reference (common practice: a resource limit must not change any
    number it lets through)."""
    import unbin.questions.confounding as conf
    import unbin.refit.incidence_sum as isum
    import unbin.refit.standardise as std

    df = _competing_frame(300, 29, True)
    outcome = {"type": "survival", "time": "T", "event": "E", "horizon": 2.0, "entry": "L",
               "event_of_interest": 1, "competing": [2]}
    raw = _raw(outcome, {"x": {"cuts": [0.0]}, "z": {"cuts": [-0.5, 0.5]}}, ["z"],
               resampling={"bootstrap": 20})
    r, spec = _refit(df, raw)
    full = confounding_table(r, spec)  # 300 rows: summed row by row
    marg = full["scale_kind"] == "marginal"
    assert (full.loc[marg, "status"] == "ok").all()
    monkeypatch.setattr(std, "INTERPOLATE_ROWS", 0)
    monkeypatch.setattr(std, "DIRECT_CELLS", 0)
    r, spec = _refit(df, raw)
    interpolated = confounding_table(r, spec)
    num = [c for c in full.columns if pd.api.types.is_float_dtype(full[c])]
    pd.testing.assert_frame_equal(interpolated.drop(columns=num), full.drop(columns=num))
    np.testing.assert_allclose(interpolated[num].to_numpy(float), full[num].to_numpy(float),
                               rtol=0, atol=1e-10)

    monkeypatch.setattr(isum, "FACTOR_LIMIT", 0.0)  # no box passes: row by row
    events = np.unique(df.loc[(df["E"] != 0) & (df["T"] <= 2.0), "T"]).size
    cells = 300 * events * 2  # a design adjusted for continuous z: 300 distinct rows
    monkeypatch.setattr(conf, "INCIDENCE_CELLS", cells * 5)  # the point, not 21 evaluations
    r, spec = _refit(df, raw)
    some = confounding_table(r, spec)
    assert (some.loc[marg, "status"] == "ok").all()
    assert some.loc[marg, "message"].str.contains("without an interval").all()
    assert some.loc[marg, "message"].str.contains("could not be interpolated").all()
    assert some.loc[marg, "lower_crude"].isna().all()
    np.testing.assert_allclose(some.loc[marg, "estimate_crude"], full.loc[marg, "estimate_crude"],
                               rtol=0, atol=1e-12)
    pd.testing.assert_frame_equal(some[~marg], full[~marg])

    monkeypatch.setattr(conf, "INCIDENCE_CELLS", cells / 2)  # not even the point
    r, spec = _refit(df, raw)
    none = confounding_table(r, spec)
    assert (none.loc[marg, "status"] == "skipped").all()
    assert none.loc[marg, "message"].str.contains("not computed").all()
    assert none.loc[marg, "message"].str.contains(f"{cells:.1e} row-time cells", regex=False).all()
    assert not none.loc[marg, "message"].str.contains("could be refitted").any()
    pd.testing.assert_frame_equal(none[~marg], full[~marg])
