"""Pooling coefficient vectors across cohorts: the multivariate method of moments (Jackson,
White & Thompson 2010) for the between-cohort covariance, GLS means, and the pooled curve
f(x) - f(x_ref) with delta-method standard errors (conventions:
:mod:`unbin.consortium.meta_analysis`)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .pooling_base import PoolingInputError, _as_float, _frozen


@dataclass(frozen=True)
class MultivariatePooled:
    """Multivariate pooled coefficient vector (arrays are read-only).

    ``fe_mean``/``fe_cov``: fixed effect, (sum S_i^-1)^-1 sum S_i^-1 y_i and (sum S_i^-1)^-1.
    ``re_mean``/``re_cov``: the same with S_i + ``psi``.
    ``psi``: between-cohort covariance, the method-of-moments solution made positive
    semi-definite by setting its negative eigenvalues to zero; ``psi_unconstrained`` is the
    symmetrised solution before that step (an unbiased estimator of Psi) and
    ``n_truncated`` the number of eigenvalues that were set to zero.
    ``q``: multivariate Q = sum_i (y_i - fe_mean)' S_i^-1 (y_i - fe_mean) on
    ``q_df = p (k - 1)`` degrees of freedom; ``i2`` = max(0, (Q - df)/Q).
    """

    k: int
    p: int
    fe_mean: np.ndarray
    fe_cov: np.ndarray
    re_mean: np.ndarray
    re_cov: np.ndarray
    psi: np.ndarray
    psi_unconstrained: np.ndarray
    n_truncated: int
    q: float
    q_df: int
    q_pvalue: float
    i2: float

    @property
    def fe_se(self) -> np.ndarray:
        return np.sqrt(np.diag(self.fe_cov))

    @property
    def re_se(self) -> np.ndarray:
        return np.sqrt(np.diag(self.re_cov))


def _check_covariances(S: np.ndarray) -> np.ndarray:
    """Validate (k, p, p) covariance matrices; return them exactly symmetrised."""
    for i in range(S.shape[0]):
        s = S[i]
        if not np.isfinite(s).all():
            raise PoolingInputError(
                f"within-cohort covariance S of cohort {i} has non-finite entries"
            )
        scale = float(np.max(np.abs(s))) if s.size else 0.0
        asym = float(np.max(np.abs(s - s.T))) if s.size else 0.0
        if asym > 1e-8 * max(scale, np.finfo(float).tiny):
            raise PoolingInputError(
                f"within-cohort covariance S of cohort {i} is not symmetric "
                f"(largest |S - S'| = {asym:.3g})"
            )
    sym = 0.5 * (S + np.swapaxes(S, 1, 2))
    eig = np.linalg.eigvalsh(sym)
    for i in range(S.shape[0]):
        top = max(float(eig[i, -1]), 0.0)
        if not eig[i, 0] > 1e-12 * top:
            raise PoolingInputError(
                f"within-cohort covariance S of cohort {i} is not positive definite "
                f"(smallest eigenvalue {eig[i, 0]:.3g}, largest {eig[i, -1]:.3g}); "
                "drop coefficients that were not estimable in that cohort"
            )
    return sym


def _inv_spd(M: np.ndarray) -> np.ndarray:
    """Inverse of symmetric positive definite matrices (..., p, p), returned symmetric."""
    eye = np.broadcast_to(np.eye(M.shape[-1]), M.shape)
    inv = np.linalg.solve(M, eye)
    return 0.5 * (inv + np.swapaxes(inv, -1, -2))


def _gls_mean(Y: np.ndarray, W: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(sum W_i)^-1 sum W_i y_i and (sum W_i)^-1."""
    A = W.sum(axis=0)
    cov = _inv_spd(A)
    mean = cov @ np.einsum("ipq,iq->p", W, Y)
    return mean, cov


def _vectors_and_covariances(Y: object, S: object) -> tuple[np.ndarray, np.ndarray]:
    """(k, p) coefficient vectors, all finite, and their (k, p, p) covariance matrices,
    checked and exactly symmetrised."""
    ya = _as_float("coefficients Y", Y, 2)
    sa = _as_float("covariances S", S, 3)
    k, p = ya.shape
    if k == 0 or p == 0:
        raise PoolingInputError(f"nothing to pool: Y has shape {ya.shape}")
    if sa.shape != (k, p, p):
        raise PoolingInputError(
            f"covariances S must have shape (k, p, p) = {(k, p, p)} to match Y {ya.shape}, "
            f"got {sa.shape}"
        )
    if not np.isfinite(ya).all():
        i = int(np.argwhere(~np.isfinite(ya))[0, 0])
        raise PoolingInputError(
            f"coefficients Y of cohort {i} are not all finite; the multivariate method needs "
            "every coefficient in every cohort"
        )
    return ya, _check_covariances(sa)


def _between_cohort_covariance(
    W: np.ndarray, fe_cov: np.ndarray, q_mat: np.ndarray, k: int
) -> tuple[np.ndarray, np.ndarray, int]:
    """The method-of-moments Psi from the weights W_i = S_i^-1, the fixed-effect covariance
    A^-1 and Q_M (see :func:`pool_multivariate`): the symmetrised solution, the solution with
    its negative eigenvalues set to zero, and how many were."""
    p = q_mat.shape[0]
    A = W.sum(axis=0)
    B = A - np.einsum("ipq,qr,irs->ps", W, fe_cov, W)
    psi_u = np.linalg.solve(B, q_mat - (k - 1) * np.eye(p))
    psi_u = 0.5 * (psi_u + psi_u.T)
    evals, evecs = np.linalg.eigh(psi_u)
    n_trunc = int((evals < 0).sum())
    psi = (evecs * np.maximum(evals, 0.0)) @ evecs.T
    psi = 0.5 * (psi + psi.T)
    return psi_u, psi, n_trunc


