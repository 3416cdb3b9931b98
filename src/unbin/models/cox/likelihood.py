"""The Cox log partial likelihood, its score and observed information at a coefficient vector
(Efron or Breslow ties), on the sorted, standardised covariates of one layout."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from .. import compiled
from .layout import Layout, _forward_cum, _risk_sums, _scaled, _shifted_eta

_BLOCK = 8192  # rows per block of the weighted cross-products (stays in cache)

# From this many rows of a sample on, its evaluations run compiled
# (``models/compiled/cox_evaluation.py``); a subsample's design inherits the choice of the
# sample it was drawn from, so the subsample start of a large fit runs compiled too.
EVALUATION_FROM_ROWS = 20_000


@dataclass(frozen=True)
class _Design:
    """The kept rows' covariates, sorted and standardised, with a leading column of ones."""

    X1: np.ndarray  # (m, 1 + p), C-contiguous
    xwe: np.ndarray  # (p,) sum over events of w x: the part of the score that never changes
    reach: np.ndarray  # (p,) largest |x| of each standardised column (or a bound on it)
    buf: np.ndarray  # (min(m, _BLOCK), 1 + p) scratch
    compiled: bool = False  # evaluate with the compiled kernel

    @classmethod
    def of(
        cls, X1: np.ndarray, we: np.ndarray, reach: np.ndarray, xwe: np.ndarray | None = None,
        compiled_from: int | None = None,
    ) -> _Design:
        """``xwe``: ``X1[:, 1:].T @ we`` when the caller has it already; ``compiled_from``:
        the rows that decide whether the evaluations run compiled (X1's own by default)."""
        rows = X1.shape[0] if compiled_from is None else compiled_from
        use = compiled.wanted(rows, EVALUATION_FROM_ROWS)
        buf = np.empty((0 if use else min(X1.shape[0], _BLOCK), X1.shape[1]))
        return cls(X1, X1[:, 1:].T @ we if xwe is None else xwe, reach, buf, use)


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


def _per_tied_event(L: Layout, values: np.ndarray) -> np.ndarray:
    """(T,) values of the tied event times, one per tied event (ordered as ``L.tie_ev``):
    ``values[L.tie_grp]``, as runs (``np.repeat``, several times faster than the gather)."""
    return np.repeat(values, L.tie_d)


def _per_tied_time(L: Layout, values: np.ndarray) -> np.ndarray:
    """Sums of per-tied-event values (ordered as ``L.tie_ev``) by tied event time: the events
    of one time are a run (the tie operator's row), so one ``reduceat`` adds them."""
    return np.add.reduceat(values, L.tie_op.indptr[:-1])


@dataclass
class _Point:
    """One coefficient vector's log partial likelihood and the per-row and per-event-time
    terms its score and information share (see :func:`_evaluate`)."""

    loglik: float
    r: np.ndarray  # w exp(eta), eta shifted within strata
    sums: np.ndarray  # (1, K) risk-set sums of r, or (1 + p, K) with those of r x
    tied_sums: np.ndarray | None  # Efron: (T,) or (T, 1 + p) sums of r (and r x) at tied times
    den: np.ndarray | None  # Efron: each tied event's denominator S0 - f T0
    v: np.ndarray | None = None  # r_i sum_{k: i in R_k} c_k (the Gram's row weights)
    a: np.ndarray | None = None  # (K,) the weights of S1 S1' (filled at the tied times later)
    w_inv: np.ndarray | None = None  # Efron: wavg / den per tied event
    fw_inv: np.ndarray | None = None  # Efron: f wavg / den per tied event
    # the compiled path's Efron weights per tied event time: sums of f^j wavg / den^2, j = 1, 2
    a1: np.ndarray | None = None
    a2: np.ndarray | None = None
    score: np.ndarray | None = None  # the compiled point's score, when it was asked for
    # with it, the compiled point's risk-set sums of r x (K, p) and tied events' sums (T, p)
    S1: np.ndarray | None = None
    T1: np.ndarray | None = None


