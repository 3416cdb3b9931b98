"""Edges of the multivariate pooling and the pooled curve (unbin.consortium.multivariate) that
the worked examples of test_pooling.py do not reach: two cohorts, equal coefficient vectors,
invariance to the units, the tolerances of the symmetry and definiteness checks, and the
messages that name the bad input."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.linalg import block_diag

from unbin.consortium.meta_analysis import (
    PoolingInputError,
    pool_multivariate,
    pool_univariate,
    pooled_curve,
)


def _cov(rng: np.random.Generator, p: int) -> np.ndarray:
    a = rng.normal(size=(p, p + 3))
    return a @ a.T / (p + 3) * 0.05


def _design(seed: int, k: int, p: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    S = np.stack([_cov(rng, p) for _ in range(k)])
    Y = rng.normal(size=(k, p)) * 0.4 + np.linspace(-0.5, 0.5, p)
    return Y, S


def test_two_cohorts_are_pooled_not_passed_through() -> None:
    # k = 2 is the smallest pool. p = 1: DerSimonian & Laird 1986 in closed form for two
    # estimates, tau² = ((y1 - y2)² - v1 - v2) / 2 (algebra written out). p = 2: the means are
    # GLS fits (statsmodels GLS on the stacked vectors, Jackson, White & Thompson 2010) and
    # Q = trace Q_M on p (k - 1) = 2 df.
    y, v = np.array([0.10, 1.12]), np.array([0.04, 0.05])
    mv = pool_multivariate(y[:, None], v[:, None, None])
    assert mv.psi[0, 0] == pytest.approx(((y[0] - y[1]) ** 2 - v.sum()) / 2.0, rel=1e-12)
    assert mv.q == pytest.approx((y[0] - y[1]) ** 2 / v.sum(), rel=1e-12) and mv.q_df == 1
    assert mv.re_mean[0] == pytest.approx(pool_univariate(y, v).re_mean, rel=1e-12)

    Y, S = _design(4, 2, 2)
    mv = pool_multivariate(Y, S)
    assert (mv.k, mv.p, mv.q_df) == (2, 2, 2)
    X = np.tile(np.eye(2), (2, 1))
    fe = sm.GLS(Y.reshape(-1), X, sigma=block_diag(*S)).fit()
    re = sm.GLS(Y.reshape(-1), X, sigma=block_diag(*(S + mv.psi))).fit()
    np.testing.assert_allclose(mv.fe_mean, fe.params, rtol=1e-10)
    np.testing.assert_allclose(mv.re_mean, re.params, rtol=1e-10)
    np.testing.assert_allclose(mv.re_cov, re.normalized_cov_params, rtol=1e-9)
    assert mv.q == pytest.approx(fe.ssr, rel=1e-10)
    assert np.linalg.norm(mv.psi) > 0  # these two cohorts differ: heterogeneity was estimated


def test_equal_coefficient_vectors_give_q_zero() -> None:
    # Exact arithmetic: equal vectors and diagonal covariances with power-of-two variances
    # make the GLS mean exactly the common vector, so Q = 0, I² = 0 (truncated, Higgins &
    # Thompson 2002) and Psi = 0 after truncation (Jackson, White & Thompson 2010).
    Y = np.array([[0.5, -0.25]] * 3)
    S = np.stack([np.diag([0.25, 0.5]), np.diag([0.5, 1.0]), np.diag([1.0, 0.25])])
    mv = pool_multivariate(Y, S)
    assert mv.q == 0.0 and mv.i2 == 0.0
    np.testing.assert_array_equal(mv.psi, np.zeros((2, 2)))
    assert mv.n_truncated == 2


def test_a_single_cohort_reports_no_between_cohort_covariance() -> None:
    # Common practice (module convention): one cohort, Psi = 0 before and after truncation.
    S1 = np.array([[[0.2, 0.05], [0.05, 0.1]]])
    mv = pool_multivariate([[1.0, 2.0]], S1)
    np.testing.assert_array_equal(mv.psi_unconstrained, np.zeros((2, 2)))
    assert mv.n_truncated == 0 and (mv.k, mv.p) == (1, 2)


@pytest.mark.parametrize("c", [1e-7, 1e5])
def test_results_follow_a_change_of_units(c: float) -> None:
    # Algebra (common practice): with Y -> c Y and S_i -> c² S_i the weights scale by 1/c², so
    # the GLS means scale by c, every covariance (and Psi) by c², and Q and I² do not change.
    # Coefficients in small or large units must pass the definiteness check alike.
    Y, S = _design(6, 5, 3)
    one, scaled = pool_multivariate(Y, S), pool_multivariate(c * Y, c**2 * S)
    np.testing.assert_allclose(scaled.re_mean, c * one.re_mean, rtol=1e-9)
    np.testing.assert_allclose(scaled.re_cov, c**2 * one.re_cov, rtol=1e-8)
    np.testing.assert_allclose(scaled.psi_unconstrained, c**2 * one.psi_unconstrained,
                               rtol=1e-8, atol=1e-12 * c**2)
    assert scaled.q == pytest.approx(one.q, rel=1e-10) and scaled.i2 == pytest.approx(one.i2)
    est1, se1 = pooled_curve(one.re_mean, one.re_cov, np.eye(3), np.zeros(3))
    est2, se2 = pooled_curve(scaled.re_mean, scaled.re_cov, np.eye(3), np.zeros(3))
    np.testing.assert_allclose(est2, c * est1, rtol=1e-9)
    np.testing.assert_allclose(se2, c * se1, rtol=1e-9)


def test_reported_covariances_are_exactly_symmetric() -> None:
    # The documented contract (a covariance matrix is symmetric): checked bit for bit.
    Y, S = _design(7, 6, 3)
    mv = pool_multivariate(Y, S)
    for name in ("fe_cov", "re_cov", "psi", "psi_unconstrained"):
        m = getattr(mv, name)
        np.testing.assert_array_equal(m, m.T, err_msg=name)


@pytest.mark.parametrize("scale", [1e-4, 1.0, 1e4])
def test_symmetry_tolerance_is_relative_to_the_matrix(scale: float) -> None:
    # Common practice: rounding-level asymmetry (1e-12 of the entries) is accepted and the
    # result equals that of the exactly symmetrised matrices; a real asymmetry (1e-6 of the
    # entries) is refused, whatever the units.
    Y, S = _design(8, 4, 2)
    S = S * scale
    tilt = np.zeros_like(S)
    tilt[2, 0, 1] = float(np.abs(S[2]).max())
    near = pool_multivariate(Y, S + 1e-12 * tilt)
    exact = pool_multivariate(Y, S + 0.5e-12 * (tilt + np.swapaxes(tilt, 1, 2)))
    np.testing.assert_allclose(near.re_mean, exact.re_mean, rtol=1e-14)
    np.testing.assert_allclose(near.re_cov, exact.re_cov, rtol=1e-13)
    with pytest.raises(PoolingInputError, match=r"covariance S of cohort 2 is not symmetric"):
        pool_multivariate(Y, S + 1e-6 * tilt)
    V = S[0]
    grid = np.array([[1.0, 0.0], [0.5, 2.0]])
    e0, s0 = pooled_curve(Y[0], V, grid, np.zeros(2))
    e1, s1 = pooled_curve(Y[0], V + 1e-12 * tilt[2], grid, np.zeros(2))
    np.testing.assert_allclose(s1, s0, rtol=1e-9)
    with pytest.raises(PoolingInputError, match=r"^covariance cov is not symmetric$"):
        pooled_curve(Y[0], V + 1e-6 * tilt[2], grid, np.zeros(2))


def test_rounding_level_variance_is_zero_and_a_negative_one_is_named() -> None:
    # Direct matrix computation (numpy): with the positive semi-definite V = [[1, -1], [-1, 1]]
    # the contrast (1, 1) has variance exactly 0 (se 0, accepted) and (1, 0) variance 1.
    # With an indefinite V the first grid point whose variance is negative is named.
    psd = np.array([[1.0, -1.0], [-1.0, 1.0]])
    est, se = pooled_curve([0.3, 0.2], psd, np.array([[1.0, 1.0], [1.0, 0.0]]), [0.0, 0.0])
    np.testing.assert_allclose(est, [0.5, 0.3], rtol=1e-15)
    assert se[0] == 0.0 and se[1] == 1.0
    bad = block_diag(psd, [[-1.0]])
    grid = np.array([[1.0, 1.0, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 1.0]])
    with pytest.raises(PoolingInputError, match=r"^negative variance -1 at grid point 2: cov is "
                                                r"not positive semi-definite$"):
        pooled_curve(np.zeros(3), bad, grid, np.zeros(3))


def test_reference_basis_may_be_given_as_a_row_or_a_column() -> None:
    # basis_ref holds p values in any shape (the common-basis code passes one row); by hand:
    # D = B(x) - B(x_ref), estimate D beta.
    beta, V = np.array([0.2, -0.1, 0.05]), np.eye(3) * 0.01
    G = np.array([[1.0, 2.0, 3.0], [0.0, 1.0, 4.0]])
    ref = np.array([0.5, 0.5, 0.5])
    for shape in ((3,), (1, 3), (3, 1)):
        est, se = pooled_curve(beta, V, G, ref.reshape(shape))
        np.testing.assert_allclose(est, (G - ref) @ beta, rtol=1e-15)
        np.testing.assert_allclose(se, np.sqrt(np.sum((G - ref) ** 2, axis=1) * 0.01),
                                   rtol=1e-14)


def test_messages_name_the_argument_and_the_problem() -> None:
    # The project's rule for bad input: the message names the argument, the cohort and the
    # problem; the eigenvalues quoted are numpy's (eigvalsh) of the offending matrix.
    good = np.stack([np.eye(3) * 0.1, np.eye(3) * 0.2])
    Y = np.zeros((2, 3))
    indefinite = np.diag([0.3, -0.2, 0.1])
    lo, hi = np.linalg.eigvalsh(indefinite)[[0, -1]]
    nan_y = Y.copy()
    nan_y[1, 0] = np.nan
    cases = [
        (lambda: pool_multivariate([0.1, 0.2], good),
         r"^coefficients Y must be a 2-dimensional array, got shape \(2,\)$"),
        (lambda: pool_multivariate(Y, good[0]),
         r"^covariances S must be a 3-dimensional array, got shape \(3, 3\)$"),
        (lambda: pool_multivariate(np.zeros((0, 3)), np.zeros((0, 3, 3))),
         r"^nothing to pool: Y has shape \(0, 3\)$"),
        (lambda: pool_multivariate(np.zeros((2, 0)), np.zeros((2, 0, 0))),
         r"^nothing to pool: Y has shape \(2, 0\)$"),
        (lambda: pool_multivariate(nan_y, good),
         r"^coefficients Y of cohort 1 are not all finite; the multivariate method needs "
         r"every coefficient in every cohort$"),
        (lambda: pool_multivariate(Y, np.stack([good[0], indefinite])),
         rf"^within-cohort covariance S of cohort 1 is not positive definite \(smallest "
         rf"eigenvalue {lo:.3g}, largest {hi:.3g}\); drop coefficients that were not "
         rf"estimable in that cohort$"),
        (lambda: pooled_curve([[0.1]], np.eye(1), np.ones((2, 1)), [0.0]),
         r"^coefficients beta must be a 1-dimensional array"),
        (lambda: pooled_curve([0.1], [0.1], np.ones((2, 1)), [0.0]),
         r"^covariance cov must be a 2-dimensional array"),
        (lambda: pooled_curve([0.1], np.eye(1), np.ones(2), [0.0]),
         r"^basis_grid must be a 2-dimensional array"),
        (lambda: pooled_curve([0.1, 0.2], np.eye(2), np.ones((2, 2)), [0.0]),
         r"^basis_ref must hold 2 values, got 1$"),
    ]
    for name, position in (("beta", 0), ("cov", 1), ("basis_grid", 2), ("basis_ref", 3)):
        args: list[np.ndarray] = [np.zeros(2), np.eye(2), np.ones((3, 2)), np.zeros(2)]
        args[position] = args[position].copy()
        args[position].flat[0] = np.inf
        cases.append((lambda args=args: pooled_curve(*args), rf"^{name} has non-finite entries$"))
    for call, pattern in cases:
        with pytest.raises(PoolingInputError, match=pattern):
            call()
