"""Per-study dose–response from a published table by generalised least squares.

With y the J log ratios of the non-reference groups, C their covariance (see
:mod:`unbin.published.covariance`) and X the basis at the groups' assigned exposures minus
the basis at the reference group's assigned exposure (no intercept: the curve is 0 at the
reference), the estimate is b = (X' C^-1 X)^-1 X' C^-1 y with covariance (X' C^-1 X)^-1
(Greenland & Longnecker 1992; Orsini et al. 2012, Am J Epidemiol 175:66, for the restricted
cubic spline on fixed knots). Goodness of fit: Q = (y - Xb)' C^-1 (y - Xb) on J - p degrees of
freedom. Nonlinearity: the Wald test that the spline's nonlinear coefficients are all zero,
chi-squared on k - 2 degrees of freedom.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..distributions import stats
from ..terms import SplineTerm


@dataclass(frozen=True)
class TrendFit:
    form: str  # linear | spline
    coef: np.ndarray
    cov: np.ndarray
    q: float
    q_df: int
    q_p: float
    nonlinear_chi2: float
    nonlinear_df: int
    nonlinear_p: float
    knots: tuple[float, ...]

    def basis(self, x: np.ndarray) -> np.ndarray:
        return trend_basis(self.form, self.knots, x)


def trend_basis(form: str, knots: tuple[float, ...], x: np.ndarray) -> np.ndarray:
    """The exposure basis: x alone (linear) or the restricted cubic spline on ``knots``
    (the same basis the data cohorts' common-knot spline uses)."""
    xa = np.asarray(x, dtype=float)
    if form == "linear":
        return xa.reshape(-1, 1)
    return SplineTerm("exposure", tuple(knots)).basis(xa)


def gls(X: np.ndarray, y: np.ndarray, C: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """(b, cov(b), Q) of y = X b + e, e ~ N(0, C), through the Cholesky factor of C."""
    L = np.linalg.cholesky(C)
    Xw = np.linalg.solve(L, X)
    yw = np.linalg.solve(L, y)
    XtX = Xw.T @ Xw
    cov = np.linalg.inv(XtX)
    cov = 0.5 * (cov + cov.T)
    b = cov @ (Xw.T @ yw)
    r = yw - Xw @ b
    return b, cov, float(r @ r)


def fit_trend(form: str, exposures: np.ndarray, log_ratios: np.ndarray, C: np.ndarray,
              knots: tuple[float, ...] = ()) -> TrendFit:
    """GLS dose–response of one study. ``exposures``: assigned exposures, reference group
    first; ``log_ratios`` and ``C``: the J non-reference groups' log ratios and covariance."""
    x = np.asarray(exposures, dtype=float)
    y = np.asarray(log_ratios, dtype=float)
    B = trend_basis(form, knots, x)
    X = B[1:] - B[0]
    p = X.shape[1]
    if y.size < p:
        raise ValueError(f"{y.size} non-reference group(s) cannot identify the {p} "
                         f"coefficients of the {form} trend; use fewer knots or the linear form")
    if np.linalg.matrix_rank(X) < p:
        raise ValueError(f"the groups' assigned exposures do not identify the {form} trend "
                         "(too few distinct values between the knots)")
    b, cov, q = gls(X, y, np.asarray(C, dtype=float))
    df = y.size - p
    q_p = float(stats.chi2.sf(q, df)) if df > 0 else float("nan")
    nl_chi2, nl_df, nl_p = float("nan"), 0, float("nan")
    if form == "spline" and p > 1:
        bn = b[1:]
        Vn = cov[1:, 1:]
        nl_chi2 = float(bn @ np.linalg.solve(Vn, bn))
        nl_df = p - 1
        nl_p = float(stats.chi2.sf(nl_chi2, nl_df))
    return TrendFit(form, b, cov, q, df, q_p, nl_chi2, nl_df, nl_p, tuple(knots))


def trend_curve(fit: TrendFit, grid: np.ndarray, reference: float
                ) -> tuple[np.ndarray, np.ndarray]:
    """The fitted log ratio f(x) - f(reference) on ``grid`` with delta-method SEs."""
    D = fit.basis(np.asarray(grid, dtype=float)) - fit.basis(np.array([reference]))[0]
    est = D @ fit.coef
    var = np.einsum("gp,pq,gq->g", D, fit.cov, D)
    return est, np.sqrt(np.maximum(var, 0.0))
