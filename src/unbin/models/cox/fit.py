"""The proportional-hazards engine: Cox partial likelihood on numpy arrays.

What it does
------------
``fit_cox`` maximises the Cox partial likelihood by Newton's method with step halving, with
Efron (default) or Breslow handling of tied event times, strata (a separate baseline hazard
per stratum), delayed entry (left truncation: a row is at risk at event time t when
``entry < t <= time``) and optional case weights. ``baseline_cumhaz`` gives the Breslow
estimate of the baseline cumulative hazard per stratum, ``predict_risk`` the absolute risk by a
horizon, and ``concordance`` Harrell's C in O(n log n). ``prepare_layout`` checks and sorts
one sample once for any number of fits of it (``fit_cox(..., layout=...)``), and
``concordance_order`` does the same for the C-indices of many scores of one sample.

How it is fast
--------------
The data are sorted once, and the covariates gathered once into a sorted, standardised
(n x (1 + p)) array whose first column is ones. Every event time t_k of every stratum gets an
index k (sorted by stratum, then time), and every row the range of indices ``(a_i, b_i]`` of
the event times at which it is at risk. A sparse (K x n) matrix with +1 at ``b_i`` and -1 at
``a_i``, times that array, followed by a reverse cumulative sum over event times, gives the
risk-set sums of ``w exp(eta)`` and ``w exp(eta) x`` at every event time in one sparse product
(the -1 removes rows that have not yet entered). The second derivatives never need
per-event-time p x p matrices: the sum over event times of ``c_k * sum_{i in R_k} r_i x_i x_i'``
equals ``X' diag(r_i * sum_{k: i in R_k} c_k) X``, one matrix product (in row blocks that stay
in cache; its first row is also the score's varying part), and the ``E[x] E[x]'`` part needs
only the (event times x p) risk-set sums. Memory is therefore a few n x p arrays; nothing of
size n x p x p (or n x p^2) is formed. Efron's tied-event terms touch only the event times
that hold ties (one entry per tied event, ``l/d`` fractions, summed with ``np.bincount``), so
there is no Python loop over event times or strata.

One sample, many models: the sort, the index ranges and the sparse operators depend on time,
event, entry, strata and weights only, never on X. ``prepare_layout`` builds them once; a fit
given that layout starts at gathering X, and its result is bit for bit the one it computes
when it lays the sample out itself. Harrell's C likewise keeps the time order and the tie
counts of (time, event) (``concordance_order``), so each score costs one sort by score and
O(n) passes per bit of n (see ``concordance``).

Few evaluations: with many events, Newton's method starts from a fit to a systematic subsample
(every 4th to 8th row in time order, itself started the same way when large), whose
information, scaled up, serves for the first full-data step; the fit then usually needs two
or three evaluations of the full information (the subsample's layout is kept with the full
one, so the fits that share a prepared layout share it too). It stops when the next Newton
step would change no row's linear predictor by more than ``100 * tol`` (so that no weight
``exp(eta)``, hence no part of the information, changes by more than about that fraction);
that last step is taken without a further evaluation.

Numerics
--------
Columns are centred and scaled internally (the partial likelihood is invariant to centring;
estimates are transformed back). The linear predictor is shifted by its maximum within each
stratum before ``exp`` (the partial likelihood is invariant to that too). The cumulative sums
over event times restart at every stratum: by a loop over up to 64 strata, beyond that by
subtracting running totals in extended precision (``np.longdouble``), so that one stratum's
sums do not lose digits to another's.

Failures
--------
Invalid input (event not 0/1, ``time <= entry``, non-finite values, non-positive weights)
raises ``ValueError`` naming the problem. Numerical trouble never raises and never returns a
silent NaN: ``CoxFit.converged`` is False and ``CoxFit.message`` says what happened and what
to try (iteration limit, singular information, diverging coefficient, non-finite likelihood).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import linalg, sparse

__all__ = [
    "CoxFit",
    "Layout",
    "TimeOrder",
    "baseline_cumhaz",
    "concordance",
    "concordance_order",
    "fit_cox",
    "predict_risk",
    "prepare_layout",
    "refit_near",
]


@dataclass(frozen=True)
class CoxFit:
    """Result of :func:`fit_cox`.

    ``coef`` are log hazard ratios per unit of each column of X; ``cov`` is the inverse of the
    observed information at ``coef``. ``loglik``/``loglik0`` are the log partial likelihood at
    ``coef`` and at zero (summed over strata). ``message`` is ``""`` when the fit is fine and
    otherwise says what went wrong and what to try. When the information matrix is singular,
    ``coef``/``cov`` are NaN (and ``message`` says so); when the iteration limit is reached or a
    coefficient diverges, they hold the last iterate. ``n`` counts the rows given, ``events``
    the rows with event = 1 (unweighted).
    """

    coef: np.ndarray
    cov: np.ndarray
    loglik: float
    loglik0: float
    iterations: int
    converged: bool
    message: str
    n: int
    events: int


# --------------------------------------------------------------------------- input checks


def _as_1d(name: str, values: Any, n: int | None, dtype: Any = float) -> np.ndarray:
    arr = np.asarray(values, dtype=dtype)
    if arr.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional, got shape {arr.shape}")
    if n is not None and arr.shape[0] != n:
        raise ValueError(f"{name} has {arr.shape[0]} values but X has {n} rows")
    return arr


def _check_finite(name: str, arr: np.ndarray) -> None:
    if arr.size == 0 or np.isfinite(np.add.reduce(arr, axis=None)):
        return  # a finite sum means no NaN or infinity (fast path)
    bad = ~np.isfinite(arr)
    if not bad.any():
        return
    if bad.any():
        first = int(np.flatnonzero(bad.reshape(bad.shape[0], -1).any(axis=1))[0])
        raise ValueError(
            f"{name} has {int(bad.sum())} missing or infinite value(s) (first at row {first}); "
            "drop or impute those rows before fitting"
        )


def _event_array(event: Any, n: int | None) -> np.ndarray:
    raw = np.asarray(event)
    if raw.ndim != 1 or (n is not None and raw.shape[0] != n):
        raise ValueError(f"event must be one-dimensional with {n} values, got shape {raw.shape}")
    if raw.dtype == bool:
        return raw
    num = np.asarray(raw, dtype=float)
    ok = (num == 0) | (num == 1)
    if not ok.all():
        bad = num[~ok][:3]
        raise ValueError(
            f"event must be 0/1 (or boolean); found {int((~ok).sum())} other value(s), "
            f"e.g. {bad.tolist()}"
        )
    return num == 1


def _design(X: Any) -> np.ndarray:
    arr = np.asarray(X, dtype=float)
    if arr.ndim != 2:
        raise ValueError(f"X must be a 2-D (n, p) array, got shape {arr.shape}")
    return arr


@dataclass(frozen=True)
class Layout:
    """The data sorted once, with the at-risk index ranges and the sparse risk-set operator.

    Made by :func:`prepare_layout` (or inside :func:`fit_cox`); it depends on time, event,
    entry, strata and weights only, never on X, so every model of one sample can share it.
    Treat it as opaque: its fields are the engine's working arrays.
    """

    order: np.ndarray  # rows of the input at risk at some event time, by (stratum, time)
    w: np.ndarray  # weights of kept rows (sorted)
    unit_w: bool  # no weights given (all ones)
    we: np.ndarray  # weight * event of kept rows
    ev: np.ndarray  # positions (in kept rows) of events, grouped by event time
    we_ev: np.ndarray  # weights of those events
    wavg: np.ndarray  # (K,) mean weight of the events tied at t_k
    wsum: np.ndarray  # (K,) summed weight of the events at t_k
    wsum_untied: np.ndarray  # (K,) wsum, with 0 at the event times holding tied events
    risk_op: sparse.csr_matrix  # (K, m): +1 at b_i, -1 at a_i (entered after t_k)
    plain_op: bool  # risk_op is one +1 per row in row order (no delayed entry)
    tie_k: np.ndarray  # (T,) the event times holding more than one event
    tie_ev: np.ndarray  # positions (in kept rows) of the events at those times, grouped
    tie_grp: np.ndarray  # index into tie_k of each event in tie_ev
    tie_f: np.ndarray  # l / d_k for each event in tie_ev (Efron), l = 0 .. d_k - 1
    tie_wavg: np.ndarray  # wavg of the event time of each event in tie_ev
    tie_op: sparse.csr_matrix  # (T, m): 1 for the events at tie_k
    b_idx: np.ndarray  # b_i + 1 (index into a zero-padded cumulative array)
    a_idx: np.ndarray  # a_i + 1 if entered after the stratum's first event time, else 0
    seg_end: np.ndarray  # (K,) one past the last event-time index of t_k's stratum
    seg_start: np.ndarray  # (K,) first event-time index of t_k's stratum
    k_bounds: np.ndarray  # first event-time index of each stratum with events, then K
    row_starts: np.ndarray  # start of each stratum among kept rows
    row_counts: np.ndarray
    k_stratum: np.ndarray  # (K,) stratum code of each event time
    k_time: np.ndarray  # (K,) the event time t_k
    labels: np.ndarray  # stratum labels (index = code)
    n_strata: int
    late_entry: bool  # some row enters after the first event time of its stratum
    n: int
    events: int
    # the kept rows' own values, sorted (to lay out a subsample without checking it again)
    time_s: np.ndarray
    event_s: np.ndarray
    entry_s: np.ndarray | None
    code_s: np.ndarray | None  # stratum codes (None without strata)
    # the layouts of subsamples for the start of Newton's method, by stride (made on first use:
    # they too depend on the sample only, so the fits sharing this layout share them)
    subsamples: dict[int, Layout] = field(default_factory=dict, compare=False, repr=False)

    @property
    def ties(self) -> bool:
        """Some event time has more than one event."""
        return self.tie_k.size > 0


def _prepare(
    n: int,
    time: Any,
    event: Any,
    entry: Any | None,
    strata: Any | None,
    weights: Any | None,
) -> Layout:
    t = _as_1d("time", time, n)
    _check_finite("time", t)
    e = _event_array(event, n)
    if weights is not None:
        w = _as_1d("weights", weights, n)
        _check_finite("weights", w)
        if (w <= 0).any():
            raise ValueError(
                f"weights must be positive; {int((w <= 0).sum())} are zero or negative "
                "(drop those rows instead)"
            )
    if entry is not None:
        en = _as_1d("entry", entry, n)
        _check_finite("entry", en)
        late = ~(t > en)
        if late.any():
            first = int(np.flatnonzero(late)[0])
            raise ValueError(
                f"time must be greater than entry (delayed entry): {int(late.sum())} row(s) "
                f"have time <= entry, e.g. row {first} with entry={float(en[first])}, "
                f"time={float(t[first])}"
            )
    scode: np.ndarray | None = None
    if strata is None:
        labels = np.array([0])
    else:
        s_arr = np.asarray(strata)
        if s_arr.ndim != 1 or s_arr.shape[0] != n:
            raise ValueError(f"strata must be one-dimensional with {n} values, got {s_arr.shape}")
        codes, uniq = pd.factorize(s_arr, sort=True)
        if (codes < 0).any():
            raise ValueError(f"strata has {int((codes < 0).sum())} missing value(s)")
        scode = codes.astype(np.int64)
        labels = np.asarray(uniq)

    # sort once: by stratum, then time (a quicksort on time, then a stable pass on the codes)
    order = np.argsort(t)
    n_strata = int(labels.size)
    if scode is not None and n_strata > 1:
        codes_small = scode.astype(np.uint16) if n_strata < 2**16 else scode
        order = order[np.argsort(codes_small[order], kind="stable")]
    t_s, e_s = t[order], e[order]
    sc_s = None if scode is None else scode[order]
    # runs of rows sharing (stratum, time); the runs holding an event are the event times k
    new_run = np.empty(n, dtype=bool)
    new_run[:1] = True
    np.not_equal(t_s[1:], t_s[:-1], out=new_run[1:])
    if sc_s is not None and n_strata > 1:
        new_run[1:] |= sc_s[1:] != sc_s[:-1]
    run_id = np.cumsum(new_run) - 1
    run_first = np.flatnonzero(new_run)
    run_event = np.bincount(run_id[e_s], minlength=run_first.size) > 0
    run_k = np.cumsum(run_event) - 1  # last event time at or before each run
    b = run_k[run_id]  # a row is at risk at event times (a, b]
    k_first = run_first[run_event]
    k_time = t_s[k_first]
    k_stratum = np.zeros(k_first.size, dtype=np.int64) if sc_s is None else sc_s[k_first]
    K = int(k_first.size)

    if sc_s is None or n_strata == 1:
        s_first = np.zeros(min(n, 1), dtype=np.int64)
    else:
        s_first = np.flatnonzero(np.r_[True, sc_s[1:] != sc_s[:-1]])
    s_runs = run_id[s_first]
    lo_stratum = run_k[s_runs] + 1 - run_event[s_runs]  # first event time of each stratum
    if s_first.size <= 1:
        lo = np.full(n, lo_stratum[0] if n else 0, dtype=np.int64)
    else:
        lo = np.repeat(lo_stratum, np.diff(np.r_[s_first, n]))
    en_s = None
    if entry is None:
        a = lo - 1
    else:
        en_s = en[order]
        if n_strata == 1:
            a = np.searchsorted(k_time, en_s, side="right") - 1
        else:
            assert sc_s is not None
            values = np.unique(k_time)
            span = np.int64(values.size + 1)
            k_key = k_stratum * span + np.searchsorted(values, k_time) + 1
            row_key = sc_s * span + np.searchsorted(values, en_s, side="right")
            a = np.searchsorted(k_key, row_key, side="right") - 1
    keep = b > a  # at risk at one event time at least
    if not keep.all():
        kept = np.flatnonzero(keep)
        order, b, a, lo, e_s, t_s = order[kept], b[kept], a[kept], lo[kept], e_s[kept], t_s[kept]
        sc_s = None if sc_s is None else sc_s[kept]
        en_s = None if en_s is None else en_s[kept]
    m = order.size
    w_s = np.ones(m) if weights is None else w[order]

    ev = np.flatnonzero(e_s)
    g = b[ev]
    d = np.bincount(g, minlength=K)
    we_ev = w_s[ev]
    wsum = np.bincount(g, weights=we_ev, minlength=K) if weights is not None else d.astype(float)
    wavg = wsum / np.maximum(d, 1)

    # Efron's terms differ from Breslow's only at the event times with tied events
    tied = d > 1
    tie_k = np.flatnonzero(tied)
    in_tied = tied[g]
    tie_ev, tie_g = ev[in_tied], g[in_tied]
    tie_grp = (np.cumsum(tied) - 1)[tie_g]
    tie_d = d[tie_k]
    tie_first = np.cumsum(tie_d) - tie_d
    tie_f = (np.arange(tie_ev.size) - tie_first[tie_grp]) / tie_d[tie_grp]
    # events are sorted by event time, so the tie operator's rows are runs of events
    tie_op = sparse.csr_matrix(
        (np.ones(tie_ev.size), tie_ev, np.r_[0, np.cumsum(tie_d)]), shape=(tie_k.size, m)
    )

    entered_late = a >= lo
    n_late = int(entered_late.sum())
    if n_late == 0:  # rows are sorted by b: the operator's rows are runs of consecutive rows
        indptr = np.r_[0, np.cumsum(np.bincount(b, minlength=K))]
        risk_op = sparse.csr_matrix((np.ones(m), np.arange(m), indptr), shape=(K, m))
    else:
        rows = np.concatenate([b, a[entered_late]])
        cols = np.concatenate([np.arange(m), np.flatnonzero(entered_late)])
        vals = np.concatenate([np.ones(m), -np.ones(n_late)])
        risk_op = sparse.csr_matrix((vals, (rows, cols)), shape=(K, m))

    if n_strata == 1:
        seg_start, seg_end = np.zeros(K, dtype=np.int64), np.full(K, K, dtype=np.int64)
        k_bounds = np.array([0, K])
    else:
        k_new = np.ones(K, dtype=bool)
        k_new[1:] = k_stratum[1:] != k_stratum[:-1]
        k_bounds = np.flatnonzero(k_new)
        k_sizes = np.diff(np.r_[k_bounds, K])
        seg_start = np.repeat(k_bounds, k_sizes)
        seg_end = np.repeat(np.r_[k_bounds[1:], K], k_sizes)
        k_bounds = np.r_[k_bounds, K]

    if m == 0:
        starts = np.zeros(0, dtype=np.int64)
    elif sc_s is None or n_strata == 1:
        starts = np.zeros(1, dtype=np.int64)
    else:
        starts = np.flatnonzero(np.r_[True, sc_s[1:] != sc_s[:-1]])
    counts = np.diff(np.r_[starts, m])
    return Layout(
        order=order,
        w=w_s,
        unit_w=weights is None,
        we=w_s * e_s,
        ev=ev,
        we_ev=we_ev,
        wavg=wavg,
        wsum=wsum,
        wsum_untied=np.where(tied, 0.0, wsum),
        risk_op=risk_op,
        plain_op=n_late == 0,
        tie_k=tie_k,
        tie_ev=tie_ev,
        tie_grp=tie_grp,
        tie_f=tie_f,
        tie_wavg=wavg[tie_g],
        tie_op=tie_op,
        b_idx=b + 1,
        a_idx=np.where(entered_late, a + 1, 0),
        seg_end=seg_end,
        seg_start=seg_start,
        k_bounds=k_bounds,
        row_starts=starts,
        row_counts=counts,
        k_stratum=k_stratum,
        k_time=k_time,
        labels=labels,
        n_strata=n_strata,
        late_entry=n_late > 0,
        n=n,
        events=int(e.sum()),
        time_s=t_s,
        event_s=e_s,
        entry_s=en_s,
        code_s=sc_s,
    )


def prepare_layout(
    time: Any,
    event: Any,
    *,
    entry: Any | None = None,
    strata: Any | None = None,
    weights: Any | None = None,
) -> Layout:
    """Check and sort one sample once, for any number of fits of it: pass the result as
    ``layout=`` to :func:`fit_cox` or :func:`baseline_cumhaz` with an X of the same rows.

    The arguments mean what they mean for :func:`fit_cox`, and the same invalid input raises
    the same ``ValueError``. The sort (by stratum, then time), the risk-set index ranges and the
    sparse risk-set and tie operators depend on these arrays only, so a layout made here gives
    bit-for-bit the fit that :func:`fit_cox` computes when it prepares the layout itself.
    """
    t = np.asarray(time)
    if t.ndim != 1:
        raise ValueError(f"time must be one-dimensional, got shape {t.shape}")
    return _prepare(t.shape[0], t, event, entry, strata, weights)


def _given_layout(layout: Any, n: int) -> Layout:
    """``layout`` after checking that it is one and that it was made for ``n`` rows."""
    if not isinstance(layout, Layout):
        raise ValueError(f"layout must come from prepare_layout, got {type(layout).__name__}")
    if layout.n != n:
        raise ValueError(
            f"layout was prepared for {layout.n} rows but X has {n}; prepare it from the same "
            "rows as X"
        )
    return layout


# ------------------------------------------------------------------- sums over event times


_FEW_STRATA = 64  # up to this many strata, sums restart by looping over strata


def _scaled(L: Layout, op: sparse.csr_matrix, r: np.ndarray) -> sparse.csr_matrix:
    """``op @ diag(r)``: the operator's values times r of their rows (columns of op)."""
    data = r if op is L.risk_op and L.plain_op else op.data * r[op.indices]
    return sparse.csr_matrix((data, op.indices, op.indptr), shape=op.shape)


