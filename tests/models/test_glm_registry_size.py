"""The GLM solver's registry-size paths (unbin.models._glm): the standardised design written in
row blocks with its cross-product matrix accumulated on the way (the rank check and least
squares use that one matrix), and the FP screen's evaluations on a candidate's columns gathered
block by block. Fits on several row blocks (more rows than ``_BLOCK_ROWS``, not a multiple of
it) against statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from helpers import SODIUM_NAMES, SODIUM_TRUTH, sodium_design
from unbin.models import Outcome, _glm, fit
from unbin.models._glm import _BLOCK_ROWS, check_design, gram, standardise, standardise_with_gram

N = 2 * _BLOCK_ROWS + 1234  # three row blocks of the Gram (12 of an evaluation), one partial


def _design(seed: int, n: int = N) -> np.ndarray:
    return sodium_design(seed, n)




def test_blocked_standardise_and_its_gram() -> None:
    # Definition: Z = [1, (X - mean) / sd] elementwise (the same two operations per element as
    # on the whole array at once, so the same numbers), and G = Z'Z (numpy's product of the
    # whole matrix, to rounding; the very numbers of gram(Z), whose blocks it shares).
    X = _design(1)
    Z, mean, sd, G = standardise_with_gram(X)
    np.testing.assert_array_equal(Z[:, 0], 1.0)
    whole = np.empty_like(X)
    np.subtract(X, mean, out=whole)
    whole *= 1.0 / sd
    np.testing.assert_array_equal(Z[:, 1:], whole)
    np.testing.assert_array_equal(standardise(X)[0], Z)
    np.testing.assert_allclose(G, Z.T @ Z, rtol=1e-12, atol=1e-9)
    np.testing.assert_array_equal(G, gram(Z))
    # no columns: the intercept's Gram is the row count
    Z0, _, _, G0 = standardise_with_gram(np.empty((5, 0)))
    np.testing.assert_array_equal(Z0, np.ones((5, 1)))
    assert G0.tolist() == [[5.0]]


def test_rank_check_with_the_shared_gram_names_the_tied_columns() -> None:
    # Algebra: a column that is the sum of two others makes the design collinear; the check
    # given the shared Gram names the same columns as the one computing its own.
    X = _design(2, n=3000)
    X = np.column_stack([X, X[:, 4] + X[:, 5]])
    names = (*SODIUM_NAMES, "site_any")
    Z, _, _, G = standardise_with_gram(X)
    msg = check_design(X, names, Z, G)
    assert "collinear" in msg and "site_any" in msg and "site_b" in msg
    assert msg == check_design(X, names)
    Z1, _, _, G1 = standardise_with_gram(X[:, :-1])
    assert check_design(X[:, :-1], SODIUM_NAMES, Z1, G1) == ""


def _statsmodels(family: str, X: np.ndarray, y: np.ndarray, offset: np.ndarray | None = None,
                 freq: np.ndarray | None = None) -> sm.GLM:
    fam = {"binary": sm.families.Binomial(), "count": sm.families.Poisson(),
           "continuous": sm.families.Gaussian()}[family]
    return sm.GLM(y, sm.add_constant(X), family=fam, offset=offset,
                  freq_weights=freq).fit(tol=1e-13, maxiter=100)


def _outcomes(seed: int) -> dict[str, Outcome]:
    X = _design(seed)
    rng = np.random.default_rng(seed)
    eta = X @ SODIUM_TRUTH[1:]
    eta = eta - eta.mean()
    years = rng.uniform(0.2, 3.0, N)
    freq = rng.integers(1, 4, N).astype(float)
    yb = (rng.random(N) < 1.0 / (1.0 + np.exp(-(eta - 1.0)))).astype(float)
    yn = rng.poisson(years * np.exp(eta - 0.5)).astype(float)
    return {"binary": Outcome("binary", yb), "binary-weighted": Outcome("binary", yb, weights=freq),
            "count": Outcome("count", yn, offset=np.log(years)),
            "count-weighted": Outcome("count", yn, offset=np.log(years), weights=freq)}


def _agrees_with_statsmodels(res, ref) -> None:  # type: ignore[no-untyped-def]
    assert res.ok, res.message
    np.testing.assert_allclose(res.coef, ref.params, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(res.se(), ref.bse, rtol=1e-7)
    assert res.loglik == pytest.approx(ref.llf, rel=1e-11)


@pytest.mark.parametrize("case", ["binary", "binary-weighted", "count"])
def test_fits_from_the_shared_gram_equal_statsmodels(case: str) -> None:
    # Reference library: statsmodels GLM (Binomial, with freq_weights for frequency weights,
    # where the logistic start computes its own weighted information; Poisson with a log
    # person-time offset).
    X = _design(3)
    out = _outcomes(3)[case]
    res = fit(out.family, X, out, SODIUM_NAMES)
    _agrees_with_statsmodels(res, _statsmodels(out.family, X, out.y, offset=out.offset,
                                               freq=out.weights))


def test_linear_fit_from_the_shared_gram_equals_statsmodels() -> None:
    # Reference library: statsmodels OLS (coefficients, covariance with RSS / (N - p), and the
    # maximum-likelihood Gaussian log-likelihood).
    X = _design(5)
    rng = np.random.default_rng(50)
    y = 130 + X @ (10 * SODIUM_TRUTH[1:]) + 8 * rng.normal(size=N)
    res = fit("continuous", X, Outcome("continuous", y), SODIUM_NAMES)
    ref = sm.OLS(y, sm.add_constant(X)).fit()
    assert res.ok, res.message
    np.testing.assert_allclose(res.coef, ref.params, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(res.cov, ref.cov_params(), rtol=1e-8, atol=1e-14)
    assert res.loglik == pytest.approx(ref.llf, rel=1e-12)


def test_intercept_only_logistic_fit_is_the_log_odds() -> None:
    # Closed form: without covariates the maximum-likelihood intercept is log(p / (1 - p)) and
    # its variance 1 / (n p (1 - p)) (the shared Gram of the ones column is n).
    rng = np.random.default_rng(6)
    y = (rng.random(N) < 0.3).astype(float)
    res = fit("binary", np.empty((N, 0)), Outcome("binary", y), ())
    p = y.mean()
    assert res.ok
    assert res.coef[0] == pytest.approx(np.log(p / (1 - p)), rel=1e-12)
    assert res.cov[0, 0] == pytest.approx(1.0 / (N * p * (1 - p)), rel=1e-10)


@pytest.mark.parametrize("case", ["binary", "count-weighted"])
def test_evaluations_on_gathered_columns_equal_those_on_their_copy(case: str) -> None:
    # Definition (the FP screen's candidates): evaluating a subset of the columns gathered one
    # block of rows at a time gives the very numbers of evaluating a copy of those columns, and
    # the range of their product with a step is the copy's; the score and information are
    # checked against statsmodels' at the same point (GLM.score and GLM.hessian with
    # freq_weights: the information of a canonical link is the negative Hessian).
    X = _design(9)
    out = _outcomes(9)[case]
    Z, _, _ = standardise(X)
    cols = np.array([0, 2, 3, 5])
    theta = np.array([-1.2, 0.1, -0.05, 0.2])
    y = np.asarray(out.y, dtype=float)
    gathered = _glm._Family(out.family, Z, y, out.offset, out.weights, 0.0, cols).evaluate(theta)
    copied = _glm._Family(out.family, np.take(Z, cols, axis=1), y, out.offset, out.weights,
                          0.0).evaluate(theta)
    assert gathered[0] == copied[0]
    np.testing.assert_array_equal(gathered[1], copied[1])
    np.testing.assert_array_equal(gathered[2], copied[2])
    step = np.array([0.3, -0.2, 0.1, 0.05])
    change = np.take(Z, cols, axis=1) @ step
    assert _glm.gathered_range(Z, cols, step) == (change.min(), change.max())
    fam = sm.families.Binomial() if out.family == "binary" else sm.families.Poisson()
    ref = sm.GLM(y, np.take(Z, cols, axis=1), family=fam, offset=out.offset,
                 freq_weights=out.weights)
    np.testing.assert_allclose(gathered[1], ref.score(theta), rtol=1e-9, atol=1e-8)
    np.testing.assert_allclose(gathered[2], -ref.hessian(theta), rtol=1e-9, atol=1e-8)
