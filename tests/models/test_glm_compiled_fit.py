"""The GLM engine's compiled per-row kernels (``unbin.models.compiled.glm_rows`` in
``_glm._Family.evaluate``, ``compiled.glm_standardise`` in ``_glm.standardise``), both paths
forced with ``UNBIN_COMPILED``:

- the two paths give the very same fits (coefficients, covariance, log-likelihood, iterations:
  the kernels do the numpy path's operations in its order), for the logistic and Poisson models
  with and without frequency weights and a person-time offset, the linear model, a
  Fortran-ordered design, and the FP screen's evaluations on gathered columns;
- the compiled path agrees with statsmodels' GLM (Binomial, Poisson with ``freq_weights`` and
  an offset) and OLS;
- the standardised copy equals its definition ``[1, (X - mean) / sd]`` element for element.
The samples span several row blocks of both kernels (``_BLOCK_ROWS``, ``_PASS_ROWS``), the last
one partial."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from helpers import SODIUM_NAMES, SODIUM_TRUTH, sodium_design
from unbin.models import Outcome, _glm, fit
from unbin.models._glm import _BLOCK_ROWS, _Family, standardise, standardise_with_gram

N = 2 * _BLOCK_ROWS + 1234


def _design(seed: int, n: int = N) -> np.ndarray:
    return sodium_design(seed, n)


def _outcome(case: str, X: np.ndarray) -> Outcome:
    rng = np.random.default_rng(17)
    eta = X @ SODIUM_TRUTH[1:]
    eta = eta - eta.mean()
    freq = rng.integers(1, 4, N).astype(float) if case.endswith("weighted") else None
    if case.startswith("binary"):
        y = (rng.random(N) < 1.0 / (1.0 + np.exp(-(eta - 1.0)))).astype(float)
        return Outcome("binary", y, weights=freq)
    if case.startswith("count"):
        years = rng.uniform(0.2, 3.0, N)
        y = rng.poisson(years * np.exp(eta - 0.5)).astype(float)
        return Outcome("count", y, offset=np.log(years), weights=freq)
    return Outcome("continuous", 130 + 10 * eta + 8 * rng.normal(size=N), weights=freq)


def _fit(path: str, case: str, X: np.ndarray, monkeypatch: pytest.MonkeyPatch):  # type: ignore[no-untyped-def]
    monkeypatch.setenv("UNBIN_COMPILED", path)
    out = _outcome(case, X)
    return fit(out.family, X, out, SODIUM_NAMES), out


CASES = ["binary", "binary-weighted", "count", "count-weighted", "continuous"]


@pytest.mark.parametrize("case", CASES)
def test_both_paths_give_the_same_fit(case: str, monkeypatch: pytest.MonkeyPatch) -> None:
    # Definition: the kernels do the numpy path's operations in its order, so the same numbers.
    X = _design(1)
    a, _ = _fit("always", case, X, monkeypatch)
    b, _ = _fit("never", case, X, monkeypatch)
    assert a.ok and b.ok
    np.testing.assert_array_equal(a.coef, b.coef)
    np.testing.assert_array_equal(a.cov, b.cov)
    assert a.loglik == b.loglik and a.iterations == b.iterations


def test_both_paths_give_the_same_fit_on_a_fortran_ordered_design(
        monkeypatch: pytest.MonkeyPatch) -> None:
    X = np.asfortranarray(_design(2))
    a, _ = _fit("always", "binary", X, monkeypatch)
    b, _ = _fit("never", "binary", X, monkeypatch)
    np.testing.assert_array_equal(a.coef, b.coef)
    np.testing.assert_array_equal(a.cov, b.cov)
    assert a.loglik == b.loglik


@pytest.mark.parametrize("case", ["binary", "count-weighted", "continuous"])
def test_compiled_fit_equals_statsmodels(case: str, monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference library: statsmodels GLM (Binomial; Poisson with a log person-time offset and
    # freq_weights) fitted to 1e-13, and OLS for the linear model.
    X = _design(3)
    res, out = _fit("always", case, X, monkeypatch)
    assert res.ok, res.message
    if out.family == "continuous":
        ref = sm.OLS(out.y, sm.add_constant(X)).fit()
        np.testing.assert_allclose(res.coef, ref.params, rtol=1e-9, atol=1e-9)
        np.testing.assert_allclose(res.cov, ref.cov_params(), rtol=1e-8, atol=1e-14)
        assert res.loglik == pytest.approx(ref.llf, rel=1e-12)
        return
    fam = sm.families.Binomial() if out.family == "binary" else sm.families.Poisson()
    ref = sm.GLM(out.y, sm.add_constant(X), family=fam, offset=out.offset,
                 freq_weights=out.weights).fit(tol=1e-13, maxiter=100)
    np.testing.assert_allclose(res.coef, ref.params, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(res.se(), ref.bse, rtol=1e-7)
    assert res.loglik == pytest.approx(ref.llf, rel=1e-11)


@pytest.mark.parametrize("case", ["binary", "count-weighted"])
def test_gathered_column_evaluations_agree_on_both_paths(
        case: str, monkeypatch: pytest.MonkeyPatch) -> None:
    # Definition (the FP screen's candidates): the same log-likelihood, score and information
    # on both paths, on a subset of the columns gathered block by block.
    X = _design(4)
    out = _outcome(case, X)
    Z = standardise(X)[0]
    cols = np.array([0, 2, 3, 5])
    theta = np.array([-1.0, 0.1, -0.05, 0.2])
    got = {}
    for path in ("always", "never"):
        monkeypatch.setenv("UNBIN_COMPILED", path)
        model = _Family(out.family, Z, np.asarray(out.y, float), out.offset, out.weights,
                        cols=cols)
        got[path] = model.evaluate(theta)
    assert got["always"][0] == got["never"][0]
    np.testing.assert_array_equal(got["always"][1], got["never"][1])
    np.testing.assert_array_equal(got["always"][2], got["never"][2])


@pytest.mark.parametrize("order", ["C", "F"])
def test_compiled_standardised_copy_is_its_definition(
        order: str, monkeypatch: pytest.MonkeyPatch) -> None:
    # Definition: Z = [1, (X - mean) / sd] with the same subtraction and multiplication per
    # element as the whole array at once (the numpy path), and the Gram of the same blocks.
    X = np.asarray(_design(5), order=order)
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    Z, mean, sd, G = standardise_with_gram(X)
    whole = np.empty_like(X)
    np.subtract(X, mean, out=whole)
    whole *= 1.0 / sd
    np.testing.assert_array_equal(Z[:, 0], 1.0)
    np.testing.assert_array_equal(Z[:, 1:], whole)
    monkeypatch.setenv("UNBIN_COMPILED", "never")
    Zn, _, _, Gn = standardise_with_gram(X)
    np.testing.assert_array_equal(Z, Zn)
    np.testing.assert_array_equal(G, Gn)
    assert _glm.STANDARDISE_FROM_ROWS > 6000 and _glm.ROWS_FROM_ROWS > 6000  # the demo: numpy


def test_weighted_cross_product_agrees_on_both_paths(monkeypatch: pytest.MonkeyPatch) -> None:
    # Definition: Z' diag(v) Z; the compiled scaled rows are numpy's products, so both paths
    # give the very same matrix, and numpy's product of the whole arrays to rounding.
    Z = standardise(_design(6))[0]
    v = np.random.default_rng(60).uniform(0.05, 0.25, N)
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    a = _glm.gram(Z, v)
    monkeypatch.setenv("UNBIN_COMPILED", "never")
    np.testing.assert_array_equal(a, _glm.gram(Z, v))
    np.testing.assert_allclose(a, (Z * v[:, None]).T @ Z, rtol=1e-12)


@pytest.mark.parametrize("path", ["always", "never"])
def test_gram_without_the_copy_is_the_copys_gram(path: str, monkeypatch: pytest.MonkeyPatch,
                                                 ) -> None:
    # Definition: the rank check's Gram made block by block through one work block
    # (``standardised_gram``, no standardised copy kept) is the very matrix of the copy's
    # blocks, and numpy's Z'Z of Z = [1, (X - mean) / sd] (population sd) to rounding.
    X = _design(7)
    monkeypatch.setenv("UNBIN_COMPILED", path)
    Z, _, _, G = standardise_with_gram(X)
    np.testing.assert_array_equal(_glm.standardised_gram(X), G)
    Zdef = np.column_stack([np.ones(N), (X - X.mean(axis=0)) / X.std(axis=0)])
    np.testing.assert_allclose(_glm.standardised_gram(X), Zdef.T @ Zdef, rtol=1e-9,
                               atol=1e-7 * N)
    # with a tied column the check still names it (Z is made then)
    tied = np.column_stack([X, X[:, 0] - 2.0 * X[:, 1]])
    names = (*SODIUM_NAMES, "tied")
    assert "tied" in _glm.check_design(tied, names)
    assert _glm.check_design(X, SODIUM_NAMES) == ""

