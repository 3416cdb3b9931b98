"""The Fine–Gray model fitted without the counting-process expansion.

The expansion (``unbin.models.competing``'s module docstring) keeps a competing-event person j
in the risk set after T_j with one row per later event time t_k of the event of interest,
weighted ``w_j Q(t_k) / Q(T_j)``, ``Q(t) = G(t-) H(t)`` (censoring survival just before t
times the entry distribution at t; rows with ``Q(T_j) = 0`` or ``Q(t_k) = 0`` are not built).
Since the weight factorises, the risk-set sums at an event time t_k of stratum s are

    S_m(t_k) = sum_{i: entry_i < t_k <= T_i} w_i r_i x_i^m
               + Q(t_k) * sum_{j competing in s, T_j < t_k} w_j r_j x_j^m / Q(T_j)

(r = exp(eta), m = 0, 1, 2): the first sum is the ordinary Cox risk set of the sample's own
rows, the second a running sum over the competing times times the current ``Q``. Every sum
the expansion's Cox fit forms is therefore one over the n sample rows: the score and the
Gram part of the information weight each row by ``r_i`` times the sum of the event-time
weights c_k over its own risk range plus, for a competing person, ``Q(T_j)^-1`` times the sum of
``Q(t_k) c_k`` over the later event times (a suffix sum). Time O(n log n) (one sort of the
event times), memory O(n p); the fit, its log partial likelihood, information, Efron and
Breslow ties, case weights, strata and delayed entry are those of the expansion's weighted
Cox fit (``tests/models/test_fine_gray.py`` compares them with the expansion refitted by the
Cox engine and by lifelines).

:class:`Layout` holds what depends on the sample only (made once per outcome, kept in its
cache); :func:`fit` is Newton's method with step halving and the Cox engine's stopping rule
(the next step would change no row's linear predictor by more than ``100 * tol``; that step
is then taken, the log-likelihood its quadratic prediction, the covariance the inverse
information at the last point); :func:`score_terms` gives each person's Cox score residual
summed over what would be their expanded rows, and :func:`spanned_sums` the sums the
weights' estimation terms need (``unbin.models.competing.weight_estimation_scores``).
Bootstrap replicates are refitted from the full-sample estimate: :func:`fit_near` from the
replicate's own information, :func:`fit_replicate` from the full sample's (:func:`near_start`,
prepared once per design), both by the Cox engine's secant driver.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from types import ModuleType

import numpy as np
import pandas as pd
from scipy import linalg

from . import compiled
from .cox.fit import newton_step, secant_refit, secant_start

# From this many sample rows the risk-set sums and row weights run compiled
# (``compiled/fine_gray_sums.py``, the same numbers bit for bit): below it the numpy path,
# so small samples never import numba.
SUMS_FROM_ROWS = 20_000


@dataclass(frozen=True)
class Layout:
    """One competing-risks sample laid out for the Fine–Gray fit (independent of X).

    Event times t_k (k = 0..K-1) are the distinct times of the event of interest within each
    stratum, ordered by stratum then time; ``k_bounds`` gives each stratum's range of k."""

    n: int
    w: np.ndarray  # (n,) case weights
    rows: np.ndarray  # sample rows at risk at some event time
    b: np.ndarray  # (rows,) last event time (index k) at or before the row's time
    late: np.ndarray  # positions (in rows) of the rows entering after their stratum's first t_k
    a: np.ndarray  # (late,) last event time at or before their entry
    comp: np.ndarray  # competing-event rows kept after their time (Q(T_j) > 0, later t_k)
    comp_c: np.ndarray  # (comp,) their first event time after T_j
    comp_qinv: np.ndarray  # (comp,) 1 / Q(T_j)
    Q: np.ndarray  # (K,) Q(t_k)
    ev: np.ndarray  # rows with the event of interest
    ev_k: np.ndarray  # (ev,) their event time
    wsum: np.ndarray  # (K,) summed weight of the events at t_k
    d: np.ndarray  # (K,) events at t_k
    tie_ev: np.ndarray  # positions (in ev) of the events at times holding ties
    tie_k: np.ndarray  # (tie_ev,) their event time
    tie_f: np.ndarray  # (tie_ev,) Efron's fraction l / d_k
    tie_wavg: np.ndarray  # (tie_ev,) mean event weight of their time
    k_bounds: np.ndarray  # first event-time index of each stratum with events, then K
    k_time: np.ndarray  # (K,) t_k
    k_code: np.ndarray  # (K,) stratum code of t_k
    k_label: np.ndarray  # (K,) stratum label of t_k
    codes: np.ndarray | None  # (n,) stratum codes (None: one stratum)
    expanded_rows: int  # rows the counting-process expansion would have

    @property
    def K(self) -> int:
        return int(self.k_time.size)

    @property
    def tied(self) -> bool:
        return self.tie_ev.size > 0


def _count_at_most(keys: np.ndarray, q: np.ndarray, size: int) -> np.ndarray:
    """``np.searchsorted(keys, q, side="right")`` for sorted non-negative integer ``keys`` and
    integer queries ``q`` in ``[0, size)``: by a table of counts when ``size`` is small next to
    the queries (a gather per query instead of a binary search), else by the search."""
    if size > 4 * (q.size + keys.size) + 1024:
        return np.searchsorted(keys, q, side="right")
    table = np.cumsum(np.bincount(keys, minlength=size)[:size])
    return table[q]


