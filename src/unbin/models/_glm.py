"""The linear, logistic and Poisson models: one Newton solver on numpy arrays.

How it works
------------
Columns are centred and scaled before fitting (better conditioning) and the estimates are
mapped back exactly: theta = A theta_s, cov = A cov_s A'. The three families have canonical
links, so Newton's method and iteratively reweighted least squares are the same iteration and
the observed information equals the expected one: with eta = Z theta + offset, mu the mean
and v the variance function (mu(1 - mu), mu, 1),

    score = Z' f (y - mu),   information H = Z' diag(f v) Z,   step = H^-1 score

(f: frequency weights, 1 without). The logistic model starts with the weighted least-squares
step from the customary means mu = (y + 1/2)/2; the Poisson model from its intercept-only
estimate with the offset (closed form). Each step is solved by a Cholesky factorisation of the p x p
information; the score is recomputed from the residuals at every iterate, so the iteration also
refines away the rounding of the factorisation (the linear model takes one least-squares step
and two such refinement steps). A step that lowers the log-likelihood is halved (up to 30
times).

Convergence: the log-likelihood changes by at most 1e-12 of its size between iterates (with an
absolute floor of 1e-10), or the next step would change no standardised coefficient by more
than 1e-10 — that step is then taken without evaluating its end point (its log-likelihood is
the quadratic prediction), as the Cox engine does.
The covariance is the inverse information at the final iterate (times the residual variance
``RSS / (N - p)`` for the linear model). ``H`` is built in blocks of rows, so a fit holds only
a few vectors of n values besides the design; nothing of size n x p^2 is formed.

Failures are returned, never raised: a collinear design is named column by column before any
fitting (``check_design``), a singular information, non-finite estimates, separation (through
the family's ``separation_check``) and the iteration limit each get a message.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import linalg, special

from . import compiled
from .base import FitResult, Outcome, failed_fit

INTERCEPT = "(intercept)"
MAX_ITER = 100
_REL_TOL = 1e-12
_ABS_TOL = 1e-10
_STEP_TOL = 1e-10
_BLOCK_ROWS = 1 << 15
_PASS_ROWS = 1 << 13  # rows per block of one likelihood pass (a few hundred kB)
# An information (Gram) matrix this well conditioned has full rank beyond doubt; below it, the
# singular values of the design itself decide (numpy's matrix_rank), which also names the tied
# columns. (The Gram's eigenvalues are the squared singular values, accurate to about
# eps * largest, so 1e-10 leaves a wide margin.)
_GRAM_RCOND = 1e-10
# From these many rows the per-row work of a likelihood pass (``compiled.glm_rows``) and the
# standardised copy (``compiled.glm_standardise``) run compiled: the same values, one pass
# instead of about ten (a pass) or two short-row loops (the copy); below it numpy, so small
# fits (the demo, most tests) never import numba (DEVELOPERS.md, "Compiled kernels")
ROWS_FROM_ROWS = 100_000
STANDARDISE_FROM_ROWS = 100_000


def standardise(X: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``[1, (X - mean) / sd]`` written straight into one array (no (n, p) temporaries). The
    scale comes from the raw second moments (one pass): it only conditions the problem, and
    the estimates are mapped back with the very values used."""
    Z, mean, sd, _ = _standardised(X, False)
    return Z, mean, sd


def standardise_with_gram(X: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray,
                                                   np.ndarray]:
    """``standardise(X)`` and the cross-product matrix ``Z'Z`` of its result, accumulated
    block by block while each block of ``Z`` is still in cache (a separate ``gram(Z)`` reads
    the whole of ``Z`` again: at a million rows that pass cost more than the copy itself)."""
    Z, mean, sd, G = _standardised(X, True)
    assert G is not None
    return Z, mean, sd, G


def standardised_gram(X: np.ndarray) -> np.ndarray:
    """The cross-product matrix ``Z'Z`` of ``standardise(X)``'s ``Z`` without keeping ``Z``:
    each block of rows is standardised into one work block and its products accumulated, the
    same blocks and operations as ``standardise_with_gram``, hence the same matrix (the rank
    check of a design whose fit standardises it its own way needs only this; the copy of n
    rows, a fresh allocation of ~100 MB at a million rows x 12 columns, is not made)."""
    G = _standardised(X, True, keep=False)[3]
    assert G is not None
    return G