def _risk_sums(L: Layout, contrib: np.ndarray) -> np.ndarray:
    """Risk-set sums per event time from per-event-time contributions.

    ``contrib`` is (K, q): for each event time, the summed values of the rows whose last event
    time at risk it is, minus those of the rows that entered just after it. Returns (q, K): the
    reverse cumulative sum over event times, restarted at every stratum.
    """
    K, q = contrib.shape
    if L.k_bounds.size <= _FEW_STRATA + 1:
        out = np.empty((q, K))
        for lo, hi in zip(L.k_bounds[:-1], L.k_bounds[1:], strict=True):
            for j in range(q):  # one 1-D pass per column: faster than a 2-D cumsum here
                np.cumsum(contrib[lo:hi][::-1, j], out=out[j, lo:hi][::-1])
        return out
    # many strata: restarted per stratum by subtracting the later strata's total; in extended
    # precision so that those totals do not swamp a stratum's small late risk sets
    rev = np.zeros((q, K + 1), dtype=np.longdouble)
    rev[:, :-1] = np.cumsum(contrib[::-1].T.astype(np.longdouble), axis=1)[:, ::-1]
    return np.asarray(rev[:, :-1] - rev[:, L.seg_end], dtype=float)


def _forward_cum(L: Layout, c: np.ndarray) -> np.ndarray:
    """Cumulative sum of ``c`` over event times within each stratum, zero-padded in front."""
    out = np.zeros(c.size + 1)
    if L.k_bounds.size <= _FEW_STRATA + 1:
        for lo, hi in zip(L.k_bounds[:-1], L.k_bounds[1:], strict=True):
            np.cumsum(c[lo:hi], out=out[lo + 1 : hi + 1])
        return out
    cum = np.concatenate([[0.0], np.cumsum(c.astype(np.longdouble))])
    out[1:] = cum[1:] - cum[L.seg_start]
    return out