def prepare(time: np.ndarray, cause: np.ndarray, event_of_interest: int, *,
            entry: np.ndarray | None, weights: np.ndarray | None,
            strata: np.ndarray | None,
            Q_at: Callable[[np.ndarray], np.ndarray],
            searched: tuple[np.ndarray, np.ndarray, np.ndarray | None] | None = None
            ) -> Layout:
    """The layout of one sample; ``Q_at(at)`` gives ``G(at-) H(at)`` for an array of times.
    ``searched``: the distinct times of the event of interest and each row's count of them at
    or before its time and its entry, when the caller has them (a bootstrap replicate, from
    the full sample's: ``unbin.models.competing``)."""
    t = np.asarray(time, dtype=float)
    c = np.asarray(cause, dtype=float)
    n = t.size
    w = np.ones(n) if weights is None else np.asarray(weights, dtype=float)
    if strata is None:
        codes = None
        labels = np.array([0])
        code = np.zeros(n, dtype=np.int64)
    else:
        fc, uniq = pd.factorize(np.asarray(strata), sort=True)
        codes = fc.astype(np.int64)
        labels = np.asarray(uniq)
        code = codes
    mine = c == event_of_interest
    ev_all = np.flatnonzero(mine)
    # event times by (stratum, time): integer keys code * span + rank of the time
    if searched is None:
        values = np.unique(t[ev_all])
        upto_t = np.searchsorted(values, t, side="right")
        upto_e = (None if entry is None
                  else np.searchsorted(values, np.asarray(entry, dtype=float), side="right"))
    else:
        values, upto_t, upto_e = searched
    span = np.int64(values.size + 1)
    ev_key = code[ev_all] * span + upto_t[ev_all]  # an event's count is its rank + 1
    k_key, ev_k = np.unique(ev_key, return_inverse=True)
    ev_k = ev_k.reshape(-1)
    K = k_key.size
    k_code = k_key // span
    k_time = values[k_key % span - 1] if K else np.zeros(0)
    k_new = np.ones(K, dtype=bool)
    k_new[1:] = k_code[1:] != k_code[:-1]
    k_bounds = np.r_[np.flatnonzero(k_new), K]
    size = int(code.max() + 1) * int(span) if n else 1
    seg_start = _count_at_most(k_key, code * span, size)  # per row
    # last event time of the row's stratum at or before its time / its entry
    b = _count_at_most(k_key, code * span + upto_t, size) - 1
    if upto_e is None:
        a = seg_start - 1
    else:
        a = _count_at_most(k_key, code * span + upto_e, size) - 1
        a = np.maximum(a, seg_start - 1)
    at_risk = b > a
    rows = np.flatnonzero(at_risk)
    late_all = at_risk & (a >= seg_start)
    late = np.flatnonzero(late_all[rows])
    d = np.bincount(ev_k, minlength=K)
    wsum = np.bincount(ev_k, w[ev_all], K)
    tied = d > 1
    order = np.argsort(ev_k, kind="stable")
    tie_ev = order[tied[ev_k[order]]]
    tie_k = ev_k[tie_ev]
    first = np.searchsorted(tie_k, tie_k, side="left")
    tie_f = (np.arange(tie_ev.size) - first) / np.maximum(d[tie_k], 1)
    tie_wavg = (wsum / np.maximum(d, 1))[tie_k]

    competing = np.flatnonzero((c != 0) & ~mine)
    # Q at the event times, the competing times and the distinct event times (one call)
    Q_cat = np.asarray(Q_at(np.concatenate([k_time, t[competing], values])), dtype=float)
    Q, Qj, Q_all = np.split(Q_cat, [K, K + competing.size])
    seg_end = np.searchsorted(k_key, (code + 1) * span, side="left")
    cc = b[competing] + 1
    later = cc < seg_end[competing]
    keep = later & (Qj > 0)
    comp, comp_c = competing[keep], cc[keep]
    # the expansion's size: every competing event with Q(T_j) > 0 gets a row per later
    # distinct time of the event of interest (over all strata) where Q > 0
    pos_after = np.r_[np.cumsum((Q_all > 0)[::-1])[::-1], 0]
    j0 = upto_t[competing]
    expanded_rows = n + int(np.sum(np.where(Qj > 0, pos_after[j0], 0)))
    return Layout(
        n=n, w=w, rows=rows, b=b[rows], late=late, a=a[rows][late], comp=comp, comp_c=comp_c,
        comp_qinv=1.0 / Qj[keep], Q=Q, ev=ev_all, ev_k=ev_k, wsum=wsum, d=d,
        tie_ev=tie_ev, tie_k=tie_k, tie_f=tie_f, tie_wavg=tie_wavg, k_bounds=k_bounds,
        k_time=k_time, k_code=k_code, k_label=labels[k_code] if K else labels[:0], codes=codes,
        expanded_rows=expanded_rows,
    )


def _rev_cum(L: Layout, v: np.ndarray) -> np.ndarray:
    """Per event time, the sum of ``v`` (K x q) over the later event times of its stratum,
    itself included."""
    out = np.empty_like(v)
    for lo, hi in zip(L.k_bounds[:-1], L.k_bounds[1:], strict=True):
        out[lo:hi] = np.cumsum(v[lo:hi][::-1], axis=0)[::-1]
    return out


