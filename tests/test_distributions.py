"""unbin.distributions returns exactly what scipy.stats returns (the reference library), on
grids that hold the edge cases: parameters <= 0 and NaN, arguments at and beyond the support's
ends, infinities, scalars and broadcast arrays."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats as scipy_stats

from unbin.distributions import stats

X = np.array([-np.inf, -1.0, -0.0, 0.0, 1e-300, 1e-8, 0.3, 1.0, 3.841458820694124, 7.5, 40.0,
              1e3, np.inf, np.nan])
DF = np.array([-1.0, 0.0, 1e-3, 0.5, 1.0, 2.0, 3.0, 17.5, 1e6, np.inf, np.nan])
Q = np.array([-0.1, 0.0, 1e-300, 1e-12, 0.025, 0.5, 0.95, 0.975, 1 - 1e-12, 1.0, 1.1, np.nan])


def _same(got: object, want: object) -> None:
    np.testing.assert_array_equal(np.asarray(got), np.asarray(want))
    assert np.shape(got) == np.shape(want)


def test_chi2_and_f_survival_functions_match_scipy_stats() -> None:
    x, df = X[:, None], DF[None, :]
    _same(stats.chi2.sf(x, df), scipy_stats.chi2.sf(x, df))
    _same(stats.f.sf(x[:, :, None], df[:, :, None], DF[None, None, :]),
          scipy_stats.f.sf(x[:, :, None], df[:, :, None], DF[None, None, :]))
    for v, d in ((3.2, 1), (0.0, 4), (-2.0, 3), (5.0, 0), (float("nan"), 2)):
        got, want = stats.chi2.sf(v, d), scipy_stats.chi2.sf(v, d)
        _same(got, want)
        assert float(got) == float(want) or (np.isnan(got) and np.isnan(want))


def test_quantile_functions_match_scipy_stats() -> None:
    q, df = Q[:, None], DF[None, :]
    _same(stats.t.ppf(q, df), scipy_stats.t.ppf(q, df))
    _same(stats.chi2.ppf(q, df), scipy_stats.chi2.ppf(q, df))
    _same(stats.norm.ppf(Q), scipy_stats.norm.ppf(Q))
    _same(stats.norm.isf(Q), scipy_stats.norm.isf(Q))
    _same(stats.norm.pdf(X), scipy_stats.norm.pdf(X))
    for v in (0.975, 0.5, 0.0, 1.0):
        _same(stats.norm.ppf(v), scipy_stats.norm.ppf(v))
        _same(stats.norm.isf(v / 2), scipy_stats.norm.isf(v / 2))
    _same(stats.chi2.ppf(0.95, 1), scipy_stats.chi2.ppf(0.95, 1))
    _same(stats.t.ppf(0.975, np.array([1.0, 4.0, 1e12])),
          scipy_stats.t.ppf(0.975, np.array([1.0, 4.0, 1e12])))


@pytest.mark.parametrize("values", [
    [3.0, 1.0, 2.0, 1.0, 3.0, 3.0, -0.0, 0.0],
    [5, 5, 5, 1],
    np.random.default_rng(1).integers(0, 20, 500).astype(float),
    [1.0, np.nan, 2.0],
    [[2.0, 1.0], [1.0, 0.5]],
    [],
])
def test_average_ranks_match_scipy_stats(values: object) -> None:
    _same(stats.rankdata(values), scipy_stats.rankdata(values))