def _shifted_eta(L: Layout, eta: np.ndarray) -> np.ndarray:
    """``eta`` less its maximum within each stratum (in place)."""
    if eta.size == 0:
        return eta
    if L.row_starts.size <= 1:
        eta -= eta.max()
        return eta
    top = np.maximum.reduceat(eta, L.row_starts)
    eta -= np.repeat(top, L.row_counts)
    return eta


_BLOCK = 8192  # rows per block of the weighted cross-products (stays in cache)


@dataclass(frozen=True)
class _Design:
    """The kept rows' covariates, sorted and standardised, with a leading column of ones."""

    X1: np.ndarray  # (m, 1 + p), C-contiguous
    xwe: np.ndarray  # (p,) sum over events of w x: the part of the score that never changes
    reach: np.ndarray  # (p,) largest |x| of each standardised column (or a bound on it)
    buf: np.ndarray  # (min(m, _BLOCK), 1 + p) scratch

    @classmethod
    def of(cls, X1: np.ndarray, we: np.ndarray, reach: np.ndarray) -> _Design:
        buf = np.empty((min(X1.shape[0], _BLOCK), X1.shape[1]))
        return cls(X1, X1[:, 1:].T @ we, reach, buf)


def _weighted_gram(D: _Design, v: np.ndarray) -> np.ndarray:
    """``X1' diag(v) X1``, in blocks of rows that stay in cache."""
    X1, buf = D.X1, D.buf
    q = X1.shape[1]
    out = np.zeros((q, q))
    for start in range(0, X1.shape[0], _BLOCK):
        block = X1[start : start + _BLOCK]
        scaled = buf[: block.shape[0]]
        np.multiply(block, v[start : start + _BLOCK, None], out=scaled)
        out += block.T @ scaled
    return out


