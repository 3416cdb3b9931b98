"""Refits on many weight vectors at once (the bootstrap replicates of the resampling questions):
the design-aware resampling draw (``design_resample_weights``), the linear, logistic and Poisson
models by a vectorised Newton solver (``WeightedGLM``), and Cox models through the engine with
one prepared layout.

The draw resamples the unit the analysis' sampling design makes independent (Davison & Hinkley
1997, sec. 3.8; Field & Welsh 2007):

* no weights, no cluster: rows, n draws with replacement (``resample_weights``);
* ``cluster``: whole clusters, G draws with replacement from the G clusters; every row of a
  cluster drawn k times is in the replicate k times (each copy a cluster of its own);
* sampling weights: the rows (or clusters) as above, each copy keeping its sampling weight, so
  a row's refit weight is its draw count x its weight (the replicate's weighted
  pseudo-likelihood, as the full sample's);
* frequency weights without a cluster: the units are the N = sum w individuals the rows stand
  for; drawing N of them with replacement gives each row a multinomial(N, w / N) count of
  individuals, which is its refit weight (the same distribution as resampling the expanded
  data, without expanding it). With a cluster, whole clusters are drawn and every copy keeps
  its frequency weight.

A replicate is then the full-sample computation applied to the drawn data set: its rows
(``replicate_rows``: indices, a row drawn k times repeated k times) with its own weight column
(the outcome's weights; with frequency weights and no cluster the counts of individuals)."""

from __future__ import annotations

import weakref
from collections.abc import Callable, Iterator, Sequence
from types import ModuleType
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import sparse, special

from . import compiled
from ._glm import gram, standardise
from .base import Outcome

if TYPE_CHECKING:
    from .cox import Layout, NearStart, ReplicateRefits

_CHUNK_CELLS = 4_000_000
_WHOLE_ROWS = 50_000
_SLOW = 0.1  # a chord step that shrank less than this from the one before: new information
_BLOCK_CELLS = 1 << 17  # replicates x rows of one block of the large-sample refits (1 MB)
_MAX_NEWTON = 30
# from this many rows the per-cell work of the large-sample refits' passes runs compiled
# (``compiled.glm_cells``; measured by ``benchmarks/glm_chord.py``)
CELLS_FROM_ROWS = 100_000
_TOL = 1e-9


def resample_counts(rng: np.random.Generator, n: int, replicates: int) -> np.ndarray:
    """Case-resampling draw counts: row b counts how often each of the n rows was drawn (n
    draws with replacement), shape (replicates, n), in the smallest unsigned integer type that
    holds them (``compact_counts``; a count is at most n, in practice a few). Drawn one
    replicate at a time: the same draws as ``rng.integers(0, n, size=(replicates, n))`` (the
    generator's stream is used in the same order), without holding the replicates x n draws
    (8 bytes each) at once."""
    out = np.empty((replicates, n), dtype=np.uint8)
    for b in range(replicates):
        drawn = np.bincount(rng.integers(0, n, size=n), minlength=n)
        out = _widened(out, drawn)
        out[b] = drawn
    return out


