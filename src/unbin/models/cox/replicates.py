"""Secant refits of many bootstrap replicates of one Cox design at once (``refit_replicates``).

A replicate of a sample is its rows drawn with replacement: every row of the full sample is in
it ``copies`` times, with a total case weight ``weights`` (copies x the copy's weight). The
replicates of one sample share its rows, its risk-set layout (strata, delayed entry, tied
times: ``prepare_layout`` of the full sample) and, for the refits from the full-sample
estimate, its standardisation (``near_start``); only the weights differ. So the risk-set sums
of a block of B replicates are the column-wise sums of one (rows x B) array of
``weights x exp(eta_b)`` through the full sample's risk-set operator, and every replicate of a
block takes its secant step (``fit.secant_refit``'s: each its own inverse information, BFGS
update and stop) in the same pass. A replicate whose steps stop is dropped from the block.

The drawn data set is what the one-at-a-time path (``fit.refit_replicate``) fits: a row drawn
k times is k rows, so Efron's correction sees d_b(t) = the summed copies of the event rows at
time t (a row drawn twice ties with itself), each tied term weighted by the mean weight of the
copies; the rows are those of the replicate at risk at one of its own event times at least
(the bound and the constant-column test read those only). The estimate differs from that
path's by rounding in the sums, and both stop by the same rule (the next step would change no
row's linear predictor by more than ``30 * tol``), so they agree within that tolerance.

A replicate whose refit does not settle (a step or the likelihood not finite, the likelihood
falling, no events, a column constant among its rows, the full sample's information not
positive definite, ``max_iter`` steps) is marked not done: the caller gives it to the
one-at-a-time path, whose status and message then decide, as before.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse

from .fit import _REPLICATE_SETTLE, NearStart
from .layout import _FEW_STRATA, Layout

# rows x replicates of one block: a block's working arrays (the weights, w exp(eta), the
# score's row weights, ...: about five of rows x replicates doubles) stay in cache at this
# size; large samples take _MIN_WIDTH replicates at a time whatever their size (at 1,000,000
# rows each working array is then 32 MB)
_BLOCK_CELLS = 1 << 17
_MIN_WIDTH = 4
_MAX_WIDTH = 256
# a replicate's largest value of a column is that of its first row in the column's order of
# values; the rows with the _EXTREMES largest (smallest) values are looked at first (a row is
# in a replicate with probability about 0.63), all rows only when none of them is
_EXTREMES = 16


@dataclass(frozen=True)
class ReplicateRefits:
    """Per replicate (row), the coefficients on X's scale (NaN where not done), the log
    partial likelihood at them (NaN unless asked for, or not done) and ``done``: False where
    the replicate must be refitted one at a time (see the module docstring)."""

    coef: np.ndarray  # (B, p)
    loglik: np.ndarray  # (B,)
    done: np.ndarray  # (B,) bool


def refit_replicates(
    start: NearStart, X: np.ndarray, layout: Layout, copies: np.ndarray, weights: np.ndarray,
    *, tol: float = 1e-9, max_iter: int = 50, with_loglik: bool = False,
    block_cells: int = _BLOCK_CELLS, min_width: int = _MIN_WIDTH,
) -> ReplicateRefits:
    """The secant refits (``fit.refit_replicate``'s) of the replicates given by ``copies`` and
    ``weights`` (each (B, n): how often each row of the full sample is in the replicate, and
    its summed case weight there, 0 for a row not drawn) of the design ``X`` (n, p) that
    ``start`` was prepared from on ``layout`` (the full sample's), in blocks of about
    ``block_cells`` rows x replicates (``min_width`` replicates at least)."""
    Xa = np.asarray(X, dtype=float)
    p = start.mean.size
    if Xa.shape != (start.n, p):
        raise ValueError(
            f"X has shape {Xa.shape} but the start was prepared from a design of shape "
            f"({start.n}, {p}); pass the same design as to near_start"
        )
    copies = np.atleast_2d(np.asarray(copies, dtype=float))
    weights = np.atleast_2d(np.asarray(weights, dtype=float))
    if copies.shape != weights.shape or copies.shape[1:] != (layout.n,):
        raise ValueError(
            f"copies {copies.shape} and weights {weights.shape} must both be (replicates, "
            f"{layout.n}), one column per row of the full sample"
        )
    B = copies.shape[0]
    coef = np.full((B, p), np.nan)
    loglik = np.full(B, np.nan)
    done = np.zeros(B, dtype=bool)
    m = layout.order.size
    if B == 0 or start.H is None or m == 0 or layout.ev.size == 0:
        return ReplicateRefits(coef, loglik, done)
    fixed = _Fixed.of(layout, Xa, start)
    width = int(min(B, _MAX_WIDTH, max(min_width, block_cells // m)))
    work = _Work(m, layout.k_time.size, width)
    for lo in range(0, B, width):
        cols = slice(lo, min(B, lo + width))
        blk = _Block.of(fixed, copies[cols], weights[cols], start)
        beta, ll, ok = _secant_block(fixed, blk, work, start, tol, max_iter, with_loglik)
        coef[cols] = np.where(ok[:, None], beta / start.scale, np.nan)
        loglik[cols] = np.where(ok, ll, np.nan)
        done[cols] = ok
    return ReplicateRefits(coef, loglik, done)


@dataclass(frozen=True)
class _Fixed:
    """What every block of one design reads: the layout, the design's kept rows standardised
    by the full sample (in layout order) behind the shift of the linear predictor (the
    largest at the start within each stratum, as a last column with coefficient 1: the
    partial likelihood does not change with it, and it keeps exp(eta) from overflowing), the
    event rows by event time and each column's order of values."""

    L: Layout
    Z1: np.ndarray  # (m, p + 1): z, then -shift
    Z_ev: np.ndarray  # (E, p + 1) the event rows' (L.ev)
    ev_op: sparse.csr_matrix  # (K, E): 1 for the event rows (of L.ev) of each event time
    ev_k: np.ndarray  # (E,) event-time index of each event row of L.ev
    top: np.ndarray  # (p, T) each column's rows with the T largest values, largest first
    bottom: np.ndarray  # (p, T) those with the T smallest, smallest first

    @classmethod
    def of(cls, L: Layout, Xa: np.ndarray, start: NearStart) -> _Fixed:
        m, p = L.order.size, start.mean.size
        Z1 = np.empty((m, p + 1))
        Z1[:, :p] = Xa[L.order]
        Z1[:, :p] -= start.mean
        Z1[:, :p] /= start.scale
        ev_k = L.b_idx[L.ev] - 1
        E, K = L.ev.size, L.k_time.size
        ev_op = sparse.csr_matrix((np.ones(E), (ev_k, np.arange(E))), shape=(K, E))
        eta0 = Z1[:, :p] @ start.beta
        if L.row_starts.size <= 1:
            Z1[:, p] = -eta0.max()
        else:
            Z1[:, p] = -np.repeat(np.maximum.reduceat(eta0, L.row_starts), L.row_counts)
        if "extremes" not in start.memo:  # the same for every call with this start
            start.memo["extremes"] = _extremes(Z1[:, :p])
        top, bottom = start.memo["extremes"]
        return cls(L, Z1, np.ascontiguousarray(Z1[L.ev]), ev_op, ev_k, top, bottom)

    @property
    def Z(self) -> np.ndarray:
        return self.Z1[:, :-1]


def _extremes(Z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(p, T) rows of each column of ``Z`` with the T largest values, largest first, and with
    the T smallest, smallest first."""
    m, p = Z.shape
    T = min(m, _EXTREMES)
    top, bottom = np.empty((p, T), dtype=np.int64), np.empty((p, T), dtype=np.int64)
    for j in range(p):
        for out, key in ((top, -Z[:, j]), (bottom, Z[:, j])):
            part = np.argpartition(key, T - 1)[:T] if T < m else np.arange(m)
            out[j] = part[np.argsort(key[part], kind="stable")]
    return top, bottom


class _Work:
    """Working arrays reused by every evaluation of every block (fresh arrays of this size
    cost page faults each time): views of ``width`` columns or fewer."""

    def __init__(self, m: int, K: int, width: int):
        self.m, self.K = m, K
        self._rows = [np.empty(m * width) for _ in range(3)]
        self._times = [np.empty((K + 1) * width) for _ in range(4)]

    def rows(self, i: int, A: int) -> np.ndarray:
        return self._rows[i][: self.m * A].reshape(self.m, A)

    def times(self, i: int, A: int, extra: int = 0) -> np.ndarray:
        return self._times[i][: (self.K + extra) * A].reshape(self.K + extra, A)


@dataclass(frozen=True)
class _Block:
    """Replicates (columns) laid out on the full sample's kept rows (``_Fixed.Z``'s rows)."""

    W: np.ndarray  # (m, A) summed case weight of each kept row in each replicate
    xwe1: np.ndarray  # (A, p + 1) the events' summed w z (the constant part of the score),
    # then w (-shift)
    per: np.ndarray  # (K, A) each event time's weight of log S0: wsum (Breslow), wavg (Efron)
    has: np.ndarray  # (K, A) bool: the replicate has events at the event time
    event_weight: np.ndarray  # (A,) summed weight of the replicate's events
    kept: np.ndarray  # (A, m) bool: the row is in the replicate, at risk at its event times
    reach: np.ndarray  # (A, p) largest |z| of each column among the replicate's kept rows
    bad: np.ndarray  # (A,) bool: no events, or a column constant among its kept rows
    # Efron's terms l = 1 .. d - 1 of each (event time, replicate) with d > 1 tied copies,
    # sorted by (event time, replicate)
    t_a: np.ndarray  # (N,) the replicate (column)
    t_at: np.ndarray  # (N,) flat index k * A + a into (K, A) arrays
    t_f: np.ndarray  # (N,) l / d
    t_w: np.ndarray  # (N,) wavg at (k, a)
    t_run: np.ndarray  # first term of each (k, a) with terms
    t_key: np.ndarray  # that (k, a)'s flat index

    @classmethod
    def of(cls, F: _Fixed, copies: np.ndarray, weights: np.ndarray, start: NearStart) -> _Block:
        L = F.L
        W_rows = np.take(weights, L.order, axis=1)  # (A, m)
        W = np.ascontiguousarray(W_rows.T)  # (m, A)
        rows_ev = L.order[L.ev]
        We = np.ascontiguousarray(weights[:, rows_ev].T)  # (E, A)
        A, p = W.shape[1], F.top.shape[0]
        wsum = np.asarray(F.ev_op @ We)
        d = np.asarray(F.ev_op @ np.ascontiguousarray(copies[:, rows_ev].T))
        has = d > 0
        wavg = np.where(has, wsum / np.where(has, d, 1.0), 0.0)
        xwe1 = We.T @ F.Z_ev  # (A, p + 1): the events' summed w z, then w (-shift)
        event_weight = We.sum(axis=0)
        # a row is in the replicate's own layout when it is drawn and at risk at one of the
        # replicate's event times at least
        cum = np.ascontiguousarray(_forward_cum(L, has.astype(float)).T)  # (A, K + 1)
        at_risk = np.take(cum, L.b_idx, axis=1)
        if L.late_entry:
            at_risk -= np.take(cum, L.a_idx, axis=1)
        kept = at_risk > 0.5  # (A, m)
        del at_risk
        kept &= W_rows > 0
        del W_rows
        # each column's largest and smallest value among those rows
        hi, lo = np.empty((A, p)), np.empty((A, p))
        for j in range(p):
            for out, ends in ((hi, F.top[j]), (lo, F.bottom[j])):
                seen = kept[:, ends]  # (A, T)
                first = seen.argmax(axis=1)
                out[:, j] = F.Z1[ends[first], j]
                for a in np.flatnonzero(~seen.any(axis=1)):  # none of them: all rows
                    vals = F.Z1[kept[a], j]
                    out[a, j] = (vals.max() if out is hi else vals.min()) if vals.size else 0.0
        reach = np.maximum(hi, -lo)
        # fit.refit_replicate's test of a column constant among the replicate's rows (on the
        # standardised scale: a range within 1e-12 of the column's magnitude)
        inv = 1.0 / start.scale
        top = np.maximum(np.abs(hi), np.abs(lo)) + np.abs(start.mean) * inv
        flat = ~(hi - lo > 1e-12 * np.maximum(inv, top))
        bad = ~(event_weight > 0) | flat.any(axis=1) | ~kept.any(axis=1)
        # Efron's terms l = 1 .. d - 1 of each (event time, replicate), k major
        extra = np.maximum(d - 1.0, 0.0).astype(np.int64).ravel() if start.efron else \
            np.zeros(d.size, dtype=np.int64)
        key = np.flatnonzero(extra)  # the (k, a) with terms
        run = (np.cumsum(extra) - extra)[key]  # where each one's terms start
        index = np.int32 if extra.size < 2**31 else np.int64
        t_at = np.repeat(key.astype(index), extra[key])
        ell = np.arange(1, t_at.size + 1, dtype=float)
        ell -= np.repeat(run.astype(float), extra[key])
        t_f = ell / np.repeat(d.ravel()[key], extra[key])
        t_w = np.repeat(wavg.ravel()[key], extra[key])
        return cls(W, xwe1, wavg if start.efron else wsum, has, event_weight, kept,
                   reach, bad, t_at % A, t_at, t_f, t_w, run, key)

    def take(self, sel: np.ndarray) -> _Block:
        """The block of the columns ``sel`` (increasing)."""
        A, new = self.W.shape[1], sel.size
        pos = np.full(A, -1)
        pos[sel] = np.arange(new)
        keep = pos[self.t_a] >= 0
        t_a = pos[self.t_a[keep]]
        t_at = (self.t_at[keep] // A) * new + t_a
        return _Block(
            np.ascontiguousarray(self.W[:, sel]), self.xwe1[sel],
            self.per[:, sel], self.has[:, sel], self.event_weight[sel],
            self.kept[sel], self.reach[sel], self.bad[sel],
            *_terms(t_a, t_at, self.t_f[keep], self.t_w[keep]),
        )


def _terms(t_a: np.ndarray, t_at: np.ndarray, t_f: np.ndarray, t_w: np.ndarray
           ) -> tuple[np.ndarray, ...]:
    """Efron's terms with the runs of each (event time, replicate) (``t_at`` sorted)."""
    run = np.flatnonzero(np.r_[True, t_at[1:] != t_at[:-1]]) if t_at.size else t_at
    return t_a, t_at, t_f, t_w, run, t_at[run]


def _secant_block(
    F: _Fixed, blk: _Block, work: _Work, start: NearStart, tol: float, max_iter: int,
    with_loglik: bool,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``fit.secant_refit`` for every replicate of a block in lockstep: (A, p) estimates on the
    standardised scale, (A,) log partial likelihoods (NaN unless ``with_loglik``) and (A,)
    done. The replicates still stepping are kept together (``_Block.take``)."""
    A = blk.W.shape[1]
    limit = _REPLICATE_SETTLE * tol
    assert start.H is not None
    beta = np.tile(start.beta, (A, 1))
    ok = ~blk.bad
    finished = np.zeros(A, dtype=bool)
    act = np.flatnonzero(ok)  # the columns of the block that ``cur`` holds
    if act.size == 0:
        return beta, np.full(A, np.nan), ok
    cur = blk.take(act) if act.size < A else blk
    H = start.H[None] / cur.event_weight[:, None, None]
    ll, score = _evaluate(F, cur, work, beta[act].T, True)
    ll_prev, score_prev, step = ll, score, np.zeros_like(score)  # (the previous point's)
    for it in range(max_iter + 1):
        good = np.isfinite(ll) & np.isfinite(score).all(axis=1)
        if it:  # the likelihood must not fall (fit.secant_refit)
            good &= ll >= ll_prev - tol * np.maximum(1.0, np.abs(ll_prev))
            y = np.where(good[:, None], score_prev - score, 0.0)
            H = np.where(good[:, None, None], _secant_update(H, step, y), H)
        if it == max_iter:  # max_iter steps did not settle
            ok[act] = False
            break
        step = np.einsum("cij,cj->ci", H, score)
        good &= np.isfinite(step).all(axis=1)
        ok[act[~good]] = False
        beta[act[good]] += step[good]
        settled = np.zeros_like(good)
        settled[good] = _settled(F, cur, np.flatnonzero(good), step[good], limit)
        finished[act[settled]] = True
        moving = good & ~settled
        if not moving.any():
            break
        sel = np.flatnonzero(moving)
        if sel.size < act.size:
            cur, act = cur.take(sel), act[sel]
            H, step, ll, score = H[sel], step[sel], ll[sel], score[sel]
        ll_prev, score_prev = ll, score
        ll, score = _evaluate(F, cur, work, beta[act].T, True)
    ok &= finished
    out_ll = np.full(A, np.nan)
    if with_loglik and ok.any():
        idx = np.flatnonzero(ok)
        out_ll[idx] = _evaluate(F, blk.take(idx), work, beta[idx].T, False)[0]
    return beta, out_ll, ok


def _secant_update(H: np.ndarray, step: np.ndarray, y: np.ndarray) -> np.ndarray:
    """``fit.secant_update`` of each replicate's inverse information (A, p, p)."""
    sy = np.einsum("ci,ci->c", step, y)
    Hy = np.einsum("cij,cj->ci", H, y)
    upd = sy > 0.0
    rho = np.where(upd, 1.0 / np.where(upd, sy, 1.0), 0.0)
    cross = step[:, :, None] * Hy[:, None, :]
    yHy = np.einsum("ci,ci->c", y, Hy)
    outer = step[:, :, None] * step[:, None, :]
    new = (H - rho[:, None, None] * (cross + cross.transpose(0, 2, 1))
           + (rho * rho * yHy + rho)[:, None, None] * outer)
    return np.where(upd[:, None, None], new, H)


def _settled(F: _Fixed, blk: _Block, cols: np.ndarray, step: np.ndarray,
             limit: float) -> np.ndarray:
    """``fit._settled`` per replicate ``cols`` of the block: a bound from the reach of its
    kept rows, then, near the limit only, the exact largest change of a kept row's linear
    predictor."""
    bound = np.einsum("ci,ci->c", np.abs(step), blk.reach[cols])
    out = bound <= limit
    near = np.flatnonzero(~out & (bound <= max(1e-3, 10.0 * limit)))
    if near.size:
        step1 = np.zeros((near.size, F.Z1.shape[1]))  # (the shift column's coefficient 0)
        step1[:, :-1] = step[near]
        change = np.abs(step1 @ F.Z1.T)  # (near, m), no copy of the design
        change *= blk.kept[cols[near]]
        out[near] = change.max(axis=1) <= limit
    return out


def _evaluate(
    F: _Fixed, blk: _Block, work: _Work, beta: np.ndarray, with_score: bool
) -> tuple[np.ndarray, np.ndarray]:
    """The log partial likelihoods (A,) and (``with_score``) scores (A, p) of the block's
    replicates at the standardised coefficients ``beta`` (p, A): ``likelihood._point`` and
    ``_score`` of each replicate's drawn data set, column-wise."""
    L = F.L
    A = beta.shape[1]
    beta1 = np.empty((beta.shape[0] + 1, A))
    beta1[:-1] = beta
    beta1[-1] = 1.0
    r = work.rows(0, A)
    np.matmul(F.Z1, beta1, out=r)  # eta, shifted
    ll = np.einsum("ap,pa->a", blk.xwe1, beta1)  # the events' summed w eta
    with np.errstate(over="ignore", under="ignore"):
        np.exp(r, out=r)
    r *= blk.W  # w exp(eta)
    s0 = _reverse_cum(L, np.asarray(L.risk_op @ r), work.times(0, A))  # risk-set sums
    has = blk.has
    bk = None
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        s0_has = work.times(1, A)
        s0_has.fill(1.0)
        np.copyto(s0_has, s0, where=has)
        # Efron: the first of a time's d tied terms (l = 0) is Breslow's with the mean weight
        c = np.log(s0_has, out=work.times(2, A))
        ll -= np.einsum("ka,ka->a", blk.per, c)
        np.divide(blk.per, s0_has, out=c)
        if blk.t_at.size:  # the terms l = 1 .. d - 1: denominators S0 - (l / d) T0
            t0 = np.asarray(F.ev_op @ r[L.ev])  # (K, A) summed w exp(eta) of the events
            den = s0.ravel()[blk.t_at]
            den -= blk.t_f * t0.ravel()[blk.t_at]
            ll -= np.bincount(blk.t_a, blk.t_w * np.log(den), minlength=A)
            inv = blk.t_w / den
            c.ravel()[blk.t_key] += np.add.reduceat(inv, blk.t_run)
            inv *= blk.t_f
            bk = work.times(3, A)
            bk.fill(0.0)
            bk.ravel()[blk.t_key] = np.add.reduceat(inv, blk.t_run)
    if not with_score:
        return ll, np.zeros((A, 0))
    # the score is sum over events of w z less Z' v, v_i = r_i sum_{k: i at risk} c_k, and
    # plus, for an event row at a tied time, r_i times its time's sum of (l / d) wavg / den
    cum = _forward_cum(L, c, work.times(0, A, 1))
    v = np.take(cum, L.b_idx, axis=0, out=work.rows(1, A))
    if L.late_entry:
        v -= np.take(cum, L.a_idx, axis=0, out=work.rows(2, A))
    v *= r
    score = blk.xwe1 - v.T @ F.Z1
    if bk is not None:
        score += (r[L.ev] * bk[F.ev_k]).T @ F.Z_ev
    return ll, score[:, :-1]


def _reverse_cum(L: Layout, contrib: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Risk-set sums (K, A) into ``out``: the reverse cumulative sums over event times of
    ``contrib``, restarted at every stratum (``layout._risk_sums``, column-wise)."""
    K = contrib.shape[0]
    if L.k_bounds.size <= _FEW_STRATA + 1:
        bounds = L.k_bounds.tolist()
        for lo, hi in zip(bounds[:-1], bounds[1:], strict=True):
            np.cumsum(contrib[lo:hi][::-1], axis=0, out=out[lo:hi][::-1])
        return out
    rev = np.zeros((K + 1, contrib.shape[1]), dtype=np.longdouble)
    rev[:-1] = np.cumsum(contrib[::-1].astype(np.longdouble), axis=0)[::-1]
    out[:] = rev[:-1] - rev[L.seg_end]
    return out


def _forward_cum(L: Layout, c: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    """(K + 1, A) into ``out``: the cumulative sums over event times of ``c`` (K, A) within
    each stratum, zero-padded in front (``layout._forward_cum``, column-wise)."""
    K = c.shape[0]
    if out is None:
        out = np.empty((K + 1, c.shape[1]))
    out[0] = 0.0
    if L.k_bounds.size <= _FEW_STRATA + 1:
        bounds = L.k_bounds.tolist()
        for lo, hi in zip(bounds[:-1], bounds[1:], strict=True):
            np.cumsum(c[lo:hi], axis=0, out=out[lo + 1 : hi + 1])
        return out
    cum = np.zeros((K + 1, c.shape[1]), dtype=np.longdouble)
    cum[1:] = np.cumsum(c.astype(np.longdouble), axis=0)
    out[1:] = cum[1:] - cum[L.seg_start]
    return out