def _kernel_arrays(L: Layout, efron: bool) -> tuple[np.ndarray, ...]:
    """The layout's arrays as the compiled kernels read them (made once per layout): the kept
    rows' weights and last event time at risk b (as b + 1, the layout's ``b_idx``), the rows
    that entered after their stratum's first event time with the last event time before their
    entry, the strata's bounds among the event times, the event weights per event time, and
    the tie structure (empty for Breslow or without ties)."""
    key = "efron" if efron and L.ties else "breslow"
    got = L.kernel.get(key)
    if got is None:
        base = L.kernel.get("rows")
        if base is None:
            late = L.a_idx > 0
            base = L.kernel["rows"] = (
                L.w, np.asarray(L.b_idx, dtype=np.int64), np.flatnonzero(late),
                np.asarray(L.a_idx[late] - 1, dtype=np.int64),
                np.asarray(L.k_bounds, dtype=np.int64), L.wsum, L.wsum_untied,
            )
        if key == "efron":
            ties = (np.asarray(L.tie_k, dtype=np.int64), np.asarray(L.tie_d, dtype=np.int64),
                    L.tie_f, L.tie_wavg, np.asarray(L.tie_ev, dtype=np.int64))
        else:
            none_i = np.zeros(0, dtype=np.int64)
            ties = (none_i, none_i, np.zeros(0), np.zeros(0), none_i)
        got = L.kernel[key] = base + ties
    return got


def _point_arrays(L: Layout) -> tuple[np.ndarray, ...]:
    """The layout's arrays the compiled point (:func:`_compiled_point`) reads besides
    :func:`_kernel_arrays`' (made once per layout): the strata's runs of rows, the rows' event
    weights summed by stratum, each event time's index among the tied ones (-1: not tied) and
    the rows' event indicators as 0/1 numbers."""
    got = L.kernel.get("point")
    if got is None:
        # every kept row is at risk at an event time of its stratum, so the strata of the rows
        # and of the event times are the same, in the same order
        assert L.row_starts.size == L.k_bounds.size - 1
        k_group = np.full(L.wsum.size, -1, dtype=np.int64)
        k_group[L.tie_k] = np.arange(L.tie_k.size)
        got = L.kernel["point"] = (
            np.asarray(L.row_starts, dtype=np.int64), np.asarray(L.row_counts, dtype=np.int64),
            np.add.reduceat(L.we, L.row_starts) if L.we.size else np.zeros(0), k_group,
            np.asarray(L.event_s, dtype=float),
        )
    return got


def _compiled_point(L: Layout, D: _Design, beta: np.ndarray, efron: bool,
                    score: bool) -> _Point:
    """:func:`_point` by the compiled kernel ``score_point``: the linear predictor, ``exp``,
    the risk-set and tied sums of r and, with ``score``, of r x and the score from them, in
    one read of the design (the logarithms of the K sums stay numpy's). The sums of r x are
    kept only for the score: the information's kernel forms its own beside the Gram
    product."""
    from ..compiled import cox_evaluation

    (w, b, late_rows, late_at, k_bounds, wsum, wsum_untied, tie_k, tie_d, tie_f, tie_wavg,
     _) = _kernel_arrays(L, efron)
    row_starts, row_counts, we_strata, k_group, ev_f = _point_arrays(L)
    X1 = D.X1
    m, p = X1.shape[0], X1.shape[1] - 1
    efron_terms = efron and L.ties
    K, T = L.wsum.size, tie_k.size
    s0, t0, den = np.empty(K), np.empty(T), np.empty(tie_f.size)
    r, shifts = np.empty(m), np.empty(row_starts.size)
    score = score and p > 0
    S1, T1 = (np.empty((K, p)), np.empty((T, p))) if score else (np.empty((0, p)),) * 2
    sc = np.empty(p)
    beta = np.ascontiguousarray(beta, dtype=float)
    cox_evaluation.score_point(
        X1, beta, row_starts, row_counts, k_bounds, w, L.unit_w, b, late_rows, late_at,
        wsum_untied if efron_terms else wsum, D.xwe, tie_k, tie_d, tie_f, tie_wavg, k_group,
        ev_f, score, r, shifts, s0, S1, t0, T1, den, sc)
    # the events' summed w (eta - shift): sum_i we_i x_i' beta less each stratum's shift
    loglik = float(D.xwe @ beta) - float(we_strata @ shifts) if p else 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        log_s0 = np.log(s0)
        if efron_terms:
            loglik -= float(L.wsum_untied @ log_s0 + L.tie_wavg @ np.log(den))
        else:
            loglik -= float(L.wsum @ log_s0)
    return _Point(loglik, r, s0[None, :], t0 if efron_terms else None,
                  den if efron_terms else None, score=sc if score else None,
                  S1=S1 if score else None, T1=T1 if score and efron_terms else None)