def _widened(out: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """``out`` in an integer type that also holds ``counts`` (non-negative whole numbers)."""
    top = int(counts.max()) if counts.size else 0
    if top <= np.iinfo(out.dtype).max:
        return out
    return out.astype(np.min_scalar_type(top))


def resample_weights(rng: np.random.Generator, n: int, replicates: int) -> np.ndarray:
    """:func:`resample_counts` as float64 refit weights (the same draws)."""
    return resample_counts(rng, n, replicates).astype(float)


class Replicates:
    """The refit weights of B bootstrap replicates (``design_resample_replicates``), kept
    compact: the draw counts (B, n) as small unsigned integers (multinomial counts: whole
    numbers, a few per row) and the rows' weights ``scale`` (n,) that multiply them (None: 1).
    A replicate's refit weight of row i is ``counts[b, i] * scale[i]``, made in float64 only for
    the rows and replicates asked for (:meth:`block`), so no B x n float64 array is formed
    (400 MB at 1,000,000 rows and 50 replicates; the counts take 50 MB). Each value made is
    the float64 product the dense weights (``dense``) hold, bit for bit."""

    def __init__(self, counts: np.ndarray, scale: np.ndarray | None = None):
        self.counts = np.atleast_2d(counts)
        self.scale = None if scale is None else np.asarray(scale, dtype=float)

    @property
    def shape(self) -> tuple[int, int]:
        return (int(self.counts.shape[0]), int(self.counts.shape[1]))

    def __len__(self) -> int:
        return int(self.counts.shape[0])

    def part(self, lo: int, hi: int) -> Replicates:
        """Replicates ``lo`` to ``hi - 1`` (a view of the counts)."""
        return Replicates(self.counts[lo:hi], self.scale)

    def block(self, which: np.ndarray | slice = slice(None),
              rows: slice = slice(None)) -> np.ndarray:
        """The float64 refit weights of replicates ``which`` on rows ``rows``."""
        out = self.counts[which, rows].astype(float)
        if self.scale is not None:
            out *= self.scale[rows]
        return out

    def dense(self) -> np.ndarray:
        """Every refit weight as float64, shape (B, n)."""
        return self.block()

    def row(self, b: int) -> np.ndarray:
        """Replicate ``b``'s refit weights as float64, shape (n,)."""
        return self.block(slice(b, b + 1))[0]

    def rows(self) -> Iterator[np.ndarray]:
        """Each replicate's refit weights in turn (:meth:`row`)."""
        for b in range(len(self)):
            yield self.row(b)


Weights = np.ndarray | Replicates  # refit weights (B, n): float64 or compact


def as_replicates(W: Weights) -> Replicates:
    """``W`` as :class:`Replicates` (float64 weights are kept as they are, as counts with no
    scale: every block is then the same float64 values)."""
    if isinstance(W, Replicates):
        return W
    return Replicates(np.atleast_2d(np.asarray(W, dtype=float)))


def _base_weights(outcome: Outcome) -> np.ndarray | None:
    return None if outcome.weights is None else np.asarray(outcome.weights, dtype=float)


def _individuals(outcome: Outcome) -> bool:
    """Frequency weights without a cluster: the resampled units are the individuals."""
    return (outcome.weights is not None and outcome.weight_kind == "frequency"
            and outcome.cluster is None)


def design_resample_counts(rng: np.random.Generator, outcome: Outcome,
                           replicates: int) -> np.ndarray:
    """How often each row is in each replicate when the analysis' independent units are drawn
    with replacement, shape (replicates, n), small unsigned integers: whole clusters when
    ``outcome.cluster`` is set (a row's count is its cluster's draw count), single rows
    otherwise (``resample_counts``, the same draws from the same generator). Weights are not
    looked at."""
    if outcome.cluster is None:
        return resample_counts(rng, outcome.n, replicates)
    _, inverse = np.unique(np.asarray(outcome.cluster), return_inverse=True)
    drawn = resample_counts(rng, int(inverse.max()) + 1, replicates)
    return np.asarray(drawn[:, inverse.ravel()])


def design_resample_replicates(rng: np.random.Generator, outcome: Outcome,
                               replicates: int) -> Replicates:
    """:func:`design_resample_weights` kept compact (:class:`Replicates`): the same draws from
    the same generator, the same float64 weights wherever they are made. With frequency
    weights and no cluster the multinomial counts of the N individuals are drawn one
    replicate at a time (numpy's generator gives the same counts as drawing all at once)."""
    w = _base_weights(outcome)
    if w is not None and _individuals(outcome):
        total = float(w.sum())
        N = max(1, int(round(total)))
        p = w / total
        counts = np.empty((replicates, outcome.n), dtype=np.uint8)
        for b in range(replicates):
            drawn = rng.multinomial(N, p)
            counts = _widened(counts, drawn)
            counts[b] = drawn
        return Replicates(counts)
    return Replicates(design_resample_counts(rng, outcome, replicates), w)


def design_resample_weights(rng: np.random.Generator, outcome: Outcome,
                            replicates: int) -> np.ndarray:
    """The refit weights of ``replicates`` bootstrap replicates that resample the analysis'
    sampling design (module docstring), shape (replicates, n), float64: the draw counts of rows
    or clusters times the rows' weights; with frequency weights and no cluster the multinomial
    counts of the N = sum w individuals (N rounded to a whole number). The GLM paths keep them
    compact (:func:`design_resample_replicates`, the same draws)."""
    return design_resample_replicates(rng, outcome, replicates).dense()


def replicate_copies(outcome: Outcome, W: Weights) -> np.ndarray:
    """How many times each row is repeated in the drawn data sets of refit weights ``W``
    (``design_resample_weights`` or its compact :class:`Replicates`), float64: the draw counts;
    with frequency weights and no cluster 1 for every row drawn at least once (the drawn count
    then is the row's weight)."""
    w = _base_weights(outcome)
    if isinstance(W, Replicates):
        if w is not None and _individuals(outcome):
            return (W.counts > 0).astype(float)
        if W.scale is not None or w is None:  # the counts are the draw counts
            return W.counts.astype(float)
        W = W.dense()
    W = np.asarray(W, dtype=float)
    if w is None:
        return W
    if _individuals(outcome):
        return (W > 0).astype(float)
    return np.rint(W / w)


def compact_copies(outcome: Outcome, R: Replicates) -> Replicates | None:
    """:func:`replicate_copies` of compact refit weights ``R`` kept compact (the copies as
    counts with no scale: each block made in float64 is the float64 copies'), None where the
    copies are not whole numbers held by ``R`` (float64 weights without a scale)."""
    w = _base_weights(outcome)
    if w is not None and _individuals(outcome):
        return Replicates((R.counts > 0).astype(np.uint8))
    if R.scale is not None or w is None:
        if not np.issubdtype(R.counts.dtype, np.integer):
            return None
        return Replicates(R.counts)
    return None


def replicate_rows(outcome: Outcome, w_row: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
    """One replicate's drawn data set: the row indices (a row repeated as often as it is in the
    replicate) and the weights of those rows (None without weights); ``w_row`` one row of
    ``design_resample_weights``. Its total weight per row is ``w_row``."""
    copies = replicate_copies(outcome, w_row)
    m = np.repeat(np.arange(len(copies)), copies.astype(np.int64))
    w = _base_weights(outcome)
    if w is None:
        return m, None
    if _individuals(outcome):
        return m, np.asarray(w_row, dtype=float)[m]
    return m, w[m]


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
        # from this many rows every replicate is refitted at once (``_chord``); below it a few
        # at a time with the pairwise products of the columns kept (``_newton``)
        self._pairs = None if n >= _WHOLE_ROWS else _Pairs(self.Z)

    @property
    def pairs(self) -> _Pairs:
        if self._pairs is None:
            self._pairs = _Pairs(self.Z)
        return self._pairs

    @property
    def whole(self) -> bool:
        """Large samples: :meth:`coef` refits any number of replicates in one pass per step
        (over blocks of rows), so callers pass all of them at once; small samples refit a few
        at a time (callers keep their chunks, whose results are bit for bit the same)."""
        return self.n >= _WHOLE_ROWS or self.pairs.cached is None

    def coef(self, W: Weights) -> np.ndarray:
        """Coefficients (intercept first) for each row of frequency weights ``W`` (B, n;
        float64 or compact :class:`Replicates`, the same coefficients either way)."""
        R = as_replicates(W)
        if self.whole:  # large samples: every replicate in one pass per step
            out = _chord(self.family, self.Z, self.y, self.off, R, self.theta0)
        else:
            out = np.full((len(R), self.p + 1), np.nan)
            chunk = max(1, _CHUNK_CELLS // (self.n * (self.p + 1)))
            for c0 in range(0, len(R), chunk):
                out[c0:c0 + chunk] = _newton(self.family, self.Z, self.y, self.off,
                                             R.part(c0, c0 + chunk).dense(), self.theta0,
                                             self.pairs)
        coef = out.copy()
        coef[:, 1:] = out[:, 1:] / self.sd
        coef[:, 0] = out[:, 0] - coef[:, 1:] @ self.mean
        return coef


def weighted_glm(family: str, X: np.ndarray, outcome: Outcome, W: Weights,
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


def _mean_var(family: str, eta: np.ndarray, want_v: bool = True
              ) -> tuple[np.ndarray, np.ndarray | None]:
    """The mean and the variance function at ``eta`` (None for the linear model's 1, and
    for the logistic one unless ``want_v``)."""
    if family == "binary":
        mu = expit_into(eta, np.empty_like(eta))
        if not want_v:
            return mu, None
        v = np.subtract(1.0, mu)
        v *= mu  # mu (1 - mu)
        return mu, v
    if family == "count":
        mu = np.exp(np.clip(eta, None, 700))
        return mu, mu
    return eta, None


def expit_into(eta: np.ndarray, out: np.ndarray) -> np.ndarray:
    """The logistic function ``1 / (1 + exp(-eta))`` written into ``out`` (which may be
    ``eta``) by numpy's vectorised exponential, three times as fast as ``scipy.special.expit``
    on large arrays; the values agree with it to within a few units in the last place
    (relative 4e-16; an ``eta`` below about -709 gives 0)."""
    np.negative(eta, out=out)
    with np.errstate(over="ignore"):
        np.exp(out, out=out)
    out += 1.0
    return np.reciprocal(out, out=out)


def _row_blocks(n: int, replicates: int) -> Iterator[slice]:
    """Blocks of rows small enough that (replicates x rows) temporaries stay in cache."""
    rows = min(8192, max(256, _BLOCK_CELLS // max(replicates, 1)))
    for r0 in range(0, n, rows):
        yield slice(r0, min(n, r0 + rows))


def _chord(family: str, Z: np.ndarray, y: np.ndarray, off: Any, W: Replicates,
           theta0: np.ndarray) -> np.ndarray:
    """``_newton`` for every row of ``W`` at once on a large sample, in blocks of rows whose
    (replicates x rows) temporaries stay in cache. Every replicate starts at ``theta0``, so the
    first point's mean, variance and residual are computed once for all of them, and the first
    step's score and the estimability check's moments (sum W z, sum W z^2) are matrix products
    of the weights with the rows. The first step uses the full sample's information at the
    start scaled to the replicate's size (a replicate's own differs from it by ~1/sqrt(n));
    the second point gets each replicate's own information (a product of the weights times
    the variances with the rows' pairwise column products z_i z_j, i <= j, in float64), kept
    for the later (chord) steps and made again wherever a step shrank less than ``_SLOW``-fold
    from the one before. The score is exact at every point, so the fixed point is the same
    maximum; the stopping rule and the checks are ``_newton``'s. The linear model takes its
    one step with each replicate's own cross-product matrix, as ``_newton``. The weights
    stay compact (:class:`Replicates`): each block's are made in float64 when it comes (the
    same values, so the same sums in the same order as on float64 weights)."""
    n, q = Z.shape
    C = len(W)
    iu = np.triu_indices(q)
    k = len(iu[0])
    offset = np.broadcast_to(np.asarray(off, dtype=float), (n,))
    shift = bool(np.any(offset != 0.0))  # an offset to add (adding zeros changes nothing)
    mu0, v0 = _mean_var(family, Z @ theta0 + offset)
    r0 = y - mu0
    score = np.zeros((C, q))
    blocks = _BlockProducts(q, min(n, 8192))
    if v0 is None:  # the linear model: each replicate's own information
        moments = np.zeros((C, k))  # sum_i W_i z_i z_i'
        for sl in _row_blocks(n, C):
            Zb = Z[sl]
            Wb = W.block(slice(None), sl)
            moments += Wb @ blocks.pairs(Zb)
            score += Wb @ blocks.scaled(Zb, r0[sl])
        H = _unpack(moments, q, iu)
        N = H[:, :1, 0]
        m1 = H[:, 0, 1:] / N
        m2 = np.diagonal(H, axis1=1, axis2=2)[:, 1:] / N
    else:
        sums = np.zeros((C, 2 * q))  # sum_i W_i z_i and sum_i W_i z_i^2
        for sl in _row_blocks(n, C):
            Zb = Z[sl]
            Wb = W.block(slice(None), sl)
            sums += Wb @ blocks.moments(Zb)
            score += Wb @ blocks.scaled(Zb, r0[sl])
        N = sums[:, :1]
        m1 = sums[:, 1:q] / N
        m2 = sums[:, q + 1:] / N
        H = gram(Z, v0)[None, :, :] * (N[:, 0] / n)[:, None, None]
    # a column without variation among the drawn rows is not estimable in that replicate
    bad = np.any(m2 - m1 ** 2 <= 1e-10, axis=1)
    T = np.tile(theta0, (C, 1))
    done = np.zeros(C, dtype=bool)
    size, before = np.full(C, np.inf), np.full(C, np.inf)  # the last two steps' sizes
    cells: ModuleType | None = None  # from CELLS_FROM_ROWS rows: the per-cell work compiled
    if v0 is not None and compiled.wanted(n, CELLS_FROM_ROWS):
        from .compiled import glm_cells

        cells = glm_cells

        scale_c = np.zeros(0) if W.scale is None else np.ascontiguousarray(W.scale)
    # logistic, compiled: each replicate's range of exp(-eta) over the rows at the last point
    # evaluated and the step taken from there, for the final check (``_settled_eta``)
    ranged = family == "binary" and cells is not None
    e_lo, e_hi = np.full(C, np.inf), np.full(C, -np.inf)
    seen = np.zeros(C, dtype=bool)  # evaluated at least once (not only the shared start)
    moved = np.full(C, np.inf)  # the last step's sum of absolute values
    none = np.zeros(0)
    for it in range(_MAX_NEWTON if family != "continuous" else 1):
        act = np.flatnonzero(~(done | bad))
        if act.size == 0:
            break
        if it > 0:  # the score (and, when due, the information) at the current points
            score = np.zeros((act.size, q))
            Ta = T[act]
            fresh = (np.zeros((act.size, k))
                     if it == 1 or np.any(size[act] > _SLOW * before[act]) else None)
            lo_a = np.full(act.size, np.inf) if ranged else none
            hi_a = np.full(act.size, -np.inf) if ranged else none
            for sl in _row_blocks(n, act.size):
                Zb = Z[sl]
                eta = Ta @ Zb.T
                if shift:
                    eta += offset[sl]
                if cells is not None:  # the same values from one compiled pass
                    wv = np.empty_like(eta) if fresh is not None else eta[:0]
                    if family == "binary":
                        np.negative(eta, out=eta)
                        with np.errstate(over="ignore"):
                            np.exp(eta, out=eta)
                    else:
                        np.minimum(eta, 700.0, out=eta)
                        np.exp(eta, out=eta)
                    cells.glm_cells(eta, y[sl], W.counts, act, sl.start, scale_c,
                                    family == "binary", fresh is not None, eta, wv, lo_a,
                                    hi_a)
                    score += eta @ Zb
                    if fresh is not None:
                        fresh += wv @ blocks.pairs(Zb)
                    continue
                mu, v = _mean_var(family, eta, fresh is not None)
                Wb = W.block(act, sl)
                # W (y - mu) and W v written over eta and v (the same products as fresh
                # arrays; neither is read again)
                r = np.subtract(y[sl], mu, out=eta)
                r *= Wb
                score += r @ Zb
                if fresh is not None:
                    assert v is not None
                    v *= Wb
                    fresh += v @ blocks.pairs(Zb)
            if fresh is not None:
                H[act] = _unpack(fresh, q, iu)
            if ranged:
                e_lo[act], e_hi[act], seen[act] = lo_a, hi_a, True
        else:
            score = score[act]
        step = _solve(H[act], score)
        before[act], size[act] = size[act], np.max(np.abs(step), axis=1)
        taken = np.nan_to_num(step, nan=0.0)
        if ranged:
            moved[act] = np.sum(np.abs(taken), axis=1)
        T[act] += taken
        bad[act] |= ~np.all(np.isfinite(step), axis=1)
        done[act] |= size[act] <= _TOL * (1 + np.max(np.abs(T[act]), axis=1))
        if np.all(done | bad):
            break
    if family == "continuous":
        done[:] = True
    if family == "binary":
        act = np.flatnonzero(done & ~bad)
        if ranged and act.size:  # the replicates the last evaluation settles skip the pass
            act = act[~_settled_eta(Z, e_lo[act], e_hi[act], moved[act], seen[act])]
        for sl in _row_blocks(n, act.size) if act.size else ():
            eta = T[act] @ Z[sl].T + offset[sl]
            bad[act] |= np.any((np.abs(eta) > 20) & (W.block(act, sl) > 0), axis=1)
    T[bad | ~done] = np.nan
    return T


# the predictor's computed values against their exact ones: the products' and exponential's
# rounding (about 1e-14 at |eta| = 20) many times over
_ETA_SLACK = 1e-6


def _settled_eta(Z: np.ndarray, e_lo: np.ndarray, e_hi: np.ndarray, moved: np.ndarray,
                 seen: np.ndarray) -> np.ndarray:
    """Which replicates' final logistic check (any drawn row with |eta| > 20 at the final
    coefficients) is settled without a pass: no drawn row can have |eta| > 20. At the last
    point evaluated every row's eta (so every drawn row's) lies in [-log max e, -log min e]
    (``e = exp(-eta)``, the range the compiled pass kept over the rows); the final coefficients differ from that point by the
    last step, so eta moves by at most ``moved`` (the step's sum of absolute values) times
    the largest |z| (Hölder's inequality). A replicate is settled when that range widened by
    the move and ``_ETA_SLACK`` lies inside [-20, 20]; the others (and those never evaluated
    past the shared start) get the pass as before, so the check's answer is the same."""
    reach = moved * max(float(Z.max()), -float(Z.min())) + _ETA_SLACK
    with np.errstate(divide="ignore", invalid="ignore"):
        low = -np.log(e_hi)  # the smallest eta (from the largest exp(-eta))
        high = -np.log(e_lo)
    return np.asarray(seen & (high + reach < 20.0) & (low - reach > -20.0))


class _BlockProducts:
    """The elementwise products of one row block of ``_chord``'s passes, written into work
    arrays kept for the whole refit (no fresh arrays per block): the pairwise column products
    ``z_i z_j`` (i <= j, ``np.triu_indices`` order), ``[z, z^2]`` and ``z r``. Each is the
    array of the direct expression (``Zb[:, iu[0]] * Zb[:, iu[1]]``, ``np.hstack([Zb, Zb *
    Zb])``, ``Zb * r[:, None]``) value for value and in the same (row-major) layout, so the
    matrix products that read them are the same: BLAS may sum a product of another shape or
    layout in another order (with few replicates it does), so only the way the products are
    made changes. The pairwise products are made column by column from a transposed copy of
    the block (each one multiplication of two contiguous rows, then one transposing copy):
    made directly in the row-major array, each row's short run of products was a loop of its
    own, four times as slow at 12 columns."""

    def __init__(self, q: int, rows: int):
        self.q = q
        k = q * (q + 1) // 2
        self.ZT = np.empty((q, rows))
        self.PT = np.empty((k, rows))
        self.M = np.empty((rows, 2 * q))
        self.S = np.empty((rows, q))

    def pairs(self, Zb: np.ndarray) -> np.ndarray:
        nb, q = Zb.shape
        ZT, PT = self.ZT[:, :nb], self.PT[:, :nb]
        ZT[...] = Zb.T
        at = 0
        for i in range(q):
            np.multiply(ZT[i], ZT[i:], out=PT[at:at + q - i])
            at += q - i
        return PT.T

    def moments(self, Zb: np.ndarray) -> np.ndarray:
        nb, q = Zb.shape
        out = self.M[:nb]
        out[:, :q] = Zb
        np.multiply(Zb, Zb, out=out[:, q:])
        return out

    def scaled(self, Zb: np.ndarray, r: np.ndarray) -> np.ndarray:
        return np.multiply(Zb, r[:, None], out=self.S[:Zb.shape[0]])


def _unpack(flat: np.ndarray, q: int, iu: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
    H = np.empty((flat.shape[0], q, q))
    H[:, iu[0], iu[1]] = flat
    H[:, iu[1], iu[0]] = flat
    return H


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


OnCoxFit = Callable[[int, int, np.ndarray | None, np.ndarray, Any, np.ndarray], None]


def weighted_cox(X: np.ndarray, outcome: Outcome, W: np.ndarray,
                 start: np.ndarray | None = None) -> np.ndarray:
    """Cox coefficients for each row of frequency weights ``W``, fitted by ``unbin.models.cox.fit_cox``
    (Efron ties) started at ``start`` on the rows repeated as often as drawn — not on case
    weights, because Efron's tie correction counts a repeated row as several tied events but a
    weighted row as one; NaN where a fit fails. One design of :func:`weighted_cox_designs`."""
    return weighted_cox_designs([(X, start)], outcome, W)[0]


CoxSample = tuple[np.ndarray, np.ndarray, np.ndarray | None, np.ndarray | None]


def resampled_cox_samples(outcome: Outcome, W: np.ndarray, which: Sequence[int] | None = None
                          ) -> Iterator[tuple[int, np.ndarray, CoxSample, Layout]]:
    """Per refit-weight row ``b`` of ``W`` (``design_resample_weights``; only the rows
    ``which`` when given): the drawn data set's
    row indices ``m`` (``replicate_rows``), the survival arrays (time, event, entry, strata) of
    those rows and their prepared Cox layout, which carries the rows' case weights (the
    outcome's weights, or the counts of individuals); a replicate whose layout cannot be
    prepared is skipped."""
    from .cox import prepare_layout
    from .cox.layout import draw_layout

    assert outcome.time is not None
    source = _draw_source(outcome)
    for b in range(len(W)) if which is None else which:
        m, case = replicate_rows(outcome, W[b])
        time, event = outcome.time[m], outcome.y[m]
        entry = outcome.entry[m] if outcome.entry is not None else None
        strata = outcome.strata[m] if outcome.strata is not None else None
        # the layout derived from the full sample's where that gives prepare_layout's own
        layout = None
        if source is not None:
            w = _base_weights(outcome)
            layout = draw_layout(source[0], replicate_copies(outcome, W[b]),
                                 W[b] if w is not None and _individuals(outcome) else w,
                                 source[1])
        if layout is None:
            try:
                layout = prepare_layout(time, event, entry=entry, strata=strata, weights=case)
            except ValueError:
                continue
        yield b, m, (time, event, entry, strata), layout


def _draw_source(outcome: Outcome) -> tuple[Layout, np.ndarray | None] | None:
    """The full sample's Cox layout and every row's stratum code, from which
    ``cox.layout.draw_layout`` derives the replicates' layouts (``prepare_layout`` sorts every
    time scale stably, so the derivation holds for any times); None where the full sample
    cannot be laid out. Kept in ``outcome.cache``."""
    from .cox.inputs import _stratum_codes

    if _DRAW_SOURCE not in outcome.cache:
        layout = _full_layout(outcome)
        codes = (None if layout is None or outcome.strata is None
                 else _stratum_codes(outcome.strata, outcome.n)[0])
        outcome.cache[_DRAW_SOURCE] = None if layout is None else (layout, codes)
    got: tuple[Layout, np.ndarray | None] | None = outcome.cache[_DRAW_SOURCE]
    return got


def _full_layout(outcome: Outcome) -> Layout | None:
    """The full sample's Cox layout with its case weights (None where it cannot be made),
    kept in ``outcome.cache``."""
    from .cox import prepare_layout

    if _NEAR_LAYOUT not in outcome.cache:
        try:
            outcome.cache[_NEAR_LAYOUT] = prepare_layout(
                outcome.time, outcome.y, entry=outcome.entry, strata=outcome.strata,
                weights=_base_weights(outcome))
        except ValueError:
            outcome.cache[_NEAR_LAYOUT] = None
    got: Layout | None = outcome.cache[_NEAR_LAYOUT]
    return got


def weighted_cox_designs(designs: Sequence[tuple[np.ndarray, np.ndarray | None]],
                         outcome: Outcome, W: np.ndarray,
                         on_fit: OnCoxFit | None = None) -> list[np.ndarray]:
    """:func:`weighted_cox` for several designs ``(X, start)`` of the same rows at once: the
    designs share the replicates, so each replicate's repeated rows and their Cox layout (the
    sort and the risk sets, ``unbin.models.cox.prepare_layout``) are made once and every design is
    fitted on them. A design with a start is refitted by secant steps from it
    (``unbin.models.cox.refit_replicate``, with what the replicates share prepared once,
    :func:`cox_near_starts`), falling back to ``fit_cox`` when those do not settle.
    ``on_fit(b, j, Xm, m, layout, coef)`` is called after each successful fit of design ``j``
    in replicate ``b`` (``m`` the repeated row indices, ``Xm`` their design rows when the fit
    made them, else None: ``X[m]``, gathered by the callers that need it)."""
    from .cox import fit_cox, refit_replicate

    assert outcome.time is not None
    Xs = [np.asarray(X, dtype=float).reshape(outcome.n, -1) for X, _ in designs]
    inits = [start if start is not None and np.all(np.isfinite(start)) else None
             for _, start in designs]
    W = np.atleast_2d(W)
    outs = [np.full((W.shape[0], X.shape[1]), np.nan) for X in Xs]
    starts = cox_near_starts(outcome, [X for X, _ in designs], inits)
    # every replicate of every design with a start at once; the one-at-a-time path below for
    # the replicates that did not settle there (and for every replicate when ``on_fit`` wants
    # each replicate's rows and layout)
    batched = cox_replicate_refits(outcome, Xs, starts, W)
    for out, got in zip(outs, batched, strict=True):
        if got is not None:
            out[got.done] = got.coef[got.done]
    which = [b for b in range(W.shape[0])
             if on_fit is not None or any(got is None or not got.done[b] for got in batched)]
    for b, m, (time, event, entry, strata), layout in resampled_cox_samples(outcome, W, which):
        for j, (X, init, near, out) in enumerate(zip(Xs, inits, starts, outs, strict=True)):
            got = batched[j]
            Xm: np.ndarray | None = None
            if got is not None and got.done[b]:
                coef = got.coef[b]
            else:
                one = refit_replicate(near, X, m, layout) if near is not None else None
                if one is not None:
                    coef = one[0]
                else:
                    Xm = X[m]
                    try:  # far from the start, or not settling: the full fit decides (the
                        # layout carries the case weights)
                        fitted = fit_cox(Xm, time, event, entry=entry, strata=strata,
                                         init=init, layout=layout)
                    except ValueError:
                        continue
                    if not fitted.converged:
                        continue
                    coef = fitted.coef
            out[b] = coef
            if on_fit is not None:
                on_fit(b, j, Xm, m, layout, coef)
    return outs


def cox_replicate_refits(outcome: Outcome, Xs: Sequence[np.ndarray],
                         starts: Sequence[NearStart | None], W: np.ndarray,
                         with_loglik: bool = False) -> list[ReplicateRefits | None]:
    """Per design ``Xs[j]`` with a start (``cox_near_starts``), the secant refits of all the
    replicates of refit weights ``W`` (B, n) at once (``unbin.models.cox.refit_replicates``:
    each replicate's drawn data set, a row drawn k times as k rows, through the full sample's
    layout; a design without columns, whose refit is its log partial likelihood at no
    coefficients, needs no start); None for a design without a start. A replicate not
    ``done`` there goes to
    ``unbin.models.cox.refit_replicate`` and ``fit_cox`` one at a time, as before; so do all
    of them when there are fewer than ``_BATCH_MIN`` (a caller that refits replicate by
    replicate and lays out each replicate's rows anyway) or the sample has more than
    ``_BATCH_ROWS`` rows (there a batched evaluation costs more per replicate than the
    one-at-a-time one and the layout it saves: ``benchmarks/cox_refits.py``)."""
    from .cox import NearStart, ReplicateRefits, refit_replicates

    layout = outcome.cache.get(_NEAR_LAYOUT)
    W = np.atleast_2d(np.asarray(W, dtype=float))
    B = len(W)
    if (layout is None or all(start is None for start in starts) or B < _BATCH_MIN
            or outcome.n > _BATCH_ROWS):
        return [None] * len(Xs)
    designs = [np.asarray(X, dtype=float).reshape(outcome.n, -1) for X in Xs]
    p = [X.shape[1] for X in designs]
    # a design without columns (a null model) has nothing to refit: its log partial
    # likelihood is read at the empty coefficient vector, as fit_cox reads it
    starts = [NearStart(outcome.n, np.zeros(0), np.ones(0), np.zeros(0), np.zeros((0, 0)), True)
              if start is None and k == 0 else start for start, k in zip(starts, p, strict=True)]
    coef = [np.full((B, k), np.nan) for k in p]
    loglik = [np.full(B, np.nan) for _ in p]
    done = [np.zeros(B, dtype=bool) for _ in p]
    # the draw counts a slice of replicates at a time (with weights they are a new array)
    step = max(_BATCH_SLICE, _CHUNK_CELLS // max(1, outcome.n))
    for lo in range(0, B, step):
        part = slice(lo, min(B, lo + step))
        copies = replicate_copies(outcome, W[part])
        for j, (X, start) in enumerate(zip(designs, starts, strict=True)):
            if start is None:
                continue
            got = refit_replicates(start, X, layout, copies, W[part], with_loglik=with_loglik)
            coef[j][part], loglik[j][part], done[j][part] = got.coef, got.loglik, got.done
    return [None if start is None else ReplicateRefits(coef[j], loglik[j], done[j])
            for j, start in enumerate(starts)]


def cox_near_starts(outcome: Outcome, Xs: Sequence[np.ndarray],
                    inits: Sequence[np.ndarray | None]) -> list[NearStart | None]:
    """Per design (rows of ``outcome``), what its replicates' secant refits share
    (``unbin.models.cox.near_start``: the centring and scaling, the start and the full
    sample's information there), on the full sample's Cox layout with its case weights;
    None for a design without a start (or where it cannot be prepared). Kept in
    ``outcome.cache`` for the next chunk of replicates of the same design (the same array
    object, held by a weak reference) and start."""
    from .cox import near_start

    assert outcome.time is not None
    if all(init is None for init in inits):
        return [None] * len(Xs)
    layout = _full_layout(outcome)
    known: dict[int, tuple[weakref.ref[Any], np.ndarray, NearStart | None]] = \
        outcome.cache.setdefault(_NEAR_STARTS, {})
    out: list[NearStart | None] = []
    for X, init in zip(Xs, inits, strict=True):
        if init is None or layout is None:
            out.append(None)
            continue
        seen = known.get(id(X))
        if seen is not None and seen[0]() is X and np.array_equal(seen[1], init):
            out.append(seen[2])
            continue
        try:
            start = near_start(np.asarray(X, dtype=float).reshape(outcome.n, -1), init, layout)
        except ValueError:
            start = None
        # the design by a weak reference: the cache must not keep a table's designs alive
        # once the table is done, nor their starts (which hold the design's standardised
        # copy on the compiled path): the entry goes when the design does
        try:
            known[id(X)] = (weakref.ref(X, _forget_start(known, id(X))),
                            np.array(init, dtype=float), start)
        except TypeError:  # not an object a weak reference can follow: not kept
            pass
        out.append(start)
    return out


def _forget_start(known: dict[int, Any], key: int) -> Callable[[weakref.ref[Any]], None]:
    """The callback that drops ``known[key]`` when its design's weak reference dies (not an
    entry made since for a new design under the same id)."""

    def forget(ref: weakref.ref[Any]) -> None:
        seen = known.get(key)
        if seen is not None and seen[0] is ref:
            del known[key]

    return forget


_NEAR_LAYOUT = "cox_near_layout"
_DRAW_SOURCE = "cox_draw_source"
_NEAR_STARTS = "cox_near_starts"
_BATCH_MIN = 4  # replicates of one call refitted at once from this many on
_BATCH_SLICE = 64  # replicates whose draw counts are made at once (at least)
_BATCH_ROWS = 300_000  # rows of the sample up to which they are refitted at once


# -- robust Wald statistics of the replicates ----------------------------------------------------


def replicate_clusters(outcome: Outcome, m: np.ndarray) -> np.ndarray | None:
    """Cluster codes of a drawn data set's rows ``m`` (``replicate_rows``): every copy of a
    cluster drawn k times is a cluster of its own (None without a cluster, where every row is
    its own unit)."""
    if outcome.cluster is None:
        return None
    _, code = np.unique(np.asarray(outcome.cluster), return_inverse=True)
    code = code.ravel()
    m = np.asarray(m, dtype=np.int64)
    if m.size == 0:
        return code[m]
    # the j-th copy of a row: its position among the repeats of that row (rows repeat in runs)
    start = np.flatnonzero(np.r_[True, m[1:] != m[:-1]])
    run = np.repeat(start, np.diff(np.r_[start, m.size]))
    copy = np.arange(m.size) - run
    return np.asarray(code[m] * (int(copy.max()) + 1) + copy)


def glm_robust_wald(family: str, X: np.ndarray, outcome: Outcome, coef: np.ndarray,
                    W: np.ndarray, k: int) -> np.ndarray:
    """The robust Wald statistic b' V^-1 b of the first ``k`` columns of ``X`` in each replicate:
    ``coef`` (B, p + 1, intercept first) refitted on refit weights ``W`` (B, n,
    ``design_resample_weights``), V the replicate's own (cluster-)robust covariance, exactly as
    ``unbin.models.robust.robust_cov`` forms it on the drawn data set: the bread
    (sum_i W_i v_i z_i z_i')^-1 and the meat sum over the drawn units of s s', s = sum over a
    unit's rows of w_i z_i (y_i - mu_i) (w the outcome's weight, 1 without), a cluster drawn k
    times counting as k clusters, with the G / (G - 1) factor when clustered (G clusters drawn).
    Without a cluster every drawn row is its own unit (HC0). On the standardised design (the
    slopes' Wald statistic does not change with the columns' scale). NaN where ``coef`` is."""
    X = np.asarray(X, dtype=float).reshape(outcome.n, -1)
    coef = np.atleast_2d(np.asarray(coef, dtype=float))
    W = np.atleast_2d(np.asarray(W, dtype=float))
    B = coef.shape[0]
    if k == 0:
        return np.where(np.all(np.isfinite(coef), axis=1), 0.0, np.nan)
    Z, _, sd = standardise(X)
    y = np.asarray(outcome.y, dtype=float)
    w = np.ones_like(y) if outcome.weights is None else np.asarray(outcome.weights, float)
    copies = replicate_copies(outcome, W)
    out = np.full(B, np.nan)
    good = np.all(np.isfinite(coef), axis=1)
    pairs = _Pairs(Z)
    chunk = max(1, _CHUNK_CELLS // (outcome.n * Z.shape[1]))
    cl = None if outcome.cluster is None else np.unique(np.asarray(outcome.cluster),
                                                        return_inverse=True)[1].ravel()
    if cl is not None:  # membership (n, G): one sparse product sums a column over clusters
        G = int(cl.max()) + 1
        member = sparse.csr_matrix((np.ones(cl.size), (np.arange(cl.size), cl)),
                                   shape=(cl.size, G))
        size = np.bincount(cl, minlength=G).astype(float)
    for c0 in range(0, B, chunk):
        sl = slice(c0, min(B, c0 + chunk))
        cf = np.nan_to_num(coef[sl])
        eta = cf[:, :1] + cf[:, 1:] @ X.T
        if outcome.offset is not None:
            eta = eta + outcome.offset
        if family == "binary":
            mu = special.expit(eta)
            v = mu * (1 - mu)
        elif family == "count":
            mu = np.exp(np.clip(eta, None, 700))
            v = mu
        else:
            mu, v = eta, np.ones_like(eta)
        H = _information(Z, W[sl] * v, pairs)
        r = w * (y - mu)  # (C, n): a copy's score is r_i z_i
        if cl is None:
            M = _information(Z, copies[sl] * r * r, pairs)
        else:
            # (C, G, q): per replicate the score sums of each cluster
            S = np.stack([np.asarray(member.T @ (r * Z[:, j]).T).T for j in range(Z.shape[1])],
                         axis=2)
            kg = np.asarray(member.T @ copies[sl].T).T / size  # a cluster's draw count
            M = np.einsum("cg,cgq,cgr->cqr", kg, S, S) * (G / (G - 1.0))
        for i, b in enumerate(range(sl.start, sl.stop)):
            if not good[b]:
                continue
            try:
                bread = np.linalg.inv(H[i])
            except np.linalg.LinAlgError:
                continue
            V = bread @ M[i] @ bread
            V = (V + V.T) / 2.0
            beta = coef[b, 1:1 + k] * sd[:k]  # slopes on the standardised scale
            try:
                out[b] = float(beta @ np.linalg.solve(V[1:1 + k, 1:1 + k], beta))
            except np.linalg.LinAlgError:
                pass
    return out


def cox_robust_wald(Xm: np.ndarray, sample: CoxSample, case: np.ndarray | None,
                    clusters: np.ndarray | None, coef: np.ndarray, cov: np.ndarray,
                    k: int, ties: str = "efron") -> float:
    """The robust Wald statistic of the first ``k`` Cox coefficients on one drawn data set (rows
    ``Xm`` with survival arrays ``sample``, case weights ``case`` and replicate cluster codes
    ``clusters``, ``replicate_clusters``): the sandwich of ``unbin.models.robust`` with the
    fit's inverse information ``cov`` as bread and the score residuals (``ties`` as the fit's;
    a drawn copy ties with its original)."""
    from .robust import cox_scores, sandwich

    if k == 0:
        return 0.0
    time, event, entry, strata = sample
    o = Outcome("survival", np.asarray(event, dtype=float), time=time, entry=entry,
                strata=strata, weights=case, cluster=clusters)
    V, _ = sandwich(cov, cox_scores(Xm, o, coef, ties=ties), clusters)
    b = coef[:k]
    try:
        return float(b @ np.linalg.solve(V[:k, :k], b))
    except np.linalg.LinAlgError:
        return float("nan")