def _evaluate(
    L: Layout, D: _Design, beta: np.ndarray, efron: bool, order: int = 2
) -> tuple[float, np.ndarray, np.ndarray]:
    """Log partial likelihood, score and observed information at ``beta``.

    ``order`` 0 computes the log partial likelihood only, 1 adds the score (which needs the
    risk-set sums of r only), 2 the information too; what is not computed is zeros.
    """
    X1 = D.X1
    p = X1.shape[1] - 1
    eta: np.ndarray | None = None
    if p and beta.any():
        eta = _shifted_eta(L, X1[:, 1:] @ beta)
        with np.errstate(over="ignore", under="ignore"):
            r = np.exp(eta)
        if not L.unit_w:
            r *= L.w
    else:
        r = L.w
    efron_terms = efron and L.ties
    order = order if p > 0 else 0
    derivs = order == 2
    # risk-set sums of r (row 0) and, for the information, of r x (rows 1..p) at each event time
    if derivs:
        sums = _risk_sums(L, _scaled(L, L.risk_op, r) @ X1)
    else:
        sums = _risk_sums(L, np.asarray(L.risk_op @ r)[:, None])
    s0 = sums[0]
    loglik = float(L.we_ev @ eta[L.ev]) if eta is not None else 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        log_s0 = np.log(s0)
        if efron_terms:  # one term per tied event: denominators S0 - (l/d) T0
            tied_sums = _scaled(L, L.tie_op, r) @ X1 if derivs else L.tie_op @ r
            t0 = tied_sums[:, 0] if derivs else tied_sums
            den = s0[L.tie_k][L.tie_grp] - L.tie_f * t0[L.tie_grp]
            loglik -= float(L.wsum_untied @ log_s0 + L.tie_wavg @ np.log(den))
        else:  # Breslow, or no tied events: one term per event time
            loglik -= float(L.wsum @ log_s0)
    if order == 0 or not np.isfinite(loglik):
        return loglik, np.zeros(p), np.zeros((p, p))
    T = L.tie_k.size
    # sum_k c_k sum_{i in R_k} r_i x_i x_i' = X' diag(v) X with v_i = r_i sum_{k: i in R_k} c_k;
    # the risk-set means enter as sum_k a_k S1_k S1_k' (and, for tied events, one per event)
    if efron_terms:
        c = L.wsum_untied / s0
        a = L.wsum_untied / s0**2
        inv = 1.0 / den
        c[L.tie_k] = np.bincount(L.tie_grp, weights=L.tie_wavg * inv, minlength=T)
        bk = np.bincount(L.tie_grp, weights=L.tie_wavg * L.tie_f * inv, minlength=T)
    else:
        c = L.wsum / s0
        a = c / s0
    cum = _forward_cum(L, c)
    v = r * (cum[L.b_idx] - cum[L.a_idx]) if L.late_entry else r * cum[L.b_idx]
    if efron_terms:
        v[L.tie_ev] -= r[L.tie_ev] * bk[L.tie_grp]
    if order == 1:
        return loglik, D.xwe - D.X1[:, 1:].T @ v, np.zeros((p, p))
    gram = _weighted_gram(D, v)
    score = D.xwe - gram[1:, 0]
    S1 = sums[1:]
    if efron_terms:
        # each tied event's risk-set mean (S1 - (l/d) T1) / den, times sqrt(wavg)
        tk = L.tie_k[L.tie_grp]
        mean = S1[:, tk] - L.tie_f * tied_sums[L.tie_grp, 1:].T
        mean *= inv * np.sqrt(L.tie_wavg)
    S1 *= np.sqrt(a)
    info = gram[1:, 1:] - S1 @ S1.T
    if efron_terms:
        info -= mean @ mean.T
    info = (info + info.T) / 2.0
    return loglik, score, info


# --------------------------------------------------------------------------------- fitting


def _singular_message(info: np.ndarray, sd: np.ndarray) -> str:
    if not np.isfinite(info).all():
        return (
            "the score or information is not finite (numerical overflow); rescale columns with "
            "extreme values or give starting values (init)"
        )
    const = np.flatnonzero(sd == 0)
    if const.size:
        return (
            f"information matrix is singular: column(s) {const.tolist()} are constant among "
            "the rows at risk; drop them"
        )
    diag = np.sqrt(np.clip(np.diag(info), 1e-300, None))
    vals, vecs = np.linalg.eigh(info / np.outer(diag, diag))
    weak = vecs[:, 0]
    involved = np.flatnonzero(np.abs(weak) > 0.1 * np.abs(weak).max()).tolist()
    return (
        "information matrix is singular (or not positive definite): columns "
        f"{involved} are (nearly) collinear, or a coefficient is diverging "
        f"(smallest scaled eigenvalue {vals[0]:.2g}); drop or combine those columns"
    )


def _solve(info: np.ndarray, score: np.ndarray) -> np.ndarray | None:
    if not (np.isfinite(info).all() and np.isfinite(score).all()):
        return None
    try:
        factor = linalg.cho_factor(info, check_finite=False)
    except linalg.LinAlgError:
        return None
    step = linalg.cho_solve(factor, score, check_finite=False)
    return step if np.isfinite(step).all() else None


@dataclass
class _Iterate:
    """Where Newton's method stopped: ``status`` is converged, singular, max_iter or halving."""

    beta: np.ndarray
    loglik: float
    score: np.ndarray
    info: np.ndarray
    iterations: int
    status: str
    last_change: float


def _diverging(step: np.ndarray, beta: np.ndarray, tol: float) -> np.ndarray:
    """Columns whose Newton step keeps them moving: a diverging coefficient's steps stay near
    1 (standardised units), a converging one's shrink quadratically; 1e-4 tells them apart."""
    big = (np.abs(step) > max(1e-4, 100.0 * tol)) & (np.abs(step) > np.sqrt(tol) * np.abs(beta))
    return np.flatnonzero(big)


def _settled(D: _Design, step: np.ndarray, tol: float) -> bool:
    """The step changes no row's linear predictor by more than ``100 * tol``: first a bound
    (``|step| . reach``), then, near that point only, the exact largest change."""
    bound = float(np.abs(step) @ D.reach)
    if bound <= 100.0 * tol:
        return True
    if bound > 1e-3:
        return False
    return float(np.abs(D.X1[:, 1:] @ step).max()) <= 100.0 * tol


def _newton(
    L: Layout, D: _Design, efron: bool, start: _Iterate, max_iter: int, tol: float
) -> _Iterate:
    """Newton steps with step halving from ``start`` (score and information evaluated there).

    Converged when the next step would change no row's linear predictor by more than
    ``100 * tol`` (checked only where the information is the full data's, that is after one
    step at least), so that the information at the last point is, to about that fraction, the
    one at the estimate; or, where rounding keeps the steps from getting that small, after
    three steps in a row changed the log partial likelihood by at most
    ``tol * max(1, |loglik|)``. Also stops, for the caller to report, when the log partial
    likelihood has levelled off like that while a coefficient keeps moving. The last point
    evaluated is returned, not the next step's.
    """
    beta, ll, score, info = start.beta, start.loglik, start.score, start.info
    iterations = flat = 0
    last_change = float("nan")
    while True:
        step = _solve(info, score)
        if step is None:
            return _Iterate(beta, ll, score, info, iterations, "singular", last_change)
        if iterations:
            levelled = abs(last_change) <= tol * max(1.0, abs(ll))
            flat = flat + 1 if levelled else 0
            diverging = levelled and _diverging(step, beta, tol).size > 0
            if diverging or flat >= 3 or _settled(D, step, tol):
                return _Iterate(beta, ll, score, info, iterations, "converged", last_change)
        if iterations >= max_iter:
            return _Iterate(beta, ll, score, info, iterations, "max_iter", last_change)
        iterations += 1
        halving = 0
        while True:
            cand = beta + step
            ll_c, score_c, info_c = _evaluate(L, D, cand, efron)
            if np.isfinite(ll_c) and ll_c >= ll - 1e-12 * max(1.0, abs(ll)):
                break
            halving += 1
            step = step / 2.0
            if halving > 40:
                return _Iterate(beta, ll, score, info, iterations, "halving", last_change)
        last_change = ll_c - ll
        beta, ll, score, info = cand, ll_c, score_c, info_c


# Starting values for large data: Newton's method from zero needs several steps before it
# reaches the region where it converges quadratically. Those steps are taken on a systematic
# subsample (every ``stride``-th row in time order, stride 4 to 8, at least _WARM_EVENTS
# events), itself started the same way when it is large enough. The first step on the full
# data uses the subsample's information scaled up to the full data (its error is of the order
# of the subsample's sampling error, which the quadratic convergence absorbs), so the full data
# need the score at the start and then about three full evaluations instead of six or seven.
# The estimate is still the full data's maximum, and the information the full data's.
_WARM_EVENTS = 2_500
_WARM_MIN_STRIDE, _WARM_MAX_STRIDE = 4, 8