def _compiled_row_weights(L: Layout, pt: _Point) -> None:
    """:func:`_row_weights` by the compiled kernel (also the Efron weights ``a1``, ``a2``)."""
    if pt.v is not None:
        return
    from ..compiled import cox_evaluation

    efron_terms = pt.den is not None
    (_, b, late_rows, late_at, k_bounds, wsum, wsum_untied, tie_k, tie_d, tie_f, tie_wavg,
     tie_ev) = _kernel_arrays(L, efron_terms)
    T = tie_k.size
    v, a, a1, a2 = np.empty(pt.r.size), np.empty(L.wsum.size), np.zeros(T), np.zeros(T)
    cox_evaluation.row_weights(pt.r, pt.sums[0], pt.den if efron_terms else np.zeros(0), b,
                               late_rows, late_at, k_bounds, wsum, wsum_untied, tie_k, tie_d,
                               tie_f, tie_wavg, tie_ev, efron_terms, v, a, a1, a2)
    pt.v, pt.a, pt.a1, pt.a2 = v, a, a1, a2


def _compiled_information(L: Layout, D: _Design, pt: _Point) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_information` by the compiled kernel."""
    from ..compiled import cox_evaluation

    _compiled_row_weights(L, pt)
    assert pt.v is not None and pt.a is not None and pt.a1 is not None and pt.a2 is not None
    efron_terms = pt.den is not None
    (_, b, late_rows, late_at, k_bounds, _, _, tie_k, tie_d, _, _,
     tie_ev) = _kernel_arrays(L, efron_terms)
    p = D.X1.shape[1] - 1
    none = np.empty((0, p))
    # (the sums of r x that the point's score formed are not formed again)
    return cox_evaluation.information(D.X1, pt.r, pt.v, D.xwe, b, late_rows, late_at,
                                      k_bounds, tie_k, tie_d, tie_ev, pt.a, pt.a1, pt.a2,
                                      efron_terms, none if pt.S1 is None else pt.S1.copy(),
                                      none if pt.T1 is None else pt.T1)


def _point(L: Layout, D: _Design, beta: np.ndarray, efron: bool, with_x: bool,
           score: bool = True) -> _Point:
    """The log partial likelihood at ``beta`` with the risk-set sums of r (``with_x``: and of
    r x, which only the information needs). ``score``: the score will be asked for (the
    compiled path then forms it in the same pass; the numpy path later, in :func:`_score`)."""
    if D.compiled:
        return _compiled_point(L, D, beta, efron, score and not with_x)
    X1 = D.X1
    p = X1.shape[1] - 1
    loglik = 0.0
    if p and beta.any():
        eta = _shifted_eta(L, X1[:, 1:] @ beta)
        loglik = float(L.we_ev @ np.take(eta, L.ev))
        with np.errstate(over="ignore", under="ignore"):
            r = np.exp(eta, out=eta)  # (eta is not needed any more)
        if not L.unit_w:
            r *= L.w
    else:
        r = L.w
    efron_terms = efron and L.ties
    # risk-set sums of r (row 0) and, for the information, of r x (rows 1..p) at each event time
    if with_x:
        sums = _risk_sums(L, _scaled(L, L.risk_op, r) @ X1)
    else:
        sums = _risk_sums(L, np.asarray(L.risk_op @ r)[:, None])
    s0 = sums[0]
    tied_sums = den = None
    with np.errstate(divide="ignore", invalid="ignore"):
        log_s0 = np.log(s0)
        if efron_terms:  # one term per tied event: denominators S0 - (l/d) T0
            if with_x:
                tied_sums = _scaled(L, L.tie_op, r) @ X1
            else:
                tied_sums = _per_tied_time(L, np.take(r, L.tie_ev))
            t0 = tied_sums[:, 0] if with_x else tied_sums
            # the events of a tied time are a run of tie_ev: its values repeated, not gathered
            den = _per_tied_event(L, s0[L.tie_k])
            den -= L.tie_f * _per_tied_event(L, t0)
            loglik -= float(L.wsum_untied @ log_s0 + L.tie_wavg @ np.log(den))
        else:  # Breslow, or no tied events: one term per event time
            loglik -= float(L.wsum @ log_s0)
    return _Point(loglik, r, sums, tied_sums, den)


def _row_weights(L: Layout, pt: _Point) -> None:
    """Fill ``pt.v`` (and the event-time weights the information needs)."""
    if pt.v is not None:
        return
    s0, r = pt.sums[0], pt.r
    # sum_k c_k sum_{i in R_k} r_i x_i x_i' = X' diag(v) X with v_i = r_i sum_{k: i in R_k} c_k;
    # the risk-set means enter as sum_k a_k S1_k S1_k' (and, for tied events, one per event)
    if pt.den is not None:
        c = L.wsum_untied / s0
        pt.a = L.wsum_untied / s0**2
        inv = 1.0 / pt.den
        pt.w_inv = L.tie_wavg * inv
        pt.fw_inv = L.tie_f * pt.w_inv
        c[L.tie_k] = _per_tied_time(L, pt.w_inv)
        bk = _per_tied_time(L, pt.fw_inv)
    else:
        c = L.wsum / s0
        pt.a = c / s0
    cum = _forward_cum(L, c)
    # cum[L.b_idx]: the kept rows are sorted by b, so runs of one value each (np.repeat)
    at_b = np.repeat(cum[1:], L.b_counts)
    v = r * (at_b - cum[L.a_idx]) if L.late_entry else r * at_b
    if pt.den is not None:
        v[L.tie_ev] -= np.take(r, L.tie_ev) * _per_tied_event(L, bk)
    pt.v = v


def _score(L: Layout, D: _Design, pt: _Point) -> np.ndarray:
    """The score at the point (from the risk-set sums of r only)."""
    if pt.score is not None:
        return pt.score
    if D.compiled:
        _compiled_row_weights(L, pt)
    else:
        _row_weights(L, pt)
    assert pt.v is not None
    return D.xwe - D.X1[:, 1:].T @ pt.v


def _information(L: Layout, D: _Design, pt: _Point) -> tuple[np.ndarray, np.ndarray]:
    """The score and observed information at the point (computing the risk-set sums of r x
    when ``pt`` has only those of r)."""
    if D.compiled:
        return _compiled_information(L, D, pt)
    X1 = D.X1
    if pt.sums.shape[0] == 1:  # add the sums of r x
        pt.sums = _risk_sums(L, _scaled(L, L.risk_op, pt.r) @ X1)
        if pt.den is not None:
            pt.tied_sums = _scaled(L, L.tie_op, pt.r) @ X1
    _row_weights(L, pt)
    assert pt.v is not None and pt.a is not None
    gram = _weighted_gram(D, pt.v)
    score = D.xwe - gram[1:, 0]
    S1 = pt.sums[1:]
    a = pt.a
    if pt.den is not None:
        assert pt.tied_sums is not None and pt.w_inv is not None and pt.fw_inv is not None
        # Each tied event's risk-set mean is (S1_k - f T1_k) / den (f = l/d), so the sum over
        # the d_k events of wavg * mean mean' is, per tied event time, S1 S1' a0 - (S1 T1' +
        # T1 S1') a1 + T1 T1' a2 with a_j = sum over its events of wavg f^j / den^2: three
        # sums per tied event time instead of a p-vector per tied event.
        inv = 1.0 / pt.den
        a0 = _per_tied_time(L, pt.w_inv * inv)
        a1 = _per_tied_time(L, pt.fw_inv * inv)
        a2 = _per_tied_time(L, pt.fw_inv * L.tie_f * inv)
        a = a.copy()
        a[L.tie_k] = a0
        T1 = pt.tied_sums[:, 1:]  # (T, p)
        cross = (S1[:, L.tie_k] * a1) @ T1
        info = gram[1:, 1:] - (S1 * a) @ S1.T + cross + cross.T - (T1.T * a2) @ T1
    else:
        info = gram[1:, 1:] - (S1 * a) @ S1.T
    info = (info + info.T) / 2.0
    return score, info


def _evaluate(
    L: Layout, D: _Design, beta: np.ndarray, efron: bool, order: int = 2
) -> tuple[float, np.ndarray, np.ndarray]:
    """Log partial likelihood, score and observed information at ``beta``.

    ``order`` 0 computes the log partial likelihood only, 1 adds the score (which needs the
    risk-set sums of r only), 2 the information too; what is not computed is zeros.
    """
    p = D.X1.shape[1] - 1
    order = order if p > 0 else 0
    pt = _point(L, D, beta, efron, order == 2, order == 1)
    if order == 0 or not np.isfinite(pt.loglik):
        return pt.loglik, np.zeros(p), np.zeros((p, p))
    if order == 1:
        return pt.loglik, _score(L, D, pt), np.zeros((p, p))
    score, info = _information(L, D, pt)
    return pt.loglik, score, info


def _column_stats(a: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Mean, standard deviation (divisor m), largest and smallest value of each column of an
    (m, p) array, m > 0, p > 0.

    A C-contiguous array is read once, in blocks that stay in cache, each seen as rows of
    ``_STD_WIDE`` rows (a reduction down a few columns is several times slower). The variance
    is the mean square less the squared mean; its rounding error is a few units of 1e-16 times
    the mean square, so a column whose variance is below 1e-6 times its squared mean (a
    near-constant column far from zero) is centred and summed again, as a two-pass computation
    would."""
    m, p = a.shape
    if a.flags.c_contiguous:
        lanes = _STD_WIDE * p
        total, squares = np.zeros(lanes), np.zeros(lanes)
        hi, lo = np.full(lanes, -np.inf), np.full(lanes, np.inf)
        whole = m - m % _STD_BLOCK
        for start in range(0, whole, _STD_BLOCK):
            wide = a[start : start + _STD_BLOCK].reshape(-1, lanes)
            total += wide.sum(axis=0)
            squares += np.einsum("ij,ij->j", wide, wide)
            np.maximum(hi, wide.max(axis=0), out=hi)
            np.minimum(lo, wide.min(axis=0), out=lo)
        rest = a[whole:]
        total = total.reshape(_STD_WIDE, p).sum(axis=0) + rest.sum(axis=0)
        squares = squares.reshape(_STD_WIDE, p).sum(axis=0) + np.einsum("ij,ij->j", rest, rest)
        hi = np.maximum(hi.reshape(_STD_WIDE, p).max(axis=0), rest.max(axis=0, initial=-np.inf))
        lo = np.minimum(lo.reshape(_STD_WIDE, p).min(axis=0), rest.min(axis=0, initial=np.inf))
    else:
        total, squares = np.ones(m) @ a, np.einsum("ij,ij->j", a, a)
        hi, lo = a.max(axis=0), a.min(axis=0)
    return _moments(lambda j: a[:, j], m, total, squares, hi, lo)


def _moments(
    column: Callable[[int], np.ndarray], m: int, total: np.ndarray, squares: np.ndarray,
    hi: np.ndarray, lo: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """:func:`_column_stats` from the columns' sums and sums of squares over m rows (the
    column ``j`` of which is ``column(j)``, re-summed, centred, where the variance is below
    1e-6 times the squared mean)."""
    mean = total / m
    var = squares / m - mean * mean
    for j in np.flatnonzero(~(var > 1e-6 * mean * mean)).tolist():
        centred = column(j) - mean[j]
        var[j] = centred @ centred / m
    return mean, np.sqrt(var), hi, lo


def _compiled_standardised(
    X1: np.ndarray, Xa: np.ndarray, rows: np.ndarray | None, L: Layout,
    centre: tuple[np.ndarray, np.ndarray] | None, bounds: np.ndarray | None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The compiled :func:`_standardised` / ``fit._replicate_design``: the rows ``rows`` of
    ``Xa`` (all when None; a row drawn k times repeated k times) in ``L``'s order, written
    into columns 1..p of ``X1`` centred and scaled by ``centre`` (mean, 1 / scale; None: the
    statistics of the rows laid out, as :func:`_column_stats`). Returns mean, sd (unclipped),
    largest, smallest value (NaN when ``centre`` was given), and the events' summed w x;
    ``bounds`` (2, p), when given, receives each standardised column's extremes."""
    from ..compiled import cox_standardise

    p = Xa.shape[1]
    n_src = Xa.shape[0] if rows is None else rows.size
    pos, we_src = np.empty(n_src, dtype=np.int64), np.empty(n_src)
    cox_standardise.positions(np.asarray(L.order, dtype=np.int64), L.we, pos, we_src)
    drawn = np.zeros(0, dtype=np.int64) if rows is None else np.asarray(rows, dtype=np.int64)
    if centre is None:
        total, squares, hi, lo = np.empty(p), np.empty(p), np.empty(p), np.empty(p)
        masked = L.order.size < n_src
        cox_standardise.column_sums(Xa, drawn, pos, masked, total, squares, hi, lo)

        def column(j: int) -> np.ndarray:
            if rows is None and not masked:
                return Xa[:, j]
            return Xa[np.flatnonzero(pos >= 0) if rows is None else drawn[pos >= 0], j]

        mean, sd, hi, lo = _moments(column, L.order.size, total, squares, hi, lo)
        sd_clip = sd.copy()
        sd_clip[sd_clip <= 1e-12 * np.maximum(1.0, np.abs(mean))] = 0.0
        inv = 1.0 / np.where(sd_clip > 0, sd_clip, 1.0)
    else:
        mean, inv = centre
        sd = hi = lo = np.full(p, np.nan)
    xwe = np.empty(p)
    cox_standardise.scatter_standardised(X1, Xa, drawn, pos, we_src, mean, inv,
                                         np.empty((2, p)) if bounds is None else bounds,
                                         bounds is not None, xwe)
    return mean, sd, hi, lo, xwe


_STD_BLOCK = 4096  # rows gathered, centred and scaled at a time (stays in cache)
_STD_WIDE = 256  # rows seen as one wide row by the in-cache arithmetic (_STD_BLOCK's divisor)


def _standardised(Xa: np.ndarray, L: Layout) -> tuple[_Design, np.ndarray, np.ndarray]:
    """The kept rows of X, sorted, centred and scaled, behind a column of ones; the scale of
    each column (to map estimates back) and its standard deviation (0 for a constant column).

    The column statistics come from X as given when every row is kept (the order of the rows
    does not matter to them), so the sorted copy is written once: blocks of rows are gathered
    (each row as one opaque item of p doubles) into a buffer that stays in cache, centred and
    scaled there (``_STD_WIDE`` rows at a time, as one wide row: numpy's per-row overhead on
    rows of a few columns would otherwise dominate), then stored behind the ones, again as
    opaque items."""
    Xa = np.asarray(Xa, dtype=float)  # (no copy of float64)
    m, p = L.order.size, Xa.shape[1]
    X1 = np.empty((m, 1 + p))
    X1[:, 0] = 1.0
    if m == 0 or p == 0:
        return _Design.of(X1, L.we, np.zeros(p)), np.ones(p), np.zeros(p)
    if compiled.wanted(m, EVALUATION_FROM_ROWS):
        mean, sd, hi, lo, xwe = _compiled_standardised(X1, Xa, None, L, None, None)
        sd[sd <= 1e-12 * np.maximum(1.0, np.abs(mean))] = 0.0  # constant up to rounding
        scale = np.where(sd > 0, sd, 1.0)
        reach = np.maximum(hi - mean, mean - lo) * (1.0 / scale)
        return _Design.of(X1, L.we, reach, xwe), scale, sd
    rows: np.ndarray | None = None
    if Xa.flags.c_contiguous and Xa.shape[0] == m:
        src = Xa
        rows = L.order
    elif Xa.flags.f_contiguous and not Xa.flags.c_contiguous:  # e.g. from a data frame
        cols = np.empty((p, m))
        for j in range(p):  # gather column by column: each column is contiguous
            np.take(Xa[:, j], L.order, out=cols[j])
        src = cols.T
    else:
        src = np.take(Xa, L.order, axis=0)
    mean, sd, hi, lo = _column_stats(src)
    sd[sd <= 1e-12 * np.maximum(1.0, np.abs(mean))] = 0.0  # constant up to rounding
    scale = np.where(sd > 0, sd, 1.0)
    inv = 1.0 / scale
    xwe = _write_standardised(X1, src, rows, mean, inv, L.we)
    reach = np.maximum(hi - mean, mean - lo) * inv
    return _Design.of(X1, L.we, reach, xwe), scale, sd


def _write_standardised(
    X1: np.ndarray, src: np.ndarray, rows: np.ndarray | None, mean: np.ndarray,
    inv: np.ndarray, we: np.ndarray, bounds: np.ndarray | None = None,
) -> np.ndarray:
    """Write ``(src[rows] - mean) * inv`` (``src`` itself when ``rows`` is None) into columns
    1..p of ``X1`` and return the events' summed ``we x`` (see :func:`_standardised`); ``src``
    C-contiguous when ``rows`` is given. ``bounds`` (2, p), when given, receives the largest
    and the smallest value written in each column (while each block is in cache)."""
    m, p = X1.shape[0], X1.shape[1] - 1
    item = np.dtype((np.void, 8 * p))
    items = None if rows is None else src.view(item).reshape(src.shape[0])
    # X1's columns 1..p of each row, as one opaque item per row
    out = np.ndarray((m,), dtype=item, buffer=X1, offset=X1.itemsize, strides=(X1.strides[0],))
    buf = np.empty((min(m, _STD_BLOCK), p))
    buf_items = buf.view(item).reshape(buf.shape[0])
    mean_wide, inv_wide = np.tile(mean, _STD_WIDE), np.tile(inv, _STD_WIDE)
    xwe = np.zeros(p)  # the events' summed w x, while each block is in cache
    if bounds is not None:
        bounds[0], bounds[1] = -np.inf, np.inf
    for start in range(0, m, _STD_BLOCK):
        k = min(_STD_BLOCK, m - start)
        block = buf[:k]
        if items is None:
            block[:] = src[start : start + k]
        else:
            assert rows is not None
            np.take(items, rows[start : start + k], out=buf_items[:k], mode="clip")
        if k == _STD_BLOCK:
            wide = buf.reshape(-1, _STD_WIDE * p)
            wide -= mean_wide
            wide *= inv_wide
        else:
            block -= mean
            block *= inv
        out[start : start + k] = buf_items[:k]
        xwe += we[start : start + k] @ block
        if bounds is not None:
            _widen_bounds(bounds, block)
    return xwe


def _widen_bounds(bounds: np.ndarray, block: np.ndarray) -> None:
    """Widen ``bounds`` (largest, smallest per column) to the values of a C-contiguous block
    of rows, read as wide rows of ``_STD_WIDE`` rows each as far as they go (a reduction down a
    few columns costs numpy's per-row overhead on every row)."""
    k, p = block.shape
    whole = k - k % _STD_WIDE
    if whole:
        wide = block[:whole].reshape(-1, _STD_WIDE * p)
        np.maximum(bounds[0], wide.max(axis=0).reshape(-1, p).max(axis=0), out=bounds[0])
        np.minimum(bounds[1], wide.min(axis=0).reshape(-1, p).min(axis=0), out=bounds[1])
    if whole < k:
        rest = block[whole:]
        np.maximum(bounds[0], rest.max(axis=0), out=bounds[0])
        np.minimum(bounds[1], rest.min(axis=0), out=bounds[1])