def _standardised(X: np.ndarray, with_gram: bool, keep: bool = True,
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    """``keep=False``: only the Gram is wanted; the blocks of Z go through one work block and
    the returned Z is that block (not the standardised design)."""
    n, p = X.shape
    Z = np.empty((n if keep else min(n, _BLOCK_ROWS), p + 1))
    G = np.zeros((p + 1, p + 1)) if with_gram else None
    if p == 0 or n == 0:
        Z[:, 0] = 1.0
        if G is not None:
            G[0, 0] = float(n)
        return Z, np.zeros(p), np.ones(p), G
    mean = (np.ones(n) @ X) / n
    var = np.einsum("ij,ij->j", X, X) / n - mean * mean
    # a column whose variance is lost in the rounding of its mean is constant: left unscaled
    sd = np.where(var > 1e-13 * np.maximum(mean * mean, 1e-300), np.sqrt(np.abs(var)), 1.0)
    inv = 1.0 / sd
    rows: Any = None  # the compiled loop, from STANDARDISE_FROM_ROWS rows
    if compiled.wanted(n, STANDARDISE_FROM_ROWS):
        from .compiled.glm_standardise import standardised_rows as rows
    # in blocks of rows: the scaling (and the Gram) finds each block still in cache; every
    # element gets the same two operations as on the whole array at once, and the Gram the
    # same products of the same blocks as ``gram(Z)``, so the same numbers
    for r0 in range(0, n, _BLOCK_ROWS):
        Zb = Z[r0:r0 + _BLOCK_ROWS] if keep else Z[:min(_BLOCK_ROWS, n - r0)]
        if rows is not None:  # the same values from one compiled pass
            rows(X, r0, mean, inv, Zb)
        else:
            Zb[:, 0] = 1.0
            Zs = Zb[:, 1:]
            np.subtract(X[r0:r0 + _BLOCK_ROWS], mean, out=Zs)
            Zs *= inv
        if G is not None:
            G += Zb.T @ Zb
    return Z, mean, sd, G


def back_transform(theta_s: np.ndarray, cov_s: np.ndarray, mean: np.ndarray,
                   sd: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    p = len(mean)
    A = np.zeros((p + 1, p + 1))
    A[0, 0] = 1.0
    A[0, 1:] = -mean / sd
    A[1:, 1:] = np.diag(1.0 / sd)
    return A @ theta_s, A @ cov_s @ A.T


def gram(Z: np.ndarray, v: np.ndarray | None = None) -> np.ndarray:
    """``Z' diag(v) Z`` (``Z' Z`` without ``v``), accumulated over blocks of rows (from
    ``ROWS_FROM_ROWS`` rows each block's ``Zb * v[:, None]`` is a compiled loop: the same
    products)."""
    n, k = Z.shape
    G = np.zeros((k, k))
    scaled: Any = None  # the compiled loop, from ROWS_FROM_ROWS rows
    if v is not None and compiled.wanted(n, ROWS_FROM_ROWS):
        from .compiled.scaled_rows import scaled_rows as scaled

        work = np.empty((min(n, _BLOCK_ROWS), k))
        v = np.ascontiguousarray(v, dtype=float)
    for r0 in range(0, n, _BLOCK_ROWS):
        Zb = Z[r0:r0 + _BLOCK_ROWS]
        if v is None:
            G += Zb.T @ Zb
        elif scaled is not None:
            Zv = work[:Zb.shape[0]]
            scaled(Zb, v[r0:r0 + _BLOCK_ROWS], Zv)
            G += Zv.T @ Zb
        else:
            G += (Zb * v[r0:r0 + _BLOCK_ROWS, None]).T @ Zb
    return G


def check_design(X: np.ndarray, names: tuple[str, ...], Z: np.ndarray | None = None,
                 G: np.ndarray | None = None) -> str:
    """A message naming the collinear columns, or '' when the design has full rank.
    ``Z`` is ``standardise(X)[0]`` when the caller has it already, ``G`` its ``gram(Z)``."""
    if X.shape[1] == 0:
        return ""
    if G is None:
        # without Z the Gram comes block by block (the same matrix, no copy of the rows):
        # Z itself is needed only below, for a design that is not clearly of full rank
        G = gram(Z) if Z is not None else standardised_gram(X)
    eig = np.linalg.eigvalsh(G / max(X.shape[0], 1))
    if eig[0] > _GRAM_RCOND * eig[-1]:
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


@dataclass
class _Solution:
    theta: np.ndarray  # standardised scale, intercept first
    cov: np.ndarray
    loglik: float
    iterations: int
    message: str  # '' when converged


class _Family:
    """One pass over the rows, in blocks that stay in cache: the log-likelihood, score and
    information at one linear predictor, for the logistic or the Poisson model."""

    def __init__(self, family: str, Z: np.ndarray, y: np.ndarray, off: np.ndarray | None,
                 freq: np.ndarray | None, const: float | None = None,
                 cols: np.ndarray | None = None):
        """``cols``: the evaluations use only these columns of ``Z``, gathered one block of
        rows at a time (the same blocks, hence the same numbers, as on ``Z[:, cols]``)."""
        self.binary = family == "binary"
        self.Z, self.y, self.off, self.freq, self.cols = Z, y, off, freq, cols
        self.const = 0.0
        if not self.binary:  # the log(y!) term of the Poisson log-likelihood
            self.const = poisson_constant(y, freq) if const is None else const

    def evaluate(self, theta: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        Z, y, off, freq, cols = self.Z, self.y, self.off, self.freq, self.cols
        n, k = Z.shape[0], Z.shape[1] if cols is None else cols.size
        ll, score, H = self.const, np.zeros(k), np.zeros((k, k))
        rows: Any = None  # the compiled loop, from ROWS_FROM_ROWS rows
        if compiled.wanted(n, ROWS_FROM_ROWS):
            from .compiled.glm_rows import glm_rows as rows

            m = min(n, _PASS_ROWS)
            terms_w, resid_w, Zv_w = np.empty(m), np.empty(m), np.empty((m, k))
            no_freq = np.zeros(0)
        for r0 in range(0, n, _PASS_ROWS):
            r1 = min(n, r0 + _PASS_ROWS)
            Zb, yb = Z[r0:r1], y[r0:r1]
            if cols is not None:
                Zb = np.take(Zb, cols, axis=1)
            eta = Zb @ theta
            if off is not None:
                eta += off[r0:r1]
            if rows is not None:  # the same values as below from one compiled pass
                if self.binary:
                    e = np.exp(-np.abs(eta))
                    lg = np.log1p(e)
                else:
                    e = np.exp(np.minimum(eta, 700.0))
                    lg = e[:0]
                nb = r1 - r0
                terms, resid, Zv = terms_w[:nb], resid_w[:nb], Zv_w[:nb]
                rows(eta, e, lg, yb, no_freq if freq is None else freq[r0:r1],
                     np.ascontiguousarray(Zb), self.binary, terms, resid, Zv)
                ll += float(terms.sum())
                score += Zb.T @ resid
                H += Zv.T @ Zb
                continue
            if self.binary:
                # one exp and one log1p give the mean, the variance and log(1 + e^eta) stably
                e = np.exp(-np.abs(eta))
                inv = 1.0 / (1.0 + e)
                mu = np.where(eta >= 0, inv, e * inv)
                v = e * inv * inv  # mu (1 - mu), without cancellation
                terms = yb * eta - (np.maximum(eta, 0.0) + np.log1p(e))
            else:
                mu = np.exp(np.minimum(eta, 700.0))
                v = mu
                terms = yb * eta - mu
            resid = yb - mu
            if freq is not None:
                freq_b = freq[r0:r1]
                terms, resid, v = freq_b * terms, freq_b * resid, freq_b * v
            ll += float(terms.sum())
            score += Zb.T @ resid
            H += (Zb * v[:, None]).T @ Zb
        return ll, score, H

    def start(self) -> np.ndarray:
        """Starting coefficients. Logistic: the weighted least-squares step from the customary
        starting means, mu = (y + 1/2) / 2. Poisson: the intercept-only estimate with the
        offset, log(sum y / sum e^offset), other coefficients 0 (the customary start ignores
        the offset and, with person-time offsets, costs several more steps).

        (Every row's starting weight mu (1 - mu) is 3/16 for a 0/1 outcome, so the start's
        information is 3/16 Z'Z; taking it from the standardised copy's Gram saves a pass but
        is the same matrix only to rounding, and on the demo's logistic fits that moved the
        stopping point: curves by up to 2e-6. It stays the weighted Gram of the rows.)"""
        Z, y, freq = self.Z, self.y, self.freq
        assert self.cols is None, "the start is made on whole designs"
        if not self.binary:
            theta = np.zeros(Z.shape[1])
            t = np.ones_like(y) if self.off is None else np.exp(self.off)
            total_y = float(y.sum() if freq is None else freq @ y)
            total_t = float(t.sum() if freq is None else freq @ t)
            theta[0] = np.log(max(total_y, 1e-10) / total_t)
            return theta
        mu = (y + 0.5) / 2.0
        eta0 = np.log(mu / (1.0 - mu))
        v = mu * (1.0 - mu)
        freq_v = v if freq is None else freq * v
        factor = _cholesky(gram(Z, freq_v))
        if factor is None:
            return np.full(Z.shape[1], np.nan)
        resid = y - mu if freq is None else freq * (y - mu)
        return linalg.cho_solve(factor, Z.T @ (freq_v * eta0 + resid))


def gathered_range(Z: np.ndarray, cols: np.ndarray, coef: np.ndarray) -> tuple[float, float]:
    """The smallest and largest value of ``Z[:, cols] @ coef``, one block of rows at a time
    (no copy of the columns)."""
    lo, hi = np.inf, -np.inf
    for r0 in range(0, Z.shape[0], _PASS_ROWS):
        values = np.take(Z[r0:r0 + _PASS_ROWS], cols, axis=1) @ coef
        lo, hi = min(lo, float(values.min())), max(hi, float(values.max()))
    return lo, hi


def poisson_constant(y: np.ndarray, freq: np.ndarray | None = None) -> float:
    """The -sum log(y!) term of the Poisson log-likelihood (it does not depend on the fit)."""
    lg = special.gammaln(y + 1.0)
    return -float(lg.sum() if freq is None else freq @ lg)


def _cholesky(H: np.ndarray) -> tuple[np.ndarray, bool] | None:
    try:
        return linalg.cho_factor(H, check_finite=True)
    except (linalg.LinAlgError, ValueError):
        return None


def _newton(family: str, Z: np.ndarray, y: np.ndarray, off: np.ndarray | None,
            freq: np.ndarray | None, const: float | None = None) -> _Solution:
    """Maximum likelihood of the logistic or Poisson model on the standardised design."""
    model = _Family(family, Z, y, off, freq, const)
    k = Z.shape[1]
    nan = _Solution(np.full(k, np.nan), np.full((k, k), np.nan), float("nan"), 0, "")
    theta = model.start()
    if not np.all(np.isfinite(theta)):
        nan.message = "the information matrix is singular at the start; check the design."
        return nan
    ll_prev, step = -np.inf, np.zeros(k)
    for it in range(1, MAX_ITER + 1):
        ll, score, H = model.evaluate(theta)
        halvings = 0
        while not (np.isfinite(ll) and ll >= ll_prev - _ABS_TOL) and halvings < 30:
            step /= 2.0
            theta = theta - step
            ll, score, H = model.evaluate(theta)
            halvings += 1
        if not np.isfinite(ll):
            nan.message = "the log-likelihood is not finite; check for extreme values."
            nan.iterations = it
            return nan
        factor = _cholesky(H)
        if factor is None:
            nan.message = ("the information matrix became singular; check for separation or "
                           "an empty group.")
            nan.iterations = it
            return nan
        step = linalg.cho_solve(factor, score)
        small_step = float(np.max(np.abs(step))) <= _STEP_TOL
        if small_step:
            # the last step is taken without evaluating its end point: its log-likelihood is
            # the quadratic prediction and the information that of the current point (both off
            # by far less than the tolerance for a step this small)
            theta = theta + step
            ll += float(score @ step) / 2.0
        if abs(ll - ll_prev) <= _REL_TOL * abs(ll) + _ABS_TOL or small_step or halvings == 30:
            cov = linalg.cho_solve(factor, np.eye(k))
            msg = "" if halvings < 30 else (
                "step halving could not improve the log-likelihood; the model may be "
                "overparameterised or a covariate may have extreme values.")
            return _Solution(theta, cov, ll, it, msg)
        ll_prev = ll
        theta = theta + step
    return _Solution(theta, np.full((k, k), np.nan), ll, MAX_ITER,
                     f"no convergence within {MAX_ITER} iterations; check for separation or "
                     "sparse groups.")


def _least_squares(Z: np.ndarray, y: np.ndarray, freq: np.ndarray | None,
                   G: np.ndarray | None = None) -> _Solution:
    """The linear model by maximum likelihood (residual variance RSS / N), with the usual
    unbiased ``RSS / (N - p)`` in the covariance; frequency weights count as repeated rows.
    ``G``: ``gram(Z)`` if the caller has it (the cross-product matrix without weights)."""
    k = Z.shape[1]
    factor = _cholesky(G if G is not None and freq is None else gram(Z, freq))
    if factor is None:
        return _Solution(np.full(k, np.nan), np.full((k, k), np.nan), float("nan"), 0,
                         "the design's cross-product matrix is singular; check the design.")
    theta = np.zeros(k)
    resid = y.copy()
    for _ in range(3):  # the least-squares step, then two refinements
        theta = theta + linalg.cho_solve(factor, Z.T @ (resid if freq is None else freq * resid))
        resid = y - Z @ theta
    N = float(y.size if freq is None else freq.sum())
    rss = float(resid @ resid if freq is None else freq @ (resid * resid))
    loglik = -N / 2.0 * (np.log(2.0 * np.pi * rss / N) + 1.0) if rss > 0 else float("inf")
    cov = linalg.cho_solve(factor, np.eye(k)) * (rss / max(N - k, 1.0))
    return _Solution(theta, cov, float(loglik), 3, "")


def run_glm(family: str, X: np.ndarray, names: tuple[str, ...], outcome: Outcome,
            events: int | None, n_extra_params: int = 0,
            separation_check: Callable[[np.ndarray], str] | None = None) -> FitResult:
    """Fit one linear, logistic or Poisson model and record failures as a failed FitResult."""
    all_names = (INTERCEPT, *names)
    n = outcome.n
    # once: the rank check and the fit share the standardised design and its Gram (least
    # squares' cross-product matrix too)
    Z, mean, sd, G = standardise_with_gram(X)
    problem = check_design(X, names, Z, G)
    if problem:
        return failed_fit(family, all_names, n, events, problem)
    y = np.asarray(outcome.y, dtype=float)
    freq = None if outcome.weights is None else np.asarray(outcome.weights, dtype=float)
    if family == "continuous":
        sol = _least_squares(Z, y, freq, G)
    else:
        const = None
        if family == "count":  # the same for every fit of this outcome
            const = outcome.cache.get("poisson_constant")
            if const is None:
                const = outcome.cache["poisson_constant"] = poisson_constant(y, freq)
        sol = _newton(family, Z, y, outcome.offset, freq, const)
    lp: np.ndarray | None = None
    if separation_check is not None and np.all(np.isfinite(sol.theta)):
        # the check reads the linear predictor the result keeps, plus the intercept (Z theta_s
        # to rounding): one product with the rows instead of two
        coef = back_transform(sol.theta, sol.cov, mean, sd)[0]
        lp = X @ coef[1:]
        sep = separation_check(lp + coef[0])
        if sep:
            return failed_fit(family, all_names, n, events, sep)
    if sol.message:
        return failed_fit(family, all_names, n, events, sol.message)
    if not (np.all(np.isfinite(sol.theta)) and np.all(np.isfinite(sol.cov))
            and np.isfinite(sol.loglik)):
        return failed_fit(family, all_names, n, events,
                          "fit gave non-finite estimates; check for separation or an empty group.")
    theta, cov = back_transform(sol.theta, sol.cov, mean, sd)
    return FitResult(
        family=family, names=all_names, coef=theta, cov=cov, loglik=sol.loglik, n=n,
        events=events, n_params=len(all_names) + n_extra_params, converged=True,
        iterations=sol.iterations, linear_predictor=X @ theta[1:] if lp is None else lp,
        extra={"intercept": float(theta[0])},
    )
