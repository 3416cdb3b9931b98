"""Paths of the Newton/least-squares solver (unbin.models._glm) that the published fits of
test_models.py do not reach: a residual sum of squares below 1 and an information matrix that
is singular because weighted-out rows leave a column without data."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from unbin.models import Outcome, fit


def test_linear_model_in_small_units_matches_statsmodels() -> None:
    # Reference library: statsmodels OLS. Outcome in small units, so the residual sum of
    # squares is far below 1 (the log-likelihood must still be the Gaussian one).
    rng = np.random.default_rng(17)
    x = rng.normal(size=80)
    y = 1e-3 * (0.5 + 0.3 * x + rng.normal(size=80))
    res = fit("continuous", x[:, None], Outcome("continuous", y), ("x",))
    ref = sm.OLS(y, sm.add_constant(x)).fit()
    assert ref.ssr < 1e-4  # precondition: RSS well below 1
    assert res.ok
    np.testing.assert_allclose(res.coef, ref.params, rtol=1e-9)
    np.testing.assert_allclose(res.se(), ref.bse, rtol=1e-8)
    assert res.loglik == pytest.approx(ref.llf, rel=1e-10)


@pytest.mark.parametrize("family", ["binary", "count"])
def test_rows_with_zero_weight_leave_a_column_unidentified(family: str) -> None:
    # Algebra (numpy.linalg.matrix_rank of the weighted design): rows with frequency weight 0
    # carry no information, so an indicator that is 1 only on such rows has a singular
    # weighted information, although the unweighted design has full rank. The fit fails with
    # a message and keeps its family, names and n.
    rng = np.random.default_rng(3)
    n = 120
    x = rng.normal(size=n)
    g = np.zeros(n)
    g[:10] = 1.0
    w = np.where(g == 1.0, 0.0, 1.0)
    X = np.column_stack([x, g])
    Z = np.column_stack([np.ones(n), X])
    assert np.linalg.matrix_rank(Z) == 3 and np.linalg.matrix_rank(Z * w[:, None]) == 2
    y = ((rng.random(n) < 0.4) if family == "binary" else rng.poisson(2.0, n)).astype(float)
    res = fit(family, X, Outcome(family, y, weights=w), ("x", "g"))
    assert res.status == "failed"
    assert res.message == ("the information matrix became singular; check for separation or "
                           "an empty group.")
    assert res.family == family and res.names == ("(intercept)", "x", "g") and res.n == n