def _fwd_cum(L: Layout, v: np.ndarray) -> np.ndarray:
    """Per event time, the sum of ``v`` over the earlier event times of its stratum, itself
    included."""
    out = np.empty_like(v)
    for lo, hi in zip(L.k_bounds[:-1], L.k_bounds[1:], strict=True):
        out[lo:hi] = np.cumsum(v[lo:hi], axis=0)
    return out


def _bins(idx: np.ndarray, v: np.ndarray, K: int) -> np.ndarray:
    """Sums of the rows of ``v`` (m x q) by ``idx``: K x q."""
    return np.column_stack([np.bincount(idx, v[:, j], K) for j in range(v.shape[1])])


def _kernels(L: Layout) -> ModuleType | None:
    """The compiled sums' module when the sample is large enough (``SUMS_FROM_ROWS``), else
    None."""
    if not compiled.wanted(L.n, SUMS_FROM_ROWS):
        return None
    from .compiled import fine_gray_sums

    return fine_gray_sums


def _layout_args(L: Layout) -> tuple[np.ndarray, ...]:
    return (L.rows, L.b, L.late, L.a, L.comp, L.comp_c, L.comp_qinv, L.Q, L.k_bounds)


def risk_sums(L: Layout, r: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """``S(t_k)`` (K x q) of the module docstring for the columns ``cols`` (n x q) weighted by
    ``r`` (n,; case weight included)."""
    kernels = _kernels(L)
    if kernels is not None:
        return np.asarray(kernels.risk_sums(np.ascontiguousarray(r, dtype=float),
                                            np.ascontiguousarray(cols, dtype=float),
                                            *_layout_args(L)))
    K = L.K
    rc = r[:, None] * cols
    own = rc[L.rows]
    contrib = _bins(L.b, own, K)
    if L.late.size:
        contrib -= _bins(L.a, own[L.late], K)
    S = _rev_cum(L, contrib)
    if L.comp.size:
        add = _bins(L.comp_c, rc[L.comp] * L.comp_qinv[:, None], K)
        S += L.Q[:, None] * _fwd_cum(L, add)
    return S


def risk_sum0(L: Layout, r: np.ndarray) -> np.ndarray:
    """``S0(t_k)`` (K,): :func:`risk_sums` of the column of ones, without forming it (the same
    sums in the same order)."""
    kernels = _kernels(L)
    if kernels is not None:
        return np.asarray(kernels.risk_sum0(np.ascontiguousarray(r, dtype=float),
                                            *_layout_args(L)))
    K = L.K
    contrib = np.bincount(L.b, r[L.rows], K)
    if L.late.size:
        contrib -= np.bincount(L.a, r[L.rows[L.late]], K)
    S = np.empty(K)
    for lo, hi in zip(L.k_bounds[:-1], L.k_bounds[1:], strict=True):
        S[lo:hi] = np.cumsum(contrib[lo:hi][::-1])[::-1]
    if L.comp.size:
        add = np.bincount(L.comp_c, r[L.comp] * L.comp_qinv, K)
        cum = np.empty(K)
        for lo, hi in zip(L.k_bounds[:-1], L.k_bounds[1:], strict=True):
            cum[lo:hi] = np.cumsum(add[lo:hi])
        S += L.Q * cum
    return S


def row_weights(L: Layout, r: np.ndarray, c: np.ndarray) -> np.ndarray:
    """Per sample row, ``r_i`` times the sum of ``c`` (K,) over the event times at which the row
    or its expanded copies are at risk, each copy weighted by its ``Q(t_k) / Q(T_j)``."""
    kernels = _kernels(L)
    if kernels is not None:
        return np.asarray(kernels.row_weights(np.ascontiguousarray(r, dtype=float),
                                              np.ascontiguousarray(c, dtype=float),
                                              *_layout_args(L)))
    cum = _fwd_cum(L, c[:, None])[:, 0]
    s = np.zeros(L.n)
    s[L.rows] = cum[L.b]
    if L.late.size:
        s[L.rows[L.late]] -= cum[L.a]
    if L.comp.size:
        suffix = _rev_cum(L, (L.Q * c)[:, None])[:, 0]
        s[L.comp] += L.comp_qinv * suffix[L.comp_c]
    return r * s


def stratum_shift(L: Layout, eta: np.ndarray) -> np.ndarray:
    """``eta`` less its largest value within each stratum (the partial likelihood does not
    change)."""
    if eta.size == 0:
        return eta
    if L.codes is None:
        return eta - eta.max()
    top = np.full(int(L.codes.max()) + 1, -np.inf)
    np.maximum.at(top, L.codes, eta)
    return eta - top[L.codes]


@dataclass
class _Point:
    loglik: float
    r: np.ndarray
    S0: np.ndarray
    den: np.ndarray | None  # Efron: each tied event's denominator S0 - f T0


def _point(L: Layout, X: np.ndarray, beta: np.ndarray, efron: bool) -> _Point:
    eta = stratum_shift(L, X @ beta) if X.shape[1] else np.zeros(L.n)
    with np.errstate(over="ignore", under="ignore"):
        r = L.w * np.exp(eta)
    S0 = risk_sum0(L, r)
    loglik = float(L.w[L.ev] @ eta[L.ev])
    den = None
    with np.errstate(divide="ignore", invalid="ignore"):
        if efron and L.tied:
            T0 = np.bincount(L.ev_k[L.tie_ev], r[L.ev[L.tie_ev]], L.K)
            den = S0[L.tie_k] - L.tie_f * T0[L.tie_k]
            untied = np.where(L.d > 1, 0.0, L.wsum)
            loglik -= float(untied @ np.log(S0) + L.tie_wavg @ np.log(den))
        else:
            loglik -= float(L.wsum @ np.log(S0))
    return _Point(loglik, r, S0, den)


def _score_weights(L: Layout, pt: _Point) -> np.ndarray:
    """Per sample row, ``v_i = r_i`` times the sum over its risk sets of each event time's
    ``c_k`` (summed event weight over ``S0``; Efron: one term per tied event, less its tied
    share): the score is ``X' (w at the events) - X' v``, the information's first part
    ``X' diag(v) X``. Needs the sums of r alone."""
    r, S0 = pt.r, pt.S0
    if pt.den is None:
        return row_weights(L, r, L.wsum / S0)
    tied_time = L.d > 1
    c = np.where(tied_time, 0.0, L.wsum) / S0
    w_inv = L.tie_wavg * (1.0 / pt.den)
    c[tied_time] = 0.0
    c += np.bincount(L.tie_k, w_inv, L.K)
    bk = np.bincount(L.tie_k, L.tie_f * w_inv, L.K)
    v = row_weights(L, r, c)
    tie_rows = L.ev[L.tie_ev]
    v[tie_rows] -= r[tie_rows] * bk[L.tie_k]  # distinct rows: ufunc.at's result, faster
    return v


def _score(L: Layout, X: np.ndarray, pt: _Point, events: np.ndarray | None = None
           ) -> np.ndarray:
    """The score at the point, from the sums of r alone (about a third of an evaluation);
    ``events``: ``X[L.ev].T @ L.w[L.ev]`` when the caller has it."""
    if events is None:
        events = X[L.ev].T @ L.w[L.ev]
    return events - X.T @ _score_weights(L, pt)


def _evaluate(L: Layout, X: np.ndarray, beta: np.ndarray, efron: bool,
              pt: _Point | None = None) -> tuple[float, np.ndarray, np.ndarray]:
    """Log partial likelihood, score and observed information at ``beta`` (the expansion's
    weighted Cox fit's, term by term: Efron's tied denominators use the tied events' mean
    weight); ``pt``: the point at ``beta`` when already evaluated."""
    pt = _point(L, X, beta, efron) if pt is None else pt
    p = X.shape[1]
    if not np.isfinite(pt.loglik) or p == 0:
        return pt.loglik, np.zeros(p), np.zeros((p, p))
    r, S0 = pt.r, pt.S0
    X1 = np.column_stack([np.ones(L.n), X])
    S = risk_sums(L, r, X1)
    S1 = S[:, 1:]
    v = _score_weights(L, pt)
    if pt.den is not None:
        tied_time = L.d > 1
        a = np.where(tied_time, 0.0, L.wsum) / S0**2
        inv = 1.0 / pt.den
        w_inv = L.tie_wavg * inv
        fw_inv = L.tie_f * w_inv
        tie_rows = L.ev[L.tie_ev]
        a[tied_time] = 0.0
        a0 = np.bincount(L.tie_k, w_inv * inv, L.K)
        a1 = np.bincount(L.tie_k, fw_inv * inv, L.K)
        a2 = np.bincount(L.tie_k, fw_inv * L.tie_f * inv, L.K)
        a += a0
        T1 = _bins(L.ev_k[L.tie_ev], (r[tie_rows])[:, None] * X[tie_rows], L.K)
        cross = (S1 * a1[:, None]).T @ T1
        info = X.T @ (X * v[:, None]) - (S1 * a[:, None]).T @ S1 + cross + cross.T \
            - (T1 * a2[:, None]).T @ T1
    else:
        info = X.T @ (X * v[:, None]) - (S1 * (L.wsum / S0 / S0)[:, None]).T @ S1
    score = X[L.ev].T @ L.w[L.ev] - X.T @ v
    return pt.loglik, score, (info + info.T) / 2.0


@dataclass(frozen=True)
class Fit:
    """Coefficients and model-based covariance on the scale of X, the log partial likelihood
    at the estimate and at zero, Newton steps taken, and ``message`` ("" when converged)."""

    coef: np.ndarray
    cov: np.ndarray
    loglik: float
    loglik0: float
    iterations: int
    message: str

    @property
    def converged(self) -> bool:
        return not self.message


def _standardised(L: Layout, X: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """X centred and scaled by its mean and standard deviation over the sample's own rows, the
    standard deviations (0 for a constant column) and the scales (1 there)."""
    Xs, sd, scale, _ = _standardised_with_mean(L, X)
    return Xs, sd, scale


def _standardised_with_mean(L: Layout, X: np.ndarray
                            ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """:func:`_standardised` and the means it centred at."""
    X = np.asarray(X, dtype=float).reshape(L.n, -1)
    p = X.shape[1]
    used = X[L.rows] if L.rows.size else X
    mean = used.mean(axis=0) if used.shape[0] else np.zeros(p)
    Xs = X - mean
    sd = np.sqrt(np.mean(Xs[L.rows] ** 2, axis=0)) if L.rows.size else np.zeros(p)
    sd[sd <= 1e-12 * np.maximum(1.0, np.abs(mean))] = 0.0
    scale = np.where(sd > 0, sd, 1.0)
    Xs /= scale
    return Xs, sd, scale, mean


def fit_near(L: Layout, X: np.ndarray, init: np.ndarray, *, ties: str = "efron",
             max_iter: int = 50, tol: float = 1e-9) -> np.ndarray | None:
    """Coefficients only, for a refit that starts close to its estimate (a bootstrap replicate
    started at the full-sample estimate ``init``), as the Cox engine's
    ``unbin.models.cox.refit_near``: one Newton step with the information at ``init``, then
    steps that evaluate only the log partial likelihood and the score, the information
    corrected by a secant (BFGS) update from each step (the engine's driver,
    ``unbin.models.cox.fit.secant_refit``). Stops when the next step would change
    no row's linear predictor by more than ``10 * tol`` (that step is taken): a tenth of
    :func:`fit`'s bound, because the refits this replaces were Newton's, whose last step
    leaves an error far below the bound, while a secant step leaves a fraction of it (at
    ``100 * tol`` the demo's decision thresholds moved by 3e-8 against refits to 1e-13, at
    ``10 * tol`` by 8e-10, as Newton's did). None when it does not settle, the likelihood
    falls, a column is constant or the information is singular: the caller then fits with
    :func:`fit`."""
    efron = ties == "efron"
    Xs, sd, scale = _standardised(L, X)
    init = np.asarray(init, dtype=float)
    if Xs.shape[1] == 0 or np.any(sd == 0) or init.shape != scale.shape \
            or not np.isfinite(init).all():
        return None
    beta = init * scale
    ll, score, info = _evaluate(L, Xs, beta, efron)
    H = secant_start(ll, score, info)
    if H is None:
        return None
    settle = 10.0 * tol

    def score_at(b: np.ndarray) -> tuple[float, np.ndarray]:
        pt = _point(L, Xs, b, efron)
        if not np.isfinite(pt.loglik):
            return pt.loglik, score
        return pt.loglik, _score(L, Xs, pt)

    end = secant_refit(beta, ll, score, H, score_at,
                       lambda step: float(np.abs(Xs @ step).max()) <= settle, tol, max_iter)
    return None if end is None else np.asarray(end / scale)


@dataclass(frozen=True)
class NearStart:
    """One design of a full sample prepared once for the refits of its bootstrap replicates
    (:func:`fit_replicate`), as the Cox engine's ``unbin.models.cox.near_start``: a replicate's
    rows are the sample's, so it takes the sample's centring and scaling (the partial
    likelihood is invariant to both) and, in its first step, the sample's information at the
    start per unit of summed event weight, scaled to its own (the difference is of the order
    of the replicate's sampling error, which the secant updates correct; the score is always
    the replicate's own, so the maximum is too)."""

    n: int  # rows of the full sample
    mean: np.ndarray  # (p,) centre of each column
    scale: np.ndarray  # (p,) its standard deviation
    beta: np.ndarray  # (p,) the start on the standardised scale
    H: np.ndarray  # (p, p) inverse information at the start times the summed event weight
    efron: bool


def near_start(L: Layout, X: np.ndarray, init: np.ndarray, *, ties: str = "efron"
               ) -> NearStart | None:
    """Prepare the design ``X`` of the full sample laid out in ``L`` for the refits of its
    replicates started at ``init`` (on X's scale, the full sample's estimate): one full
    evaluation here instead of one per replicate. None when ``init`` is not finite, X has no
    columns or a constant one, or the information at ``init`` is not positive definite (the
    replicates then fit with :func:`fit_near`)."""
    efron = ties == "efron"
    Xs, sd, scale, mean = _standardised_with_mean(L, X)
    init = np.asarray(init, dtype=float)
    if Xs.shape[1] == 0 or np.any(sd == 0) or init.shape != scale.shape \
            or not np.isfinite(init).all() or L.K == 0:
        return None
    beta = init * scale
    H = secant_start(*_evaluate(L, Xs, beta, efron))
    if H is None:
        return None
    return NearStart(L.n, mean, scale, beta, H * float(L.wsum.sum()), efron)


# A replicate refit from the full sample's information stops once the next step would change no
# row's linear predictor by more than this times tol (that step taken): half fit_near's bound,
# because the first information is rougher (another sample's), so the secant information at the
# last step is too. On the demo's decision bootstrap (lindenfeld, death_egfr, 40 replicates x
# 3 models) the refits ended at most 4.2e-10 from Newton's fit to tol 1e-13 on any row's linear
# predictor at 5 x tol (and at 3 x tol), 1.9e-9 at 10 x tol; fit_near from the replicate's own
# information, at its 10 x tol, 1.0e-9.
_REPLICATE_SETTLE = 5.0


def fit_replicate(start: NearStart, X: np.ndarray, rows: np.ndarray, L: Layout, *,
                  tol: float = 1e-9, max_iter: int = 50) -> np.ndarray | None:
    """Coefficients of one bootstrap replicate of ``start``'s sample: its drawn rows ``rows``
    (indices into the full design ``X`` that ``start`` was prepared from, a row drawn k times
    repeated k times or given count weights) laid out in ``L`` (:func:`prepare` of those rows).
    :func:`fit_near`'s secant steps from the full-sample estimate, without the replicate's own
    column statistics and without evaluating its information: the first step takes the full
    sample's, scaled to the replicate's summed event weight (:class:`NearStart`); the stopping
    bound is :func:`fit_near`'s. None when the steps do not settle, the likelihood falls or a
    column is constant among the replicate's rows at risk (the caller then fits with
    :func:`fit`, which reports that)."""
    X = np.asarray(X, dtype=float)
    if X.shape != (start.n, start.mean.size):
        raise ValueError(f"X has shape {X.shape} but the start was prepared from a design of "
                         f"shape ({start.n}, {start.mean.size}); pass the same design")
    if L.K == 0 or L.rows.size == 0:
        return None
    inv = 1.0 / start.scale
    kernels = _kernels(L)
    if kernels is not None:
        Xs, bounds = kernels.gather_standardised(X, np.asarray(rows, dtype=np.int64),
                                                 start.mean, inv, L.rows)
        hi, lo = bounds[0], bounds[1]
    else:
        Xs = X[rows]
        Xs -= start.mean
        Xs *= inv
        used = Xs[L.rows]
        hi, lo = used.max(axis=0), used.min(axis=0)
    # a column constant among the rows at risk (as _standardised's test, on this scale) makes
    # the information singular
    top = np.maximum(np.abs(hi), np.abs(lo)) + np.abs(start.mean) * inv
    if np.any(hi - lo <= 1e-12 * np.maximum(inv, top)):
        return None
    efron = start.efron
    pt = _point(L, Xs, start.beta, efron)
    if not np.isfinite(pt.loglik):
        return None
    events = Xs[L.ev].T @ L.w[L.ev]
    score = _score(L, Xs, pt, events)
    if not np.isfinite(score).all():
        return None
    settle = _REPLICATE_SETTLE * tol

    def score_at(b: np.ndarray) -> tuple[float, np.ndarray]:
        q = _point(L, Xs, b, efron)
        if not np.isfinite(q.loglik):
            return q.loglik, score
        return q.loglik, _score(L, Xs, q, events)

    end = secant_refit(start.beta, pt.loglik, score, start.H / float(L.wsum.sum()), score_at,
                       lambda step: float(np.abs(Xs @ step).max()) <= settle, tol, max_iter)
    return None if end is None else np.asarray(end / start.scale)


def fit(L: Layout, X: np.ndarray, *, ties: str = "efron", init: np.ndarray | None = None,
        max_iter: int = 50, tol: float = 1e-9) -> Fit:
    """Newton's method with step halving (the Cox engine's rules; module docstring) on the
    centred and scaled columns of X; ``init``: starting values on the scale of X."""
    efron = ties == "efron"
    Xs, sd, scale = _standardised(L, X)
    p = Xs.shape[1]
    nan = np.full(p, np.nan), np.full((p, p), np.nan)
    pt0 = _point(L, Xs, np.zeros(p), efron)
    ll0 = pt0.loglik
    if p == 0:
        return Fit(np.zeros(0), np.zeros((0, 0)), ll0, ll0, 0, "")
    if np.any(sd == 0):
        const = np.flatnonzero(sd == 0).tolist()
        return Fit(*nan, ll0, ll0, 0, f"information matrix is singular: column(s) {const} "
                   "are constant among the rows at risk; drop them")
    beta = np.zeros(p) if init is None else np.asarray(init, dtype=float) * scale
    # the point at zero is already evaluated (ll0)
    ll, score, info = _evaluate(L, Xs, beta, efron, pt0 if init is None else None)
    if not np.isfinite(ll):
        beta = np.zeros(p)
        ll, score, info = _evaluate(L, Xs, beta, efron, pt0)
    settle = 100.0 * tol
    iterations = flat = 0
    last_change = float("nan")
    message = ""
    while True:
        step = newton_step(info, score)
        if step is None:
            return Fit(*nan, ll, ll0, iterations, "information matrix is singular (or not "
                       "positive definite): columns are (nearly) collinear, or a coefficient "
                       "is diverging; drop or combine those columns")
        moving = _diverging(step, beta, tol)
        if iterations:
            levelled = abs(last_change) <= tol * max(1.0, abs(ll))
            flat = flat + 1 if levelled else 0
            if levelled and moving.size:
                message = (f"coefficient(s) of column(s) {moving.tolist()} diverge while the "
                           "log partial likelihood has levelled off (monotone likelihood: e.g. "
                           "no events in one group of a binary column); the estimate is "
                           "infinite - merge groups or drop the column")
                break
            if flat >= 3 or float(np.abs(Xs @ step).max()) <= settle:
                break
        elif init is not None and float(np.abs(Xs @ step).max()) <= settle:
            break
        if iterations >= max_iter:
            return Fit(beta / scale, *nan[1:], ll, ll0, iterations,
                       f"no convergence after {max_iter} Newton iteration(s) (last change in "
                       f"log partial likelihood {last_change:.3g}); look for a covariate with "
                       "extreme values or separation")
        iterations += 1
        halving = 0
        while True:
            cand = beta + step
            pt_c = _point(L, Xs, cand, efron)
            ll_c = pt_c.loglik
            if np.isfinite(ll_c) and ll_c >= ll - 1e-12 * max(1.0, abs(ll)):
                break
            halving += 1
            step = step / 2.0
            if halving > 40:
                return Fit(beta / scale, *nan[1:], ll, ll0, iterations,
                           "step halving could not improve the log partial likelihood "
                           f"(at {ll:.6g}); the model may be overparameterised or a covariate "
                           "may have extreme values - rescale or drop columns")
        last_change = ll_c - ll
        beta = cand
        ll, score, info = _evaluate(L, Xs, beta, efron, pt_c)
    if not message:
        final = newton_step(info, score)
        assert final is not None
        ll += float(score @ final) / 2.0
        beta = beta + final
    try:
        cov_s = linalg.inv(info, check_finite=True)
    except (linalg.LinAlgError, ValueError):
        cov_s = nan[1]
        message = message or "the information matrix could not be inverted at the estimate"
    return Fit(beta / scale, cov_s / np.outer(scale, scale), float(ll), float(ll0), iterations,
               message)


def _diverging(step: np.ndarray, beta: np.ndarray, tol: float) -> np.ndarray:
    """Columns whose Newton step keeps them moving (the Cox engine's rule)."""
    big = (np.abs(step) > max(1e-4, 100.0 * tol)) & (np.abs(step) > np.sqrt(tol) * np.abs(beta))
    return np.flatnonzero(big)


@dataclass(frozen=True)
class Increments:
    """At given coefficients: per event time the hazard increments ``A`` (K,) and ``B`` (K x p,
    ``A`` times the risk-set means; Efron: summed over each time's tied steps), the tied events'
    own shares ``A_ev``, ``B_ev``, the mean risk-set mean ``xavg``, and ``e = exp(eta)``
    (shifted within strata, unweighted)."""

    A: np.ndarray
    B: np.ndarray
    A_ev: np.ndarray
    B_ev: np.ndarray
    xavg: np.ndarray
    e: np.ndarray


def increments(L: Layout, X: np.ndarray, coef: np.ndarray, efron: bool) -> Increments:
    """The hazard increments of the fitted model (as the Cox score residuals define them)."""
    p = X.shape[1]
    eta = stratum_shift(L, X @ coef) if p else np.zeros(L.n)
    e = np.exp(eta)
    r = L.w * e
    S = risk_sums(L, r, np.column_stack([np.ones(L.n), X]))
    S0, S1 = S[:, 0], S[:, 1:]
    K = L.K
    A = L.wsum / S0
    xavg = S1 / S0[:, None]
    B = A[:, None] * xavg
    A_ev, B_ev = A.copy(), B.copy()
    if efron and L.tied:
        tied_time = np.flatnonzero(L.d > 1)
        rows = L.ev[L.tie_ev]
        T0 = np.bincount(L.tie_k, r[rows], K)
        T1 = _bins(L.tie_k, r[rows][:, None] * X[rows], K)
        kk, f = L.tie_k, L.tie_f
        S0l = S0[kk] - f * T0[kk]
        xbar = (S1[kk] - f[:, None] * T1[kk]) / S0l[:, None]
        h = L.tie_wavg / S0l
        own = 1.0 - f
        A[tied_time] = np.bincount(kk, h, K)[tied_time]
        B[tied_time] = _bins(kk, h[:, None] * xbar, K)[tied_time]
        A_ev[tied_time] = np.bincount(kk, own * h, K)[tied_time]
        B_ev[tied_time] = _bins(kk, (own * h)[:, None] * xbar, K)[tied_time]
        xavg[tied_time] = (_bins(kk, xbar, K) / np.maximum(L.d, 1)[:, None])[tied_time]
    return Increments(A, B, A_ev, B_ev, xavg, e)


@dataclass(frozen=True)
class AtEstimate:
    """What the score terms and the weights' estimation terms of one fit share: the design
    centred by its column means (the residuals do not change with a shift of a column) and the
    hazard increments at the estimate (:func:`increments`), computed once per fit."""

    X: np.ndarray
    inc: Increments


def at_estimate(L: Layout, X: np.ndarray, coef: np.ndarray, ties: str = "efron"
                ) -> AtEstimate:
    """:class:`AtEstimate` of the design ``X`` at ``coef``."""
    X = np.asarray(X, dtype=float).reshape(L.n, -1)
    X = X - X.mean(axis=0)
    return AtEstimate(X, increments(L, X, np.asarray(coef, dtype=float), ties == "efron"))


def score_terms(L: Layout, X: np.ndarray, coef: np.ndarray, ties: str = "efron",
                at: AtEstimate | None = None) -> np.ndarray:
    """Each person's weighted Cox score residual (n x p) summed over their own row and what
    would be their expanded rows: ``unbin.models.robust.cox_scores`` of the expansion, added up
    by person; ``at``: :func:`at_estimate` of the same design and coefficients, when the
    caller has it."""
    if at is None:
        at = at_estimate(L, X, coef, ties)
    X, inc = at.X, at.inc
    p = X.shape[1]
    U = np.zeros((L.n, p))
    cA = _fwd_cum(L, inc.A[:, None])[:, 0]
    cB = _fwd_cum(L, inc.B)
    own_a = np.zeros(L.n)
    own_b = np.zeros((L.n, p))
    own_a[L.rows] = cA[L.b]
    own_b[L.rows] = cB[L.b]
    if L.late.size:
        late = L.rows[L.late]
        own_a[late] -= cA[L.a]
        own_b[late] -= cB[L.a]
    U -= inc.e[:, None] * (X * own_a[:, None] - own_b)
    k = L.ev_k
    U[L.ev] += X[L.ev] - inc.xavg[k]
    U[L.ev] += inc.e[L.ev, None] * (X[L.ev] * (inc.A[k] - inc.A_ev[k])[:, None]
                                    - (inc.B[k] - inc.B_ev[k]))
    if L.comp.size:
        QA = _rev_cum(L, (L.Q * inc.A)[:, None])[:, 0]
        QB = _rev_cum(L, L.Q[:, None] * inc.B)
        j, cj = L.comp, L.comp_c
        U[j] -= (inc.e[j] * L.comp_qinv)[:, None] * (X[j] * QA[cj][:, None] - QB[cj])
    return U * L.w[:, None]


def spanned_sums(L: Layout, X: np.ndarray, coef: np.ndarray, time: np.ndarray,
                 grid: np.ndarray, ties: str = "efron") -> np.ndarray:
    """``q(u)`` on ``grid`` (G x p): the sum, over the expanded rows (j, t_k) with ``T_j <= u <
    t_k``, of each row's share ``a_jk = w_jk e_j (x_j A_k - B_k)`` of the score
    (``unbin.models.competing.weight_estimation_scores``), by stratum: the competing persons'
    running sums up to u times the event times' suffix sums after u."""
    X = np.asarray(X, dtype=float).reshape(L.n, -1)
    if not L.comp.size or X.shape[1] == 0:
        return np.zeros((grid.size, X.shape[1]))
    return spanned_sums_on(L, at_estimate(L, X, coef, ties), time, [grid])[0]


def spanned_sums_on(L: Layout, at: AtEstimate, time: np.ndarray,
                    grids: list[np.ndarray]) -> list[np.ndarray]:
    """:func:`spanned_sums` on each of ``grids`` from one :func:`at_estimate` (the competing
    persons' order and running sums and the event times' suffix sums made once for every
    grid)."""
    X, inc = at.X, at.inc
    p = X.shape[1]
    qs = [np.zeros((grid.size, p)) for grid in grids]
    if not L.comp.size or p == 0:
        return qs
    QA = _rev_cum(L, (L.Q * inc.A)[:, None])[:, 0]
    QB = _rev_cum(L, L.Q[:, None] * inc.B)
    m0 = L.w[L.comp] * inc.e[L.comp] * L.comp_qinv
    m1 = m0[:, None] * X[L.comp]
    comp_stratum = np.searchsorted(L.k_bounds, L.comp_c, side="right") - 1
    for s, (lo, hi) in enumerate(zip(L.k_bounds[:-1], L.k_bounds[1:], strict=True)):
        mine = np.flatnonzero(comp_stratum == s)
        if not mine.size:
            continue
        order = mine[np.argsort(time[L.comp[mine]], kind="stable")]
        Tj = time[L.comp[order]]
        c0 = np.r_[0.0, np.cumsum(m0[order])]
        c1 = np.vstack([np.zeros((1, p)), np.cumsum(m1[order], axis=0)])
        qa = np.r_[QA[lo:hi], 0.0]
        qb = np.vstack([QB[lo:hi], np.zeros((1, p))])
        for q, grid in zip(qs, grids, strict=True):
            upto = np.searchsorted(Tj, grid, side="right")  # persons with T_j <= u
            after = lo + np.searchsorted(L.k_time[lo:hi], grid, side="right")  # first t_k > u
            q += c1[upto] * qa[after - lo][:, None] - c0[upto][:, None] * qb[after - lo]
    return qs


def baseline(L: Layout, lp: np.ndarray) -> pd.DataFrame:
    """The Breslow baseline cumulative subdistribution hazard at covariates 0 (per stratum:
    columns ``stratum``, ``time``, ``cumhaz``), from the linear predictor ``lp`` of the sample
    rows, centred before ``exp`` (no underflow) and moved back."""
    centre = float(np.mean(lp)) if lp.size else 0.0
    eta = lp - centre
    shifted = stratum_shift(L, eta)
    S0 = risk_sum0(L, L.w * np.exp(shifted))
    shift = eta - shifted  # per row: its stratum's maximum
    k_shift = np.zeros(L.K)
    if L.K:
        codes = np.zeros(L.n, dtype=np.int64) if L.codes is None else L.codes
        top = np.zeros(int(codes.max()) + 1)
        top[codes] = shift
        k_shift = top[L.k_code]
    with np.errstate(over="ignore", under="ignore"):
        hazard = L.wsum / S0 * np.exp(-k_shift)
    cum = _fwd_cum(L, hazard[:, None])[:, 0] * np.exp(-centre)
    return pd.DataFrame({"stratum": L.k_label, "time": L.k_time, "cumhaz": cum})