def _warm_start(L: Layout, D: _Design, efron: bool) -> tuple[np.ndarray, np.ndarray] | None:
    """Standardised coefficients fitted on a subsample and its information scaled to the full
    data, or None (too few events for a subsample to pay off, or no converged fit)."""
    stride = min(L.events // _WARM_EVENTS, _WARM_MAX_STRIDE)
    if stride < _WARM_MIN_STRIDE:
        return None
    pos = np.arange(0, L.order.size, stride)
    sub = L.subsamples.get(stride)
    if sub is None:
        sub = L.subsamples[stride] = _prepare(
            pos.size,
            L.time_s[pos],
            L.event_s[pos],
            None if L.entry_s is None else L.entry_s[pos],
            None if L.code_s is None else L.code_s[pos],
            None if L.unit_w else L.w[pos],
        )
    if sub.events == 0:
        return None
    Dsub = _Design.of(D.X1[pos[sub.order]], sub.we, D.reach)
    fit = _newton(sub, Dsub, efron, _start(sub, Dsub, efron), 30, 1e-5)
    if fit.status != "converged" or not np.isfinite(fit.beta).all():
        return None
    nxt = _solve(fit.info, fit.score)
    if nxt is None or np.abs(nxt).max() > 0.1:  # e.g. a coefficient diverging in the subsample
        return None
    return fit.beta, fit.info * (L.wsum.sum() / sub.wsum.sum())


def _start(
    L: Layout, D: _Design, efron: bool, ll0: float | None = None, warm_ok: bool = True
) -> _Iterate:
    """Where Newton's method starts without starting values: at a subsample's estimate (with
    the score there and the subsample's information) when that pays off, otherwise at zero."""
    zero = np.zeros(D.X1.shape[1] - 1)
    warm = _warm_start(L, D, efron) if warm_ok else None
    if warm is not None:
        ll, score, _ = _evaluate(L, D, warm[0], efron, 1)
        if ll0 is None:
            ll0 = _evaluate(L, D, zero, efron, 0)[0]
        if np.isfinite(ll) and ll >= ll0:
            return _Iterate(warm[0], ll, score, warm[1], 0, "", ll)
    ll, score, info = _evaluate(L, D, zero, efron)  # no (useful) subsample fit
    return _Iterate(zero, ll, score, info, 0, "", ll)


def _largest_abs(a: np.ndarray, rows: int = 256) -> np.ndarray:
    """Largest |value| of each column of a C-contiguous (m, p) array. Reduced over blocks of
    ``rows`` rows seen as one wide row (a plain reduction down 8 columns is ~8x slower)."""
    m, p = a.shape
    if p == 0:
        return np.zeros(0)
    k = m // rows * rows
    wide = a[:k].reshape(-1, rows * p)
    hi = wide.max(axis=0, initial=-np.inf).reshape(rows, p).max(axis=0)
    lo = wide.min(axis=0, initial=np.inf).reshape(rows, p).min(axis=0)
    hi = np.maximum(hi, a[k:].max(axis=0, initial=-np.inf))
    lo = np.minimum(lo, a[k:].min(axis=0, initial=np.inf))
    return np.maximum(hi, -lo)


def _standardised(Xa: np.ndarray, L: Layout) -> tuple[_Design, np.ndarray, np.ndarray]:
    """The kept rows of X, sorted, centred and scaled, behind a column of ones; the scale of
    each column (to map estimates back) and its standard deviation (0 for a constant column)."""
    m, p = L.order.size, Xa.shape[1]
    X1 = np.empty((m, 1 + p))
    X1[:, 0] = 1.0
    if m == 0:
        return _Design.of(X1, L.we, np.zeros(p)), np.ones(p), np.zeros(p)
    if Xa.flags.f_contiguous and not Xa.flags.c_contiguous:  # e.g. from a data frame
        cols = np.empty((p, m))
        for j in range(p):  # gather column by column: each column is contiguous
            np.take(Xa[:, j], L.order, out=cols[j])
        sorted_x = cols.T
    else:
        sorted_x = np.take(Xa, L.order, axis=0)
    mean = np.ones(m) @ sorted_x / m
    sorted_x -= mean
    sd = np.sqrt(np.einsum("ij,ij->j", sorted_x, sorted_x) / m)
    sd[sd <= 1e-12 * np.maximum(1.0, np.abs(mean))] = 0.0  # constant up to rounding
    scale = np.where(sd > 0, sd, 1.0)
    reach = _largest_abs(sorted_x) / scale
    np.multiply(sorted_x, 1.0 / scale, out=X1[:, 1:])
    return _Design.of(X1, L.we, reach), scale, sd


def fit_cox(
    X: Any,
    time: Any,
    event: Any,
    *,
    entry: Any | None = None,
    strata: Any | None = None,
    weights: Any | None = None,
    ties: str = "efron",
    max_iter: int = 50,
    tol: float = 1e-9,
    init: Any | None = None,
    layout: Layout | None = None,
) -> CoxFit:
    """Fit a Cox proportional-hazards model by maximising the partial likelihood.

    X: (n, p) covariates (p may be 0). time: exit times. event: 0/1 (or bool).
    entry: optional entry times (delayed entry; a row is at risk at t when entry < t <= time).
    strata: optional labels; each stratum has its own baseline hazard.
    weights: optional positive case weights (the information is the model-based one, not a
    robust sandwich). ties: "efron" (default) or "breslow".
    Convergence: Newton steps with step halving until the next step would change no row's
    linear predictor by more than ``100 * tol``; that step is then taken (``loglik`` is its
    quadratic prediction, ``cov`` the inverse information at the last point evaluated, where
    no weight exp(eta) differs by more than that fraction). A coefficient that keeps moving
    once the log partial likelihood changes by less than ``tol * max(1, |loglik|)`` is
    reported as diverging.
    ``init`` are starting values on the scale of X; without them, data with many events
    (10,000 or more) start from a fit to a subsample (``iterations`` counts the steps on the
    full data only).
    ``layout``: the sample prepared by :func:`prepare_layout` from the same time, event, entry,
    strata and weights; those are then not read again (only the row count is checked), which
    saves the sort and the risk-set layout when one sample gets many fits. The fit is
    bit-for-bit the one without it.
    """
    if ties not in ("efron", "breslow"):
        raise ValueError(f"ties must be 'efron' or 'breslow', got {ties!r}")
    Xa = _design(X)
    n, p = Xa.shape
    _check_finite("X", Xa)
    if layout is None:
        L = _prepare(n, time, event, entry, strata, weights)
    else:
        L = _given_layout(layout, n)
    efron = ties == "efron"
    nan_coef, nan_cov = np.full(p, np.nan), np.full((p, p), np.nan)
    if L.events == 0:
        msg = "" if p == 0 else "no events: the coefficients are not estimable"
        return CoxFit(nan_coef, nan_cov, 0.0, 0.0, 0, p == 0, msg, n, 0)

    D, scale, sd = _standardised(Xa, L)
    ll0 = _evaluate(L, D, np.zeros(p), efron, 0)[0]
    if p == 0:
        return CoxFit(np.zeros(0), np.zeros((0, 0)), ll0, ll0, 0, True, "", n, L.events)

    if init is None:
        # (with no step allowed, the information must be the full data's)
        start = _start(L, D, efron, ll0, warm_ok=max_iter >= 1)
    else:
        init_arr = _as_1d("init", init, None)
        if init_arr.shape[0] != p:
            raise ValueError(f"init has {init_arr.shape[0]} values but X has {p} columns")
        _check_finite("init", init_arr)
        ll, score, info = _evaluate(L, D, init_arr * scale, efron)
        if not np.isfinite(ll):
            msg = (
                "log partial likelihood is not finite at the starting values (init); "
                "start from zero or from smaller values"
            )
            return CoxFit(nan_coef, nan_cov, ll, ll0, 0, False, msg, n, L.events)
        start = _Iterate(init_arr * scale, ll, score, info, 0, "", ll)

    def back(b: np.ndarray, inf: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        try:
            cov_s = linalg.inv(inf, check_finite=True)
        except (linalg.LinAlgError, ValueError):
            return b / scale, nan_cov
        return b / scale, cov_s / np.outer(scale, scale)

    it = _newton(L, D, efron, start, max_iter, tol)
    beta, ll, score, info, iterations = it.beta, it.loglik, it.score, it.info, it.iterations
    message = ""
    if it.status == "singular":
        message = _singular_message(info, sd)
        return CoxFit(nan_coef, nan_cov, ll, ll0, iterations, False, message, n, L.events)
    if it.status == "max_iter":
        message = (
            f"no convergence after {max_iter} Newton iteration(s) (last change in log "
            f"partial likelihood {it.last_change:.3g}); raise max_iter, start from better "
            "values (init), or look for a covariate with extreme values or separation"
        )
    elif it.status == "halving":
        message = (
            "step halving could not improve the log partial likelihood "
            f"(at {ll:.6g}); the model may be overparameterised or a covariate may have "
            "extreme values - rescale or drop columns, or give init"
        )
    converged = it.status == "converged"
    if converged:
        # the Newton step from the last point: a coefficient that keeps moving although the
        # likelihood stopped changing is going to infinity (monotone likelihood), as when one
        # group has no events; otherwise the step is taken without evaluating its end point
        # (its log partial likelihood is the quadratic prediction, error of the order of the
        # step cubed; the information stays the last point's, where no weight exp(eta)
        # differs from the estimate's by more than a fraction of about 100 * tol)
        nxt = _solve(info, score)
        if nxt is None:
            message = _singular_message(info, sd)
            coef, _ = back(beta, info)
            return CoxFit(coef, nan_cov, ll, ll0, iterations, False, message, n, L.events)
        diverging = _diverging(nxt, beta, tol)
        if diverging.size:
            converged = False
            message = (
                f"coefficient(s) of column(s) {diverging.tolist()} diverge while the log "
                "partial likelihood has levelled off (monotone likelihood: e.g. no events in "
                "one group of a binary column); the estimate is infinite - merge groups or "
                "drop the column"
            )
        else:
            ll += float(score @ nxt) / 2.0
            beta = beta + nxt
    coef, cov = back(beta, info)
    if not np.isfinite(cov).all() and not message:
        message = "the information matrix could not be inverted at the estimate"
        converged = False
    return CoxFit(coef, cov, float(ll), float(ll0), iterations, converged, message, n, L.events)


def refit_near(
    X: Any, layout: Layout, init: Any, *, ties: str = "efron", tol: float = 1e-9,
    max_iter: int = 50,
) -> np.ndarray | None:
    """Coefficients only, for refits that start close to their estimate (bootstrap replicates
    started at the full-sample estimate): one Newton step from ``init`` with the full
    information, then chord steps that keep that information and recompute only the log
    partial likelihood and the score (the risk-set sums of ``exp(eta)`` alone, no Gram
    product). The score is exact, so the fixed point is the maximum ``fit_cox`` finds; each step
    shrinks the error by about the relative change of the information between ``init`` and
    the estimate. Stops by ``fit_cox``'s rule (the next step would change no row's linear
    predictor by more than ``100 * tol``). Returns None when it does not settle, the likelihood
    falls or the information is singular: the caller then fits with ``fit_cox``.
    """
    if ties not in ("efron", "breslow"):
        raise ValueError(f"ties must be 'efron' or 'breslow', got {ties!r}")
    Xa = _design(X)
    n, p = Xa.shape
    _check_finite("X", Xa)
    L = _given_layout(layout, n)
    init_arr = _as_1d("init", init, p)
    if p == 0 or L.events == 0 or not np.isfinite(init_arr).all():
        return None
    efron = ties == "efron"
    D, scale, _ = _standardised(Xa, L)
    beta = init_arr * scale
    ll, score, info = _evaluate(L, D, beta, efron)
    if not np.isfinite(ll) or not (np.isfinite(info).all() and np.isfinite(score).all()):
        return None
    try:
        factor = linalg.cho_factor(info, check_finite=False)
    except linalg.LinAlgError:
        return None
    for _ in range(max_iter):
        step = linalg.cho_solve(factor, score, check_finite=False)
        if not np.isfinite(step).all():
            return None
        if _settled(D, step, tol):
            return np.asarray((beta + step) / scale)
        beta = beta + step
        ll_next, score, _ = _evaluate(L, D, beta, efron, 1)
        if not np.isfinite(ll_next) or ll_next < ll - tol * max(1.0, abs(ll)):
            return None
        ll = ll_next
    return None


# ------------------------------------------------------------------ baseline and prediction


def baseline_cumhaz(
    X: Any,
    time: Any,
    event: Any,
    coef: Any,
    *,
    entry: Any | None = None,
    strata: Any | None = None,
    weights: Any | None = None,
    layout: Layout | None = None,
) -> pd.DataFrame:
    """Breslow estimate of the baseline cumulative hazard, per stratum.

    Returns a long table with columns ``stratum`` (the strata labels; 0 without strata),
    ``time`` (each distinct event time of the stratum, increasing) and ``cumhaz``:
    H0(t) = sum over event times t_k <= t of (summed event weights at t_k) /
    (sum over the risk set at t_k of w_i exp(x_i coef)), with the risk set honouring delayed
    entry. The baseline is at covariates = 0 on the scale of X (NOT at the covariate means),
    so ``H(t | x) = H0(t) exp(x coef)``. The Breslow form is used whichever ties method fitted
    ``coef``. If x = 0 is far outside the data, H0 may underflow: centre X first.
    ``layout`` is as for :func:`fit_cox`.
    """
    Xa = _design(X)
    n, p = Xa.shape
    _check_finite("X", Xa)
    b = _as_1d("coef", coef, None)
    if b.shape[0] != p:
        raise ValueError(f"coef has {b.shape[0]} values but X has {p} columns")
    _check_finite("coef", b)
    if layout is None:
        L = _prepare(n, time, event, entry, strata, weights)
    else:
        L = _given_layout(layout, n)
    eta = Xa[L.order] @ b if p else np.zeros(L.order.size)
    shifted = _shifted_eta(L, eta.copy())
    s0 = _risk_sums(L, np.asarray(L.risk_op @ (L.w * np.exp(shifted)))[:, None])[0]
    K = L.wsum.size
    if K == 0:
        return pd.DataFrame({"stratum": L.labels[:0], "time": np.zeros(0), "cumhaz": np.zeros(0)})
    # undo the per-stratum shift of eta: H0 = sum(W / S0_shifted) * exp(-shift); the strata
    # with rows at risk are exactly those with event times, in code order
    shift_of_stratum = np.zeros(L.n_strata)
    shift_of_stratum[np.unique(L.k_stratum)] = eta[L.row_starts] - shifted[L.row_starts]
    with np.errstate(over="ignore", under="ignore"):
        hazard = L.wsum / s0 * np.exp(-shift_of_stratum[L.k_stratum])
    cum = _forward_cum(L, hazard)[1:]
    return pd.DataFrame({"stratum": L.labels[L.k_stratum], "time": L.k_time, "cumhaz": cum})


def predict_risk(
    X_new: Any,
    coef: Any,
    cumhaz_df: pd.DataFrame,
    horizon: Any,
    strata_new: Any | None = None,
) -> np.ndarray:
    """Absolute risk of the event by ``horizon``: 1 - exp(-H0(horizon) exp(x coef)).

    ``cumhaz_df`` is the output of :func:`baseline_cumhaz`. H0 is the step function through
    its values (0 before the first event time; constant after the last one, so horizons beyond
    the follow-up are not extrapolated). ``horizon`` is a scalar or one value per row.
    ``strata_new`` gives each row's stratum label; it may be omitted when there is one stratum.
    """
    Xa = _design(X_new)
    b = _as_1d("coef", coef, None)
    if b.shape[0] != Xa.shape[1]:
        raise ValueError(f"coef has {b.shape[0]} values but X_new has {Xa.shape[1]} columns")
    m = Xa.shape[0]
    hz = np.broadcast_to(np.asarray(horizon, dtype=float), (m,))
    labels = pd.unique(cumhaz_df["stratum"])
    if strata_new is None:
        if labels.size > 1:
            raise ValueError(
                f"the baseline has {labels.size} strata; give strata_new (one label per row)"
            )
        st = np.zeros(m, dtype=np.int64)
    else:
        s_arr = np.asarray(strata_new)
        if s_arr.shape != (m,):
            raise ValueError(f"strata_new must have one label per row ({m}), got {s_arr.shape}")
        st = pd.Index(labels).get_indexer(s_arr)
        if (st < 0).any():
            unknown = pd.unique(s_arr[st < 0])[:5].tolist()
            raise ValueError(f"strata_new has labels without a baseline: {unknown}")
    h0 = np.zeros(m)
    for j, lab in enumerate(labels):
        rows = st == j
        if not rows.any():
            continue
        part = cumhaz_df[cumhaz_df["stratum"] == lab]
        t = part["time"].to_numpy(dtype=float)
        c = part["cumhaz"].to_numpy(dtype=float)
        pos = np.searchsorted(t, hz[rows], side="right") - 1
        h0[rows] = np.where(pos >= 0, c[np.maximum(pos, 0)], 0.0)
    with np.errstate(over="ignore"):
        cumhaz = h0 * np.exp(Xa @ b)
    return np.asarray(-np.expm1(-cumhaz), dtype=float)


# ------------------------------------------------------------------------------ concordance


@dataclass(frozen=True)
class _LateEntry:
    """The pairs that delayed entry takes out: an event i and a row j of its stratum that had
    not entered by i's time (entry_j >= t_i). Its items are the events (at their time) and the
    entries (at their entry time) in order of stratum, then value, events first at equal values;
    only items that form such a pair are kept, so an event item precedes a later entry item of
    its stratum exactly when the pair is taken out."""

    row: np.ndarray  # each item's position in TimeOrder.order
    is_event: np.ndarray  # the item is an event (else an entry)
    stratum: np.ndarray | None  # each item's stratum code (None with one stratum)
    pairs: int  # (event, later entry) pairs within strata


@dataclass(frozen=True)
class TimeOrder:
    """What Harrell's C needs of (time, event, entry, strata) alone, made by
    :func:`concordance_order` and shared by every score of one sample: the rows in order of
    stratum and time (at equal times events first), the number of comparable pairs, the events
    that share their stratum and time with other events, and the pairs delayed entry removes."""

    n: int
    order: np.ndarray  # rows by stratum, then time; at equal times events before censored rows
    event_s: np.ndarray  # event indicator in that order
    pairs: int  # comparable pairs
    tied_slots: np.ndarray  # positions (in order) of the events tied in time with others
    tied_grp: np.ndarray  # their event time's group number (non-decreasing)
    tied_at: np.ndarray  # (n,) every position's tied_grp; the dtype's largest value if none
    stratum_s: np.ndarray | None = None  # stratum codes in that order (None: one stratum)
    late: _LateEntry | None = None  # None without delayed entry (or when it removes no pair)


def _stratum_codes(strata: Any | None, n: int) -> np.ndarray | None:
    """Stratum codes 0..S-1 (sorted labels) in the smallest unsigned type, None for one."""
    if strata is None:
        return None
    arr = np.asarray(strata)
    if arr.ndim != 1 or arr.shape[0] != n:
        raise ValueError(f"strata must be one-dimensional with {n} values, got {arr.shape}")
    codes, labels = pd.factorize(arr, sort=True)
    if (codes < 0).any():
        raise ValueError(f"strata has {int((codes < 0).sum())} missing value(s)")
    if len(labels) <= 1:
        return None
    return codes.astype(np.uint16 if len(labels) < 2**16 else np.int64)


def _late_entry(t_s: np.ndarray, e_s: np.ndarray, en_s: np.ndarray,
                c_s: np.ndarray | None) -> _LateEntry | None:
    """The (event, not yet entered) pairs of rows laid out by :func:`concordance_order`."""
    n = t_s.size
    ev = np.flatnonzero(e_s)
    rows = np.r_[ev, np.arange(n)]
    value = np.r_[t_s[ev], en_s]
    is_event = np.r_[np.ones(ev.size, dtype=bool), np.zeros(n, dtype=bool)]
    keys = (~is_event, value) if c_s is None else (~is_event, value, c_s[rows])
    srt = np.lexsort(keys)
    rows, is_event = rows[srt], is_event[srt]
    st = None if c_s is None else c_s[rows]
    m = rows.size
    idx = np.arange(m)
    if st is None:
        first, last = np.zeros(m, dtype=np.intp), np.full(m, m, dtype=np.intp)
    else:
        first = np.searchsorted(st, st, side="left")
        last = np.searchsorted(st, st, side="right")
    n_ev = np.r_[0, np.cumsum(is_event)]  # events among the first k items
    n_en = idx + 1 - n_ev[1:]  # entries among the first k + 1 items
    n_en = np.r_[0, n_en]
    events_before = n_ev[idx] - n_ev[first]
    entries_after = n_en[last] - n_en[idx + 1]
    pairs = int(entries_after[is_event].sum())
    if pairs == 0:
        return None
    keep = np.where(is_event, entries_after > 0, events_before > 0)
    return _LateEntry(rows[keep], is_event[keep], None if st is None else st[keep], pairs)


def concordance_order(time: Any, event: Any, entry: Any | None = None,
                      strata: Any | None = None) -> TimeOrder:
    """Check and order (time, event, entry, strata) once, for :func:`concordance` of any number
    of scores.

    Invalid input raises ``ValueError`` as :func:`concordance` does."""
    t = _as_1d("time", time, None)
    n = t.shape[0]
    e = _event_array(event, n)
    _check_finite("time", t)
    code = _stratum_codes(strata, n)
    en = None
    if entry is not None:
        en = np.asarray(entry, dtype=float)
        if en.ndim != 1 or en.shape[0] != n:
            raise ValueError(f"entry must be one-dimensional with {n} values, got {en.shape}")
        _check_finite("entry", en)
        bad = ~(t > en)
        if bad.any():
            first = int(np.flatnonzero(bad)[0])
            raise ValueError(
                f"time must be greater than entry (delayed entry): {int(bad.sum())} row(s) "
                f"have time <= entry, e.g. row {first} with entry={float(en[first])}, "
                f"time={float(t[first])}"
            )
    order = np.lexsort((~e, t)) if code is None else np.lexsort((~e, t, code))
    t_s, e_s = t[order], e[order]
    c_s = None if code is None else code[order]
    ev = np.flatnonzero(e_s)
    # pairs: every event with all rows after it in its stratum, less the events tied in time
    end = np.full(ev.size, n) if c_s is None else np.searchsorted(c_s, c_s[ev], side="right")
    pairs = int((end - 1 - ev).sum())
    te = t_s[ev]
    new_t = np.ones(te.size, dtype=bool)
    np.not_equal(te[1:], te[:-1], out=new_t[1:])
    if c_s is not None:
        new_t[1:] |= c_s[ev][1:] != c_s[ev][:-1]
    size_t = np.diff(np.r_[np.flatnonzero(new_t), te.size])
    pairs -= int((size_t * (size_t - 1) // 2).sum())
    grp = np.cumsum(new_t) - 1
    tied = size_t[grp] > 1
    slots, tied_grp = ev[tied], grp[tied]
    # group numbers as small as they fit (a stable sort by a 16-bit key is a radix sort)
    gtype = np.uint16 if tied_grp.size == 0 or tied_grp[-1] < 2**16 - 1 else np.int64
    tied_grp = tied_grp.astype(gtype)
    tied_at = np.full(n, np.iinfo(gtype).max, dtype=gtype)
    tied_at[slots] = tied_grp
    late = None if en is None else _late_entry(t_s, e_s, en[order], c_s)
    if late is not None:
        pairs -= late.pairs
    return TimeOrder(n, order, e_s, pairs, slots, tied_grp, tied_at, c_s, late)


def concordance(
    time: Any, risk_score: Any, event: Any, *, entry: Any | None = None,
    strata: Any | None = None, time_order: TimeOrder | None = None
) -> float:
    """Harrell's C: the share of comparable pairs in which the earlier event had the higher score.

    A pair (i, j) is comparable when i is an event at t_i, j is in i's stratum, j was at risk at
    t_i (entry_j < t_i, the Cox risk-set convention: a row entering at t_i is not at risk at
    t_i) and j outlived i: t_j > t_i, or t_j = t_i with j censored (a row censored at an event
    time is taken to outlive it); two events at the same time are not comparable. Pairs in
    different strata are never compared. Tied scores count one half. Without strata and entry
    this equals ``lifelines.utils.concordance_index(time, -risk_score, event)``. Returns NaN
    when there is no comparable pair (e.g. no events). ``time_order`` (from
    :func:`concordance_order` of the same time, event, entry and strata, which are then not
    read again) saves the sort when one sample gets many scores.

    O(n log n), exact in integers: the rows are laid out by stratum and time (the events tied in
    time by increasing score, so that their pairs count as lower or tied, and the tied ones are
    taken out again), and sorted once by (stratum, score) (ties by position), so that a later
    row of another stratum never counts as lower; the events tied in time then move to their
    slots by a stable (radix) sort of their time groups. Going down the bits of the position,
    from the highest, each level splits every block of positions into an earlier and a later
    half; with the rows of each block in score order, one cumulative count of the later half
    gives, for every earlier event, the later rows with a lower score, and the same counts split
    each block into its halves for the next level (a stable partition, O(n)). Delayed entry: a
    later row that had not entered by the event's time (entry_j >= t_i, so t_j > t_i) was
    counted; such pairs are counted the same way over a second sequence, the events at their
    times and the entries at their entry times (events first at equal values), counting only
    event-before-entry pairs, and subtracted.
    """
    s = np.asarray(risk_score, dtype=float)
    if time_order is None:
        time_order = concordance_order(time, event, entry, strata)
    if s.ndim != 1 or s.shape[0] != time_order.n:
        raise ValueError(
            f"risk_score must be one-dimensional with {time_order.n} values, got shape {s.shape}"
        )
    _check_finite("risk_score", s)
    T = time_order
    n = T.n
    if n < 2 or not T.event_s.any() or T.pairs <= 0:
        return float("nan")
    s_time = s[T.order]  # scores in time order
    itype = np.int32 if n < 2**30 else np.int64
    # positions sorted by (stratum, score), ties by position (stable sorts)
    pos = _by_key(s_time, T.stratum_s, itype)
    by_score = s_time[pos]
    # the events tied in time take their time's slots by increasing score: the tied events in
    # score order, grouped by their time (a stable sort, so still by score within a time)
    same_time_same_score = 0
    if T.tied_slots.size:
        seq = pos[T.tied_at[pos] != np.iinfo(T.tied_at.dtype).max]  # tied events, by score
        seq = seq[np.argsort(T.tied_at[seq], kind="stable")]  # by time, then score
        st = s_time[seq]  # the scores at T.tied_slots after the move
        moved = np.arange(n, dtype=itype)
        moved[seq] = T.tied_slots
        pos = moved[pos]  # still by score, ties by (new) position
        # events tied in time and in score: counted as tied below, but not comparable
        new_ts = np.ones(st.size, dtype=bool)
        new_ts[1:] = (T.tied_grp[1:] != T.tied_grp[:-1]) | (st[1:] != st[:-1])
        size_ts = np.diff(np.r_[np.flatnonzero(new_ts), st.size])
        same_time_same_score = int((size_ts * (size_ts - 1) // 2).sum())
    dead = T.event_s[pos]
    # tied scores: every event with the later rows of its run of equal (stratum, score)
    new_s = _new_runs(by_score, None if T.stratum_s is None else T.stratum_s[pos])
    run_end = np.r_[np.flatnonzero(new_s)[1:], n]
    idx = np.arange(n, dtype=itype)
    run = np.cumsum(new_s) - 1
    equal = int((run_end[run[dead]] - 1 - idx[dead]).sum()) - same_time_same_score
    higher = _earlier_events_above_later(pos, dead, idx)
    if T.late is not None:
        late_higher, late_equal = _late_pairs(T.late, s_time, itype)
        higher -= late_higher
        equal -= late_equal
    return (higher + 0.5 * equal) / T.pairs


def _by_key(score: np.ndarray, stratum: np.ndarray | None, itype: Any) -> np.ndarray:
    """Positions sorted by (stratum, score), ties by position."""
    pos = np.argsort(score, kind="stable")
    if stratum is not None:
        pos = pos[np.argsort(stratum[pos], kind="stable")]
    return pos.astype(itype)


def _new_runs(values: np.ndarray, stratum: np.ndarray | None) -> np.ndarray:
    """Where a run of equal (stratum, value) starts, for values sorted by (stratum, value)."""
    new = np.ones(values.size, dtype=bool)
    np.not_equal(values[1:], values[:-1], out=new[1:])
    if stratum is not None:
        new[1:] |= stratum[1:] != stratum[:-1]
    return new


def _late_pairs(L: _LateEntry, s_time: np.ndarray, itype: Any) -> tuple[int, int]:
    """Among the pairs delayed entry takes out (event item before an entry item of its
    stratum), those where the event has the higher score, and those with equal scores."""
    m = L.row.size
    sc = s_time[L.row]
    ip = _by_key(sc, L.stratum, itype)
    first = L.is_event[ip]
    higher = _earlier_events_above_later(ip, first, np.arange(m, dtype=itype), target=~first)
    new = _new_runs(sc[ip], None if L.stratum is None else L.stratum[ip])
    start = np.flatnonzero(new)[np.cumsum(new) - 1]  # each item's run start (sorted order)
    n_ev = np.r_[0, np.cumsum(first)]
    before = n_ev[np.arange(m)] - n_ev[start]  # events earlier in the run: earlier items
    return higher, int(before[~first].sum())


_BRUTE_BITS = 4  # pairs within blocks of 2^4 positions are compared directly


def _earlier_events_above_later(pos: np.ndarray, dead: np.ndarray, idx: np.ndarray,
                                target: np.ndarray | None = None) -> int:
    """Count pairs of positions i < j with i an event and a higher score than j (and, with
    ``target``, j a target: ``target`` is aligned with ``pos`` as ``dead`` is).

    ``pos`` are the positions 0..n-1 sorted by score (ties by position), ``dead`` whether each
    is an event, ``idx`` = arange(n) of pos's dtype. At the level of bit L the rows are arranged
    in blocks of 2^(L+1) positions (block b at indices from b 2^(L+1), as the positions are a
    permutation), each in score order; the later half of a block is bit L = 1. Its running count
    before an earlier-half event is the number of later rows with a lower score (an equal score
    sorts after, by position). That count is also each row's rank within its half, which
    places it in the next level's arrangement (one scatter per level; the work arrays are
    allocated once). The pairs within the smallest blocks (16 positions) are compared
    directly, by each row's rank in the score order.
    """
    n = pos.size
    if n < 2:
        return 0
    low = min(_BRUTE_BITS, (n - 1).bit_length())
    higher = _within_blocks(pos, dead, idx, low, target)
    pos, dead = pos.astype(np.intp), dead.copy()
    tgt = None if target is None else target.copy()
    at = np.arange(n, dtype=np.intp)
    pos_next, dead_next = np.empty_like(pos), np.empty_like(dead)
    tgt_next = None if tgt is None else np.empty_like(tgt)
    later = np.empty(n, dtype=bool)
    count, dest, tmp = (np.empty(n, dtype=np.intp) for _ in range(3))
    count_t = None if tgt is None else np.empty(n, dtype=np.intp)
    later_t = None if tgt is None else np.empty(n, dtype=bool)
    for level in range((n - 1).bit_length() - 1, low - 1, -1):
        size = 1 << (level + 1)  # the block
        full = n // size * size
        np.bitwise_and(pos, 1 << level, out=count)
        np.not_equal(count, 0, out=later)
        np.cumsum(later, out=count)
        count -= later  # later rows before each row ...
        _per_block(count, size, full)  # ... in its block
        tally = count
        if tgt is not None:
            assert count_t is not None and later_t is not None
            np.logical_and(later, tgt, out=later_t)
            np.cumsum(later_t, out=count_t)
            count_t -= later_t
            _per_block(count_t, size, full)
            tally = count_t
        np.multiply(tally, dead, out=tmp)
        np.multiply(tmp, ~later, out=tmp)
        higher += int(tmp.sum())
        if level > low:
            np.subtract(at, count, out=dest)  # earlier half: its rank among the earlier rows
            np.bitwise_and(at, ~(size - 1), out=tmp)  # later half: after the earlier half
            tmp += 1 << level
            tmp += count
            np.copyto(dest, tmp, where=later)
            pos_next[dest] = pos
            dead_next[dest] = dead
            pos, pos_next, dead, dead_next = pos_next, pos, dead_next, dead
            if tgt is not None:
                assert tgt_next is not None
                tgt_next[dest] = tgt
                tgt, tgt_next = tgt_next, tgt
    return higher


def _per_block(count: np.ndarray, size: int, full: int) -> None:
    """Make running counts restart at every block of ``size`` (in place)."""
    blocks = count[:full].reshape(-1, size)
    blocks -= blocks[:, :1].copy()
    if full < count.size:
        count[full:] -= count[full]


def _within_blocks(pos: np.ndarray, dead: np.ndarray, idx: np.ndarray, bits: int,
                   target: np.ndarray | None = None) -> int:
    """The pairs of :func:`_earlier_events_above_later` within blocks of 2^bits positions."""
    if bits == 0:
        return 0
    n, size = pos.size, 1 << bits
    rows = -(-n // size)
    rank = np.full(rows * size, n, dtype=pos.dtype)  # padding: never lower, never an event
    rank[pos] = idx  # rank in the score order (ties by position) of each position
    ev = np.zeros(rows * size, dtype=bool)
    ev[pos] = dead
    tg = np.zeros(rows * size, dtype=bool)
    tg[pos] = True if target is None else target
    rank2, ev2, tg2 = rank.reshape(rows, size), ev.reshape(rows, size), tg.reshape(rows, size)
    total = 0
    for i in range(size - 1):
        above = rank2[:, i + 1 :] < rank2[:, i : i + 1]
        above &= ev2[:, i : i + 1]
        above &= tg2[:, i + 1 :]
        total += int(np.count_nonzero(above))
    return total
