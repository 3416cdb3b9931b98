"""The family fitters (unbin.models.fit) against published fits and statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.datasets import longley, spector

from unbin.models import Outcome, fit


def test_logit_reproduces_the_published_spector_mazzeo_fit() -> None:
    # Greene, Econometric Analysis, Table 21.1 (from memory), on the Spector & Mazzeo
    # data that statsmodels ships.
    d = spector.load_pandas()
    names = ("GPA", "TUCE", "PSI")
    y = d.endog.to_numpy(float)
    res = fit("binary", d.exog[list(names)].to_numpy(float), Outcome("binary", y), names)
    assert res.ok and res.converged
    assert res.names == ("(intercept)", *names)
    np.testing.assert_allclose(res.coef, [-13.02135, 2.82611, 0.09516, 2.37869], rtol=0,
                               atol=1e-4)
    assert res.loglik == pytest.approx(-12.88963, abs=1e-4)
    assert res.n == 32 and res.events == int(y.sum()) == 11
    # Reference library: statsmodels Logit (standard errors and full covariance).
    ref = sm.Logit(y, sm.add_constant(d.exog[list(names)].to_numpy(float))).fit(disp=0)
    np.testing.assert_allclose(res.se(), ref.bse, rtol=1e-6)
    np.testing.assert_allclose(res.cov, ref.cov_params(), rtol=1e-6, atol=1e-12)
    np.testing.assert_allclose(res.linear_predictor + res.coef[0], ref.fittedvalues, atol=1e-7)


def test_poisson_with_person_time_offset_matches_statsmodels_glm() -> None:
    # Reference library: statsmodels GLM, Poisson family, offset = log person-time.
    rng = np.random.default_rng(42)
    n = 3000
    bmi = rng.normal(27.0, 4.0, n)
    age = rng.uniform(30.0, 80.0, n)
    pyears = rng.uniform(0.2, 6.0, n)
    rate = np.exp(-1.0 + 0.05 * (bmi - 27.0) + 0.01 * (age - 55.0))
    visits = rng.poisson(rate * pyears).astype(float)
    X = np.column_stack([bmi, age])
    res = fit("count", X, Outcome("count", visits, offset=np.log(pyears)), ("bmi", "age"))
    ref = sm.GLM(visits, sm.add_constant(X), family=sm.families.Poisson(),
                 offset=np.log(pyears)).fit()
    assert res.ok
    np.testing.assert_allclose(res.coef, ref.params, rtol=1e-7)
    np.testing.assert_allclose(res.se(), ref.bse, rtol=1e-6)
    assert res.loglik == pytest.approx(ref.llf, rel=1e-10)
    assert res.events == int(visits.sum())
    # The offset matters: ignoring it gives a different fit (the check above can fail).
    no_offset = fit("count", X, Outcome("count", visits), ("bmi", "age"))
    assert abs(no_offset.loglik - res.loglik) > 10


def test_linear_model_on_longley_matches_nist_certified_values_and_statsmodels() -> None:
    # NIST StRD certified values for the Longley data (shipped by statsmodels; the same values
    # sit in statsmodels' own regression test results). The data are notoriously ill-conditioned.
    d = longley.load_pandas()
    names = tuple(d.exog.columns)  # GNPDEFL GNP UNEMP ARMED POP YEAR
    X, y = d.exog.to_numpy(float), d.endog.to_numpy(float)
    res = fit("continuous", X, Outcome("continuous", y), names)
    assert res.ok
    certified = [-3482258.63459582, 15.0618722713733, -0.358191792925910e-01,
                 -2.02022980381683, -1.03322686717359, -0.511041056535807e-01, 1829.15146461355]
    certified_se = [890420.383607373, 84.9149257747669, 0.334910077722432e-01,
                    0.488399681651699, 0.214274163161675, 0.226073200069370, 455.478499142212]
    np.testing.assert_allclose(res.coef, certified, rtol=1e-8)
    np.testing.assert_allclose(res.se(), certified_se, rtol=1e-8)
    assert res.extra["r2"] == pytest.approx(0.995479004577296, rel=1e-10)
    assert res.extra["sigma"] == pytest.approx(304.854073561965, rel=1e-10)
    # Reference library: statsmodels OLS gives the same (maximum-likelihood) log-likelihood.
    ref = sm.OLS(y, sm.add_constant(X)).fit()
    assert res.loglik == pytest.approx(ref.llf, rel=1e-10)
    np.testing.assert_allclose(res.coef, ref.params, rtol=1e-8)


def test_perfect_separation_is_recorded_as_a_failed_fit() -> None:
    # Common practice: with complete separation the logistic MLE does not exist (it is infinite).
    x = np.linspace(-2.0, 2.0, 60)
    y = (x > 0).astype(float)
    res = fit("binary", x[:, None], Outcome("binary", y), ("x",))
    assert res.status == "failed" and not res.ok
    assert "separation" in res.message
    assert np.isnan(res.coef).all() and np.isnan(res.loglik)


@pytest.mark.parametrize("group_size", [5, 40, 2000])
def test_a_group_without_events_is_quasi_complete_separation(group_size: int) -> None:
    # Common practice (Albert & Anderson 1984): a legacy group with no events makes its odds
    # ratio infinite (quasi-complete separation); the fit must not report a finite estimate.
    rng = np.random.default_rng(group_size)
    n0 = 300
    group = np.r_[np.zeros(n0), np.ones(group_size)]
    age = rng.normal(60.0, 10.0, group.size)
    y = np.where(group == 1, 0.0, (rng.random(group.size) < 0.3).astype(float))
    res = fit("binary", np.column_stack([group, age]), Outcome("binary", y), ("group", "age"))
    assert res.status == "failed"
    assert "separation" in res.message


def test_collinear_design_fails_naming_the_tied_columns() -> None:
    rng = np.random.default_rng(1)
    a, b, c = rng.normal(size=(3, 200))
    y = (rng.random(200) < 0.4).astype(float)
    X = np.column_stack([a, b, c, a + 2.0 * b])
    res = fit("binary", X, Outcome("binary", y), ("age", "bmi", "sbp", "score"))
    assert res.status == "failed"
    assert "collinear" in res.message
    tied = res.message[res.message.index("["):res.message.index("]") + 1]
    assert all(name in tied for name in ("'age'", "'bmi'", "'score'"))
    assert "'sbp'" not in tied


def test_indicators_that_cover_every_row_are_named_as_collinear() -> None:
    rng = np.random.default_rng(2)
    g = (rng.random(150) < 0.5).astype(float)
    x = rng.normal(size=150)
    y = x + rng.normal(size=150)
    res = fit("continuous", np.column_stack([x, g, 1.0 - g]), Outcome("continuous", y),
              ("x", "grp[a]", "grp[b]"))
    assert res.status == "failed"
    assert "['grp[a]', 'grp[b]'] are linearly dependent" in res.message


def test_fit_refuses_a_design_whose_names_do_not_match() -> None:
    with pytest.raises(ValueError, match="2 columns but 1 names"):
        fit("continuous", np.zeros((5, 2)), Outcome("continuous", np.arange(5.0)), ("x",))


@pytest.mark.parametrize("family", ["binary", "count", "continuous"])
def test_frequency_weights_equal_repeated_rows_and_match_statsmodels(family: str) -> None:
    # Reference library: statsmodels GLM with freq_weights (binomial, Poisson with offset) and
    # OLS on the rows repeated as often as weighted; unbin's solver on the weights must agree.
    rng = np.random.default_rng(5)
    n = 400
    x = rng.normal(size=n)
    age = rng.uniform(30.0, 80.0, n)
    t = rng.uniform(0.5, 3.0, n)
    w = rng.integers(1, 4, n).astype(float)
    lp = -0.5 + 0.6 * x + 0.02 * (age - 55.0)
    X = np.column_stack([x, age])
    if family == "binary":
        y = (rng.random(n) < 1 / (1 + np.exp(-lp))).astype(float)
        out = Outcome("binary", y, weights=w)
        ref = sm.GLM(y, sm.add_constant(X), family=sm.families.Binomial(),
                     freq_weights=w).fit(tol=1e-13)
    elif family == "count":
        y = rng.poisson(np.exp(lp) * t).astype(float)
        out = Outcome("count", y, offset=np.log(t), weights=w)
        ref = sm.GLM(y, sm.add_constant(X), family=sm.families.Poisson(), offset=np.log(t),
                     freq_weights=w).fit(tol=1e-13)
    else:
        y = 3.0 + lp + rng.normal(size=n)
        out = Outcome("continuous", y, weights=w)
        rep = np.repeat(np.arange(n), w.astype(int))
        ref = sm.OLS(y[rep], sm.add_constant(X[rep])).fit()
    res = fit(family, X, out, ("x", "age"))
    assert res.ok
    np.testing.assert_allclose(res.coef, ref.params, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(res.se(), ref.bse, rtol=1e-6)
    assert res.loglik == pytest.approx(ref.llf, rel=1e-10)


def test_a_large_spline_design_matches_statsmodels_to_full_precision() -> None:
    # Reference library: statsmodels GLM (binomial) on the same design. A registry-sized sample
    # with a 5-knot restricted cubic spline (strongly correlated columns) and a rare outcome.
    from unbin.terms import SplineTerm

    rng = np.random.default_rng(11)
    n = 200_000
    x = rng.gamma(4.0, 10.0, n)
    term = SplineTerm.at_quantiles("x", x, 5)
    B = term.basis(x)
    y = (rng.random(n) < 1 / (1 + np.exp(-(-4.0 + 0.02 * x)))).astype(float)
    res = fit("binary", B, Outcome("binary", y), term.names())
    ref = sm.GLM(y, sm.add_constant(B), family=sm.families.Binomial()).fit(tol=1e-13)
    assert res.ok and res.iterations < 15
    np.testing.assert_allclose(res.coef, ref.params, rtol=1e-8)
    np.testing.assert_allclose(res.cov, ref.cov_params(), rtol=1e-6)
    assert res.loglik == pytest.approx(ref.llf, rel=1e-12)
