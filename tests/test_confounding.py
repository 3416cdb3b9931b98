"""Tests of residual confounding (unbin.confounding): Cochran's (1968) removed shares for a
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
from unbin.confounding import (
    confounding_table,
    resample_weights,
    weighted_cox,
    weighted_cox_designs,
    weighted_glm,
)
from unbin.cox import fit_cox
from unbin.models.base import Outcome

# Cochran 1968 (Biometrics 24:295), CHECKS.md: % of the bias removed, c equal-frequency groups
COCHRAN = {2: 63.66, 3: 79.32, 4: 86.06, 5: 89.70}




def _raw(outcome: dict[str, Any], groupings: dict[str, Any], adjust: list[str],
         **top: Any) -> dict[str, Any]:
    return {"study": "sim", "cohorts": [{"name": "c", "path": "unused.csv"}],
            "groupings": {"x": {"quantiles": 2}, **groupings},
            "analyses": [{"name": "a", "outcome": outcome, "exposure": "x", "adjust": adjust}],
            **top}


def cochran_formula(c: int) -> float:
    """sum_j [phi(a_{j-1}) - phi(a_j)]^2 / p_j for c equal-frequency groups (CHECKS.md)."""
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
    row = tab[(tab["exposure_form"] == "linear") & (tab["scope"] == "all")].iloc[0]
    assert cochran_formula(c) * 100 == pytest.approx(COCHRAN[c], abs=0.01)  # CHECKS.md values
    assert 100 * row["share_removed"] == pytest.approx(COCHRAN[c], abs=2.0)
    assert row["share_left"] + row["share_removed"] == pytest.approx(1.0)
    # the continuous adjustment removes all of it: b_continuous is the true 0.5
    assert row["estimate_continuous"] == pytest.approx(0.5, abs=0.01)


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
    lin = tab[tab["exposure_form"] == "linear"].set_index("scope")
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
