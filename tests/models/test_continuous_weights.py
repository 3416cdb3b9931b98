"""The linear model's R² and residual SD under weights, against statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from unbin.models.base import Outcome
from unbin.models.continuous import fit_continuous


def _data(seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(150, 2))
    y = 1 + X @ np.array([0.5, -0.3]) + rng.normal(size=150)
    return X, y, rng.integers(1, 5, 150).astype(float)


@pytest.mark.parametrize("seed", [1, 2])
def test_frequency_weights_equal_the_expanded_rows(seed: int) -> None:
    """statsmodels OLS on the rows repeated by their weights: coefficients, SEs, R², residual
    SD and log-likelihood."""
    X, y, w = _data(seed)
    res = fit_continuous(X, Outcome("continuous", y, weights=w, weight_kind="frequency"),
                         ("a", "b"))
    rep = np.repeat(np.arange(len(y)), w.astype(int))
    ref = sm.OLS(y[rep], sm.add_constant(X[rep])).fit()
    np.testing.assert_allclose(res.coef, ref.params, rtol=1e-9)
    np.testing.assert_allclose(res.se(), ref.bse, rtol=1e-9)
    assert res.extra["r2"] == pytest.approx(ref.rsquared, rel=1e-10)
    assert res.extra["sigma"] == pytest.approx(np.sqrt(ref.scale), rel=1e-10)
    assert res.loglik == pytest.approx(ref.llf, rel=1e-10)


def test_sampling_weights_give_the_weighted_r2() -> None:
    """statsmodels WLS (its R² centres on the weighted mean) with the same weights."""
    X, y, w = _data(3)
    w = w / 2.5  # not counts
    res = fit_continuous(X, Outcome("continuous", y, weights=w, weight_kind="sampling"),
                         ("a", "b"))
    ref = sm.WLS(y, sm.add_constant(X), weights=w).fit()
    np.testing.assert_allclose(res.coef, ref.params, rtol=1e-9)
    assert res.extra["r2"] == pytest.approx(ref.rsquared, rel=1e-10)


def test_unweighted_r2_unchanged() -> None:
    X, y, _ = _data(4)
    res = fit_continuous(X, Outcome("continuous", y), ("a", "b"))
    ref = sm.OLS(y, sm.add_constant(X)).fit()
    assert res.extra["r2"] == pytest.approx(ref.rsquared, rel=1e-10)
    assert res.extra["sigma"] == pytest.approx(np.sqrt(ref.scale), rel=1e-10)