def pool_multivariate(Y: object, S: object) -> MultivariatePooled:
    """Multivariate random-effects meta-analysis by the method of moments.

    ``Y``: (k, p) coefficient vectors, one row per cohort; ``S``: (k, p, p) within-cohort
    covariance matrices (symmetric positive definite). Every cohort must report all p
    coefficients (same basis, same knots).

    Method (Jackson, White & Thompson 2010, Stat Med 29:1282). With W_i = S_i^-1,
    A = sum W_i and the fixed-effect mean y_FE = A^-1 sum W_i y_i, the p x p matrix
    Q_M = sum_i W_i (y_i - y_FE)(y_i - y_FE)' has expectation (k - 1) I + B Psi under the
    random-effects model y_i ~ N(mu, S_i + Psi), where B = A - sum_i W_i A^-1 W_i. Equating
    Q_M to its expectation gives Psi_U = B^-1 (Q_M - (k - 1) I); it need not be symmetric,
    so (Psi_U + Psi_U')/2 is used (still unbiased for Psi), and it is made positive
    semi-definite by setting its negative eigenvalues to zero (spectral truncation, as in the
    paper). For p = 1 this is exactly DerSimonian–Laird. The pooled mean is then the GLS
    estimate with weights (S_i + Psi)^-1. Q = trace(Q_M) is the multivariate Cochran
    statistic, chi-squared on p (k - 1) degrees of freedom under homogeneity.
    """
    ya, sa = _vectors_and_covariances(Y, S)
    k, p = ya.shape
    W = _inv_spd(sa)
    fe_mean, fe_cov = _gls_mean(ya, W)
    resid = ya - fe_mean
    q_mat = np.einsum("ipq,iq,ir->pr", W, resid, resid)
    df = p * (k - 1)
    if k >= 2:
        q = float(np.trace(q_mat))
        psi_u, psi, n_trunc = _between_cohort_covariance(W, fe_cov, q_mat, k)
        q_pvalue = float(stats.chi2.sf(q, df))
        i2 = max(0.0, (q - df) / q) if q > 0 else 0.0
    else:  # one cohort: its residual is zero by definition
        q = 0.0
        psi_u = np.zeros((p, p))
        psi = np.zeros((p, p))
        n_trunc = 0
        q_pvalue = float("nan")
        i2 = float("nan")

    re_mean, re_cov = _gls_mean(ya, _inv_spd(sa + psi))
    return MultivariatePooled(
        k=k,
        p=p,
        fe_mean=_frozen(fe_mean),
        fe_cov=_frozen(fe_cov),
        re_mean=_frozen(re_mean),
        re_cov=_frozen(re_cov),
        psi=_frozen(psi),
        psi_unconstrained=_frozen(psi_u),
        n_truncated=n_trunc,
        q=q,
        q_df=df,
        q_pvalue=q_pvalue,
        i2=float(i2),
    )


def pooled_curve(
    beta: object, cov: object, basis_grid: object, basis_ref: object
) -> tuple[np.ndarray, np.ndarray]:
    """The curve f(x) - f(x_ref) on a grid, with delta-method standard errors.

    ``beta`` (p,) and ``cov`` (p, p): pooled coefficients and their covariance.
    ``basis_grid`` (g, p): the basis evaluated at the grid; ``basis_ref`` (p,): at x_ref.
    With d(x) = B(x) - B(x_ref): estimate d(x)' beta, variance d(x)' V d(x). Returns
    (estimate, se), each of shape (g,).
    """
    b = _as_float("coefficients beta", beta, 1)
    p = b.size
    V = _as_float("covariance cov", cov, 2)
    G = _as_float("basis_grid", basis_grid, 2)
    r = np.asarray(basis_ref, dtype=float).reshape(-1)
    if V.shape != (p, p):
        raise PoolingInputError(f"covariance cov must be {p} x {p} to match beta, got {V.shape}")
    if G.shape[1] != p:
        raise PoolingInputError(
            f"basis_grid must have {p} columns (one per coefficient), got shape {G.shape}"
        )
    if r.size != p:
        raise PoolingInputError(f"basis_ref must hold {p} values, got {r.size}")
    for name, arr in (("beta", b), ("cov", V), ("basis_grid", G), ("basis_ref", r)):
        if not np.isfinite(arr).all():
            raise PoolingInputError(f"{name} has non-finite entries")
    scale = float(np.max(np.abs(V))) if V.size else 0.0
    if np.max(np.abs(V - V.T), initial=0.0) > 1e-8 * max(scale, np.finfo(float).tiny):
        raise PoolingInputError("covariance cov is not symmetric")

    D = G - r
    est = D @ b
    var = np.einsum("gp,pq,gq->g", D, V, D)
    # Rounding can leave tiny negatives where the true variance is ~0 (at x_ref itself);
    # anything beyond rounding means cov is not positive semi-definite.
    tol = 1e-10 * np.einsum("gp,pq,gq->g", np.abs(D), np.abs(V), np.abs(D))
    if (var < -tol).any():
        j = int(np.argmax(var < -tol))
        raise PoolingInputError(
            f"negative variance {var[j]:.3g} at grid point {j}: cov is not positive "
            "semi-definite"
        )
    return est, np.sqrt(np.maximum(var, 0.0))
