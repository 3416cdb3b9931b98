"""Refits on many frequency-weight vectors at once (the bootstrap replicates of the residual
confounding and cut-point questions): case-resampling weights, the linear, logistic and Poisson
models by a vectorised Newton solver (``WeightedGLM``), and Cox models through the engine with
one prepared layout."""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import special

from ._glm import gram, standardise
from .base import Outcome

if TYPE_CHECKING:
    from .cox import Layout

_CHUNK_CELLS = 4_000_000
_MAX_NEWTON = 30
_TOL = 1e-9


def resample_weights(rng: np.random.Generator, n: int, replicates: int) -> np.ndarray:
    """Case-resampling frequency weights: row b counts how often each of the n rows was drawn
    (n draws with replacement), shape (replicates, n)."""
    idx = rng.integers(0, n, size=(replicates, n))
    flat = (np.arange(replicates)[:, None] * n + idx).ravel()
    return np.bincount(flat, minlength=replicates * n).reshape(replicates, n).astype(float)


class WeightedGLM:
    """One design of the linear, logistic or Poisson model, prepared once (standardised, with
    its starting point and pairwise column products) for refits on many weight vectors."""

    def __init__(self, family: str, X: np.ndarray, outcome: Outcome,
                 start: np.ndarray | None = None):
        X = np.asarray(X, dtype=float).reshape(outcome.n, -1)
        n, p = X.shape
        self.family, self.n, self.p = family, n, p
        self.Z, self.mean, self.sd = standardise(X)  # the solver's own [1, (X - mean) / sd]
        theta0 = np.zeros(p + 1)
        if start is not None and np.all(np.isfinite(start)):
            theta0 = np.concatenate([[start[0] + float(start[1:] @ self.mean)],
                                     start[1:] * self.sd])
        elif family == "binary":
            ybar = float(np.clip(outcome.y.mean(), 1e-6, 1 - 1e-6))
            theta0[0] = np.log(ybar / (1 - ybar))
        elif family == "count":
            t = np.exp(outcome.offset) if outcome.offset is not None else np.ones(n)
            theta0[0] = np.log(max(float(outcome.y.sum()), 1e-6) / float(t.sum()))
        self.theta0 = theta0
        self.y = np.asarray(outcome.y, dtype=float)
        self.off = outcome.offset if outcome.offset is not None else 0.0
        self.pairs = _Pairs(self.Z)

    def coef(self, W: np.ndarray) -> np.ndarray:
        """Coefficients (intercept first) for each row of frequency weights ``W`` (B, n)."""
        W = np.atleast_2d(np.asarray(W, dtype=float))
        out = np.full((W.shape[0], self.p + 1), np.nan)
        chunk = max(1, _CHUNK_CELLS // (self.n * (self.p + 1)))
        for c0 in range(0, W.shape[0], chunk):
            out[c0:c0 + chunk] = _newton(self.family, self.Z, self.y, self.off,
                                         W[c0:c0 + chunk], self.theta0, self.pairs)
        coef = out.copy()
        coef[:, 1:] = out[:, 1:] / self.sd
        coef[:, 0] = out[:, 0] - coef[:, 1:] @ self.mean
        return coef


def weighted_glm(family: str, X: np.ndarray, outcome: Outcome, W: np.ndarray,
                 start: np.ndarray | None = None) -> np.ndarray:
    """Maximum-likelihood coefficients (intercept first, then X's columns) of the linear,
    logistic or Poisson (log person-time offset) model for each row of frequency weights ``W``
    (shape (B, n)), by Newton's method vectorised over the B weight vectors. ``start`` (the
    full-sample estimate, intercept first) is where Newton starts. Failed rows are NaN."""
    return WeightedGLM(family, X, outcome, start).coef(W)


def _newton(family: str, Z: np.ndarray, y: np.ndarray, off: Any, W: np.ndarray,
            theta0: np.ndarray, pairs: _Pairs) -> np.ndarray:
    C = W.shape[0]
    # a column without variation among the drawn rows is not estimable in that replicate
    # (its weighted moments come from Z' diag(w) Z, the information of the linear model)
    H0 = _information(Z, W, pairs)
    N = H0[:, :1, 0]
    m1 = H0[:, 0, 1:] / N
    m2 = np.diagonal(H0, axis1=1, axis2=2)[:, 1:] / N
    bad = np.any(m2 - m1 ** 2 <= 1e-10, axis=1)
    T = np.tile(theta0, (C, 1))
    done = np.zeros(C, dtype=bool)
    H: np.ndarray | None = None
    for _ in range(_MAX_NEWTON if family != "continuous" else 1):
        eta = T @ Z.T + off
        if family == "binary":
            mu = special.expit(eta)
            v = mu * (1 - mu)
        elif family == "count":
            mu = np.exp(np.clip(eta, None, 700))
            v = mu
        else:
            mu = eta
            v = np.ones_like(eta)
        score = (W * (y - mu)) @ Z
        if family == "continuous":
            H = H0
        elif H is None or pairs.cached is not None:
            H = _information(Z, W * v, pairs)
        # Large samples (no cached products): the information of the first step is kept for
        # the later ones (the chord method). The score is exact, so the fixed point is the same
        # maximum; the error shrinks each step by about the relative change of the information
        # over one bootstrap-sized move (~1/sqrt(n)), as fast as Newton's here, for one blocked
        # product less per step.
        step = _solve(H, score)
        step[done | bad] = 0.0
        T = T + np.nan_to_num(step, nan=0.0)
        bad |= ~np.all(np.isfinite(step), axis=1)
        done |= np.max(np.abs(step), axis=1) <= _TOL * (1 + np.max(np.abs(T), axis=1))
        if np.all(done | bad):
            break
    if family == "continuous":
        done[:] = True
    if family == "binary":
        eta = T @ Z.T + off
        bad |= np.any((np.abs(eta) > 20) & (W > 0), axis=1)
    T[bad | ~done] = np.nan
    return T


class _Pairs:
    """Products of every pair of design columns, z_i z_j (i <= j), so that the information
    matrices of all replicates come from one matrix product: H[c] = sum_n wv[c, n] z_n z_n'.
    Formed only when small (``cached`` is None otherwise: ``_information`` then takes one
    blocked product per replicate)."""

    def __init__(self, Z: np.ndarray):
        self.iu = np.triu_indices(Z.shape[1])
        k = len(self.iu[0])
        self.cached = (np.asarray(Z[:, self.iu[0]] * Z[:, self.iu[1]])
                       if Z.shape[0] * k <= _CHUNK_CELLS else None)


def _information(Z: np.ndarray, wv: np.ndarray, pairs: _Pairs) -> np.ndarray:
    if pairs.cached is None:
        # Large samples come a few replicates at a time: one blocked Z' diag(w) Z product per
        # replicate beats forming the pairwise products again in every iteration.
        return np.stack([gram(Z, w) for w in wv])
    p = Z.shape[1]
    flat = np.asarray(wv @ pairs.cached)
    H = np.empty((wv.shape[0], p, p))
    i, j = pairs.iu
    H[:, i, j] = flat
    H[:, j, i] = flat
    return H


def _solve(H: np.ndarray, g: np.ndarray) -> np.ndarray:
    try:
        return np.asarray(np.linalg.solve(H, g[..., None])[..., 0])
    except np.linalg.LinAlgError:
        out = np.full(g.shape, np.nan)
        for i in range(len(g)):
            try:
                out[i] = np.linalg.solve(H[i], g[i])
            except np.linalg.LinAlgError:
                pass
        return out


OnCoxFit = Callable[[int, int, np.ndarray, np.ndarray, Any, np.ndarray], None]


def weighted_cox(X: np.ndarray, outcome: Outcome, W: np.ndarray,
                 start: np.ndarray | None = None) -> np.ndarray:
    """Cox coefficients for each row of frequency weights ``W``, fitted by ``unbin.models.cox.fit_cox``
    (Efron ties) started at ``start`` on the rows repeated as often as drawn — not on case
    weights, because Efron's tie correction counts a repeated row as several tied events but a
    weighted row as one; NaN where a fit fails. One design of :func:`weighted_cox_designs`."""
    return weighted_cox_designs([(X, start)], outcome, W)[0]


CoxSample = tuple[np.ndarray, np.ndarray, np.ndarray | None, np.ndarray | None]


def resampled_cox_samples(outcome: Outcome, W: np.ndarray
                          ) -> Iterator[tuple[int, np.ndarray, CoxSample, Layout]]:
    """Per frequency-weight row ``b`` of ``W``: the repeated row indices ``m``, the survival
    arrays (time, event, entry, strata) of those rows and their prepared Cox layout; a replicate
    whose layout cannot be prepared is skipped."""
    from .cox import prepare_layout

    assert outcome.time is not None
    for b, w in enumerate(W):
        m = np.repeat(np.arange(len(w)), np.asarray(w).astype(np.int64))
        time, event = outcome.time[m], outcome.y[m]
        entry = outcome.entry[m] if outcome.entry is not None else None
        strata = outcome.strata[m] if outcome.strata is not None else None
        try:
            layout = prepare_layout(time, event, entry=entry, strata=strata)
        except ValueError:
            continue
        yield b, m, (time, event, entry, strata), layout


def weighted_cox_designs(designs: Sequence[tuple[np.ndarray, np.ndarray | None]],
                         outcome: Outcome, W: np.ndarray,
                         on_fit: OnCoxFit | None = None) -> list[np.ndarray]:
    """:func:`weighted_cox` for several designs ``(X, start)`` of the same rows at once: the
    designs share the replicates, so each replicate's repeated rows and their Cox layout (the
    sort and the risk sets, ``unbin.models.cox.prepare_layout``) are made once and every design is
    fitted on them. A design with a start is refitted by chord steps from it
    (``unbin.models.cox.refit_near``), falling back to ``fit_cox`` when those do not settle.
    ``on_fit(b, j, Xm, m, layout, coef)`` is called after each successful fit of design ``j``
    in replicate ``b`` (``m`` the repeated row indices, ``Xm`` their design rows)."""
    from .cox import fit_cox, refit_near

    assert outcome.time is not None
    Xs = [np.asarray(X, dtype=float).reshape(outcome.n, -1) for X, _ in designs]
    inits = [start if start is not None and np.all(np.isfinite(start)) else None
             for _, start in designs]
    W = np.atleast_2d(W)
    outs = [np.full((W.shape[0], X.shape[1]), np.nan) for X in Xs]
    for b, m, (time, event, entry, strata), layout in resampled_cox_samples(outcome, W):
        for j, (X, init, out) in enumerate(zip(Xs, inits, outs, strict=True)):
            Xm = X[m]
            coef = refit_near(Xm, layout, init) if init is not None else None
            if coef is None:
                try:  # far from the start, or not settling: the full fit decides
                    fitted = fit_cox(Xm, time, event, entry=entry, strata=strata, init=init,
                                layout=layout)
                except ValueError:
                    continue
                if not fitted.converged:
                    continue
                coef = fitted.coef
            out[b] = coef
            if on_fit is not None:
                on_fit(b, j, Xm, m, layout, coef)
    return outs
