"""Shared machinery of the families fitted by statsmodels on numpy arrays (no formulas).

Columns are centred and scaled before fitting (better conditioning) and the estimates are
mapped back exactly: theta = A theta_s, cov = A cov_s A'.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from typing import Any

import numpy as np

from .base import FitResult, failed_fit

INTERCEPT = "(intercept)"


def standardise(X: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``[1, (X - mean) / sd]`` written straight into one array (no (n, p) temporaries)."""
    n, p = X.shape
    Z = np.empty((n, p + 1))
    Z[:, 0] = 1.0
    if p == 0:
        return Z, np.zeros(0), np.zeros(0)
    mean = X.mean(axis=0)
    Zs = Z[:, 1:]
    np.subtract(X, mean, out=Zs)
    sd = np.sqrt(np.einsum("ij,ij->j", Zs, Zs) / n) if n else np.zeros(p)
    sd = np.where(sd > 0, sd, 1.0)
    Zs /= sd
    return Z, mean, sd


def back_transform(theta_s: np.ndarray, cov_s: np.ndarray, mean: np.ndarray,
                   sd: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    p = len(mean)
    A = np.zeros((p + 1, p + 1))
    A[0, 0] = 1.0
    A[0, 1:] = -mean / sd
    A[1:, 1:] = np.diag(1.0 / sd)
    return A @ theta_s, A @ cov_s @ A.T


def check_design(X: np.ndarray, names: tuple[str, ...], Z: np.ndarray | None = None) -> str:
    """A message naming the collinear columns, or '' when the design has full rank.
    ``Z`` is ``standardise(X)[0]`` when the caller has it already."""
    if X.shape[1] == 0:
        return ""
    if Z is None:
        Z, _, _ = standardise(X)
    rank = np.linalg.matrix_rank(Z)
    if rank == Z.shape[1]:
        return ""
    const = [names[j] for j in range(X.shape[1]) if np.ptp(X[:, j]) == 0]
    if const:
        return (f"design columns {const} are constant in the analysis sample (an empty or "
                "all-covering group?); the model cannot estimate them.")
    # Columns that load on the null space of Z are the ones tied by a linear relation.
    null = np.linalg.svd(Z, full_matrices=False)[2][rank:]
    tied = [names[j] for j in range(X.shape[1]) if np.abs(null[:, j + 1]).max() > 1e-6]
    return (f"the design is collinear (rank {rank} < {Z.shape[1]} columns): {tied} are linearly "
            "dependent; remove an adjustment variable that duplicates another.")


def run_glm(family: str, X: np.ndarray, names: tuple[str, ...], n: int, events: int | None,
            fitter: Callable[[np.ndarray], Any], n_extra_params: int = 0,
            separation_check: Callable[[np.ndarray], str] | None = None) -> FitResult:
    """Fit with ``fitter(Z)`` (a statsmodels results object) and record warnings and failures."""
    all_names = (INTERCEPT, *names)
    Z, mean, sd = standardise(X)  # once: the rank check and the fit share it
    problem = check_design(X, names, Z)
    if problem:
        return failed_fit(family, all_names, n, events, problem)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            res = fitter(Z)
        except Exception as exc:  # statsmodels raises for singular or degenerate fits
            return failed_fit(family, all_names, n, events,
                              f"fit failed: {type(exc).__name__}: {exc}")
    msgs = tuple(dict.fromkeys(str(w.message).splitlines()[0] for w in caught))
    theta_s = np.asarray(res.params, dtype=float)
    cov_s = np.asarray(res.cov_params(), dtype=float)
    converged = bool(getattr(res, "converged", True))
    if "mle_retvals" in dir(res) and isinstance(res.mle_retvals, dict):
        converged = converged and bool(res.mle_retvals.get("converged", True))
    lp_full = Z @ theta_s
    sep = separation_check(lp_full) if separation_check else ""
    if sep:
        return failed_fit(family, all_names, n, events, sep, msgs)
    if not (np.all(np.isfinite(theta_s)) and np.all(np.isfinite(cov_s)) and np.isfinite(res.llf)):
        return failed_fit(family, all_names, n, events,
                          "fit gave non-finite estimates; check for separation or an empty group.",
                          msgs)
    if not converged:
        return failed_fit(family, all_names, n, events,
                          "no convergence within the iteration limit; check for separation or "
                          "sparse groups.", msgs)
    theta, cov = back_transform(theta_s, cov_s, mean, sd)
    return FitResult(
        family=family, names=all_names, coef=theta, cov=cov, loglik=float(res.llf), n=n,
        events=events, n_params=len(all_names) + n_extra_params, converged=True,
        iterations=int(getattr(res, "fit_history", {}).get("iteration", 0) or 0),
        warnings=msgs, linear_predictor=X @ theta[1:],
        extra={"intercept": float(theta[0])},
    )
