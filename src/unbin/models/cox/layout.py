"""One survival sample laid out for the Cox engine: the sort by stratum and time, the risk-set
index ranges and sparse operators (``prepare_layout``, made once for any number of
fits), and the sums over event times they support."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import sparse

from .. import compiled
from .inputs import _check_finite, _checked_sample, _design


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
    plain_op: bool  # risk_op is one +1 per row in row order (no delayed entry)
    tie_k: np.ndarray  # (T,) the event times holding more than one event
    tie_ev: np.ndarray  # positions (in kept rows) of the events at those times, grouped
    tie_grp: np.ndarray  # index into tie_k of each event in tie_ev
    tie_f: np.ndarray  # l / d_k for each event in tie_ev (Efron), l = 0 .. d_k - 1
    tie_at: np.ndarray  # event-time index of each event in tie_ev (tie_k[tie_grp])
    tie_wavg: np.ndarray  # wavg of the event time of each event in tie_ev
    b_idx: np.ndarray  # b_i + 1 (index into a zero-padded cumulative array)
    b_counts: np.ndarray  # (K,) kept rows with b_i = k (rows are sorted by b: runs of rows)
    tie_d: np.ndarray  # (T,) events at each of tie_k (the runs of tie_ev)
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
    # the arrays the compiled evaluation reads (``likelihood._kernel_arrays``, made on first use)
    kernel: dict[str, Any] = field(default_factory=dict, compare=False, repr=False)
    # the sparse operators, made on first use: the compiled evaluation never reads them, so a
    # replicate's layout evaluated compiled never pays for them
    operators: dict[str, sparse.csr_matrix] = field(default_factory=dict, compare=False,
                                                    repr=False)

    @property
    def ties(self) -> bool:
        """Some event time has more than one event."""
        return self.tie_k.size > 0

    @property
    def risk_op(self) -> sparse.csr_matrix:
        """(K, m): +1 at (b_i, i), -1 at (a_i, i) for the rows that entered after t_k."""
        op = self.operators.get("risk")
        if op is None:
            late = np.flatnonzero(self.a_idx) if self.late_entry else None
            op = self.operators["risk"] = _risk_operator(
                self.b_idx - 1, self.a_idx, late, np.r_[0, np.cumsum(self.b_counts)],
                self.wsum.size)
        return op

    @property
    def tie_op(self) -> sparse.csr_matrix:
        """(T, m): 1 for the events at each tied event time (runs of ``tie_ev``)."""
        op = self.operators.get("tie")
        if op is None:
            op = self.operators["tie"] = sparse.csr_matrix(
                (np.ones(self.tie_ev.size), self.tie_ev, np.r_[0, np.cumsum(self.tie_d)]),
                shape=(self.tie_k.size, self.order.size))
        return op


def _stratum_time_order(t: np.ndarray, codes: np.ndarray | None, n_strata: int) -> np.ndarray:
    """Rows by stratum, then time (a sort on time, then a stable pass on the codes)."""
    order = _time_order(t)
    if codes is not None and n_strata > 1:
        codes_small = codes.astype(np.uint16) if n_strata < 2**16 else codes
        order = order[np.argsort(codes_small[order], kind="stable")]
    return order


_RADIX_MIN_ROWS = 4096  # below this a plain sort is as fast as the check


def _time_order(t: np.ndarray) -> np.ndarray:
    """``argsort(t, kind="stable")``: rows tied in time keep their input order, on every time
    scale (what :func:`draw_layout` relies on). Times that are whole numbers spanning fewer
    than 2**16 values (e.g. days, as registries store them) are sorted as 16-bit integers by
    numpy's radix sort, several times faster on such heavily tied data; other times (e.g.
    years as fractions) by numpy's stable sort of the floats (at 1,000,000 rows about as fast
    as its default, unstable one)."""
    small = _day_offsets(t)
    if small is not None:
        return np.argsort(small, kind="stable")
    return np.argsort(t, kind="stable")


def _day_offsets(t: np.ndarray) -> np.ndarray | None:
    """``t`` less its smallest value as 16-bit integers when they are whole numbers spanning
    fewer than 2**16 values (and there are at least ``_RADIX_MIN_ROWS``), else None."""
    if t.size >= _RADIX_MIN_ROWS:
        lo = t.min()
        if t.max() - lo < 2**16 - 1:
            offset = t - lo
            small = offset.astype(np.uint16)
            if np.array_equal(small, offset):
                return small
    return None


@dataclass(frozen=True)
class _EventTimes:
    """The event times t_k of the sorted rows (k by stratum, then time) and, per sorted row,
    the range of event-time indices of its stratum up to its own time."""

    b: np.ndarray  # last event time at or before the row's time (a row is at risk at (a, b])
    lo: np.ndarray  # first event time of the row's stratum
    k_time: np.ndarray  # (K,)
    k_stratum: np.ndarray  # (K,) stratum code of each event time


def _event_times(
    t_s: np.ndarray, e_s: np.ndarray, sc_s: np.ndarray | None, n_strata: int
) -> _EventTimes:
    n = t_s.size
    # runs of rows sharing (stratum, time); the runs holding an event are the event times k
    new_run = np.empty(n, dtype=bool)
    new_run[:1] = True
    np.not_equal(t_s[1:], t_s[:-1], out=new_run[1:])
    if sc_s is not None and n_strata > 1:
        new_run[1:] |= sc_s[1:] != sc_s[:-1]
    run_id = np.cumsum(new_run) - 1
    run_first = np.flatnonzero(new_run)
    run_event = np.logical_or.reduceat(e_s, run_first) if n else np.zeros(0, dtype=bool)
    run_k = np.cumsum(run_event) - 1  # last event time at or before each run
    k_first = run_first[run_event]
    k_stratum = np.zeros(k_first.size, dtype=np.int64) if sc_s is None else sc_s[k_first]

    s_first = _stratum_starts(sc_s, n_strata, n)
    s_runs = run_id[s_first]
    lo_stratum = run_k[s_runs] + 1 - run_event[s_runs]  # first event time of each stratum
    if s_first.size <= 1:
        lo = np.full(n, lo_stratum[0] if n else 0, dtype=np.int64)
    else:
        lo = np.repeat(lo_stratum, np.diff(np.r_[s_first, n]))
    return _EventTimes(run_k[run_id], lo, t_s[k_first], k_stratum)


def _stratum_starts(sc_s: np.ndarray | None, n_strata: int, n: int) -> np.ndarray:
    """Position of the first of each stratum's rows among ``n`` rows sorted by stratum."""
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    if sc_s is None or n_strata == 1:
        return np.zeros(1, dtype=np.int64)
    return np.flatnonzero(np.r_[True, sc_s[1:] != sc_s[:-1]])


def _last_before_entry(
    en_s: np.ndarray, sc_s: np.ndarray | None, times: _EventTimes, n_strata: int
) -> np.ndarray:
    """For each sorted row, the last event time of its stratum at or before its entry (the row
    is at risk from the next one on); -1, or one before the stratum's first, if none."""
    if n_strata == 1:
        return np.searchsorted(times.k_time, en_s, side="right") - 1
    assert sc_s is not None
    # one key per (stratum, time), ordered as the event times are
    values = np.unique(times.k_time)
    span = np.int64(values.size + 1)
    k_key = times.k_stratum * span + np.searchsorted(values, times.k_time) + 1
    row_key = sc_s * span + np.searchsorted(values, en_s, side="right")
    return np.searchsorted(k_key, row_key, side="right") - 1


@dataclass(frozen=True)
class _Ties:
    """Efron's terms differ from Breslow's only at the event times with tied events."""

    tied: np.ndarray  # (K,) the event time holds more than one event
    k: np.ndarray  # (T,) those event times
    ev: np.ndarray  # positions (in kept rows) of their events, grouped
    grp: np.ndarray  # index into k of each of those events
    at: np.ndarray  # event-time index of each of those events
    frac: np.ndarray  # l / d_k for each of those events, l = 0 .. d_k - 1


def _tie_structure(ev: np.ndarray, event_k: np.ndarray, d: np.ndarray, m: int) -> _Ties:
    """``ev``: positions of the events (sorted by event time), ``event_k`` their event-time
    index, ``d`` the number of events at each event time, ``m`` the number of kept rows."""
    tied = d > 1
    tie_k = np.flatnonzero(tied)
    in_tied = tied[event_k]
    if in_tied.all():  # e.g. times in days: every event time holds ties
        tie_ev, tie_g = ev, event_k
    else:
        tie_ev, tie_g = ev[in_tied], event_k[in_tied]
    tie_grp = (np.cumsum(tied) - 1)[tie_g]
    tie_d = d[tie_k]
    tie_first = np.cumsum(tie_d) - tie_d
    tie_f = (np.arange(tie_ev.size) - tie_first[tie_grp]) / tie_d[tie_grp]
    return _Ties(tied, tie_k, tie_ev, tie_grp, tie_g, tie_f)


def _risk_operator(
    b: np.ndarray, a_idx: np.ndarray, late: np.ndarray | None, b_starts: np.ndarray, K: int
) -> sparse.csr_matrix:
    """The (K, m) risk-set operator: +1 at (b_i, i), and -1 at (a_i, i) for the rows ``late``
    that entered after their stratum's first event time (``a_idx`` = a_i + 1 there; None:
    no such row). ``b_starts``: the first row with each b (rows are sorted by b), then m."""
    m = b.size
    if late is None or late.size == 0:  # the operator's rows are runs of consecutive rows
        return sparse.csr_matrix((np.ones(m), np.arange(m), b_starts), shape=(K, m))
    n_late = late.size
    rows = np.concatenate([b, a_idx[late] - 1])
    cols = np.concatenate([np.arange(m), late])
    vals = np.concatenate([np.ones(m), -np.ones(n_late)])
    return sparse.csr_matrix((vals, (rows, cols)), shape=(K, m))


def _stratum_segments(
    k_stratum: np.ndarray, n_strata: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per event time, the first and one-past-last event-time index of its stratum; and the
    first index of each stratum with events, then K."""
    K = k_stratum.size
    if n_strata == 1 or K == 0:  # no events: as one stratum (the fit then says "no events")
        return np.zeros(K, dtype=np.int64), np.full(K, K, dtype=np.int64), np.array([0, K])
    k_new = np.ones(K, dtype=bool)
    k_new[1:] = k_stratum[1:] != k_stratum[:-1]
    k_bounds = np.flatnonzero(k_new)
    k_sizes = np.diff(np.r_[k_bounds, K])
    seg_start = np.repeat(k_bounds, k_sizes)
    seg_end = np.repeat(np.r_[k_bounds[1:], K], k_sizes)
    return seg_start, seg_end, np.r_[k_bounds, K]


def _event_weight_sums(
    event_k: np.ndarray, d: np.ndarray, event_weights: np.ndarray | None
) -> np.ndarray:
    """Summed weight of the events at each event time (their count without weights)."""
    if event_weights is None:
        return d.astype(float)
    return np.bincount(event_k, weights=event_weights, minlength=d.size)


def _prepare(
    n: int,
    time: Any,
    event: Any,
    entry: Any | None,
    strata: Any | None,
    weights: Any | None,
) -> Layout:
    """Check one sample of ``n`` rows and lay it out (see :class:`Layout`): sort it by stratum
    and time, give each row its range of event times at risk (from its entry on), drop the
    rows at risk at no event time, and build the tie and risk-set operators."""
    sample = _checked_sample(n, time, event, entry, strata, weights)
    n_strata = int(sample.labels.size)
    order = _stratum_time_order(sample.time, sample.codes, n_strata)
    t_s, e_s = sample.time[order], sample.event[order]
    sc_s = None if sample.codes is None else sample.codes[order]
    times = _event_times(t_s, e_s, sc_s, n_strata)
    b, lo = times.b, times.lo
    en_s = None if sample.entry is None else sample.entry[order]
    a = lo - 1 if en_s is None else _last_before_entry(en_s, sc_s, times, n_strata)
    w_s = None if sample.weights is None else sample.weights[order]
    return _assemble(n, order, t_s, e_s, sc_s, en_s, w_s, b, a, lo, times.k_time,
                     times.k_stratum, sample.labels, n_strata, int(sample.event.sum()))


def _assemble(
    n: int, order: np.ndarray, t_s: np.ndarray, e_s: np.ndarray, sc_s: np.ndarray | None,
    en_s: np.ndarray | None, w_s: np.ndarray | None, b: np.ndarray, a: np.ndarray,
    lo: np.ndarray, k_time: np.ndarray, k_stratum: np.ndarray, labels: np.ndarray,
    n_strata: int, events: int,
) -> Layout:
    """The layout of rows sorted by (stratum, time) (``order``, with their sorted values), each
    with its event-time index b (last at or before its time), a (last at or before its entry)
    and lo (its stratum's first): the rows at risk at no event time dropped, then the tie and
    risk-set operators. ``w_s``: the rows' weights in that order (None: all ones)."""
    unit_w = w_s is None
    K = int(k_time.size)
    keep = b > a  # at risk at one event time at least
    if not keep.all():
        kept = np.flatnonzero(keep)
        order, b, a, lo, e_s, t_s = order[kept], b[kept], a[kept], lo[kept], e_s[kept], t_s[kept]
        sc_s = None if sc_s is None else sc_s[kept]
        en_s = None if en_s is None else en_s[kept]
        w_s = None if w_s is None else w_s[kept]
    m = order.size
    if w_s is None:
        w_s = np.ones(m)

    ev = np.flatnonzero(e_s)
    event_k = b[ev]  # each event's event-time index
    d = np.bincount(event_k, minlength=K)  # events at each event time
    we_ev = w_s[ev]
    wsum = _event_weight_sums(event_k, d, None if unit_w else we_ev)
    wavg = wsum / np.maximum(d, 1)
    ties = _tie_structure(ev, event_k, d, m)
    entered_late = a >= lo
    late_entry = bool(entered_late.any())
    b_starts = np.searchsorted(b, np.arange(K + 1))  # kept rows are sorted by b
    seg_start, seg_end, k_bounds = _stratum_segments(k_stratum, n_strata)
    starts = _stratum_starts(sc_s, n_strata, m)
    return Layout(
        order=order,
        w=w_s,
        unit_w=unit_w,
        we=w_s * e_s,
        ev=ev,
        we_ev=we_ev,
        wavg=wavg,
        wsum=wsum,
        wsum_untied=np.where(ties.tied, 0.0, wsum),
        plain_op=not late_entry,
        tie_k=ties.k,
        tie_ev=ties.ev,
        tie_grp=ties.grp,
        tie_f=ties.frac,
        tie_at=ties.at,
        tie_wavg=wavg[ties.at],
        b_idx=b + 1,
        b_counts=np.diff(b_starts),
        tie_d=d[ties.k],
        a_idx=np.where(entered_late, a + 1, 0) if late_entry else np.zeros(m, dtype=np.int64),
        seg_end=seg_end,
        seg_start=seg_start,
        k_bounds=k_bounds,
        row_starts=starts,
        row_counts=np.diff(np.r_[starts, m]),
        k_stratum=k_stratum,
        k_time=k_time,
        labels=labels,
        n_strata=n_strata,
        late_entry=late_entry,
        n=n,
        events=events,
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


def _design_and_layout(
    X: Any,
    layout: Layout | None,
    time: Any,
    event: Any,
    entry: Any | None = None,
    strata: Any | None = None,
    weights: Any | None = None,
) -> tuple[np.ndarray, Layout]:
    """X checked (2-D, finite) and the layout of its rows: ``layout`` when given (checked
    against X's row count, the sample arrays are then not read), otherwise prepared from
    time, event, entry, strata and weights."""
    Xa = _design(X)
    _check_finite("X", Xa)
    n = Xa.shape[0]
    if layout is None:
        return Xa, _prepare(n, time, event, entry, strata, weights)
    return Xa, _given_layout(layout, n)


_FEW_STRATA = 64  # up to this many strata, sums restart by looping over strata
_accumulate = np.add.accumulate  # np.cumsum of a 1-D array, without its dispatch


def _scaled(L: Layout, op: sparse.csr_matrix, r: np.ndarray) -> sparse.csr_matrix:
    """``op @ diag(r)``: the operator's values times r of their rows (columns of op)."""
    data = r if L.plain_op and op is L.operators.get("risk") else op.data * r[op.indices]
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
        bounds = L.k_bounds.tolist()
        for lo, hi in zip(bounds[:-1], bounds[1:], strict=True):
            for j in range(q):  # one 1-D pass per column: faster than a 2-D cumsum here
                _accumulate(contrib[lo:hi][::-1, j], out=out[j, lo:hi][::-1])
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
        bounds = L.k_bounds.tolist()
        for lo, hi in zip(bounds[:-1], bounds[1:], strict=True):
            _accumulate(c[lo:hi], out=out[lo + 1 : hi + 1])
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


def draw_layout(
    full: Layout, copies: np.ndarray, weights: np.ndarray | None, codes: np.ndarray | None,
) -> Layout | None:
    """What :func:`prepare_layout` makes of a bootstrap replicate's drawn rows, derived from
    the full sample's layout ``full`` without sorting them again: the replicate is every row i
    of the full sample repeated ``copies[i]`` times, in row order (a row's copies side by
    side, as ``unbin.models.weighted.replicate_rows`` lays them out), with case weight
    ``weights[i]`` (one per row of the full sample; None: no weights); ``codes``: the full
    sample's stratum code of every row (``inputs._stratum_codes``; None without strata).

    Valid because ``prepare_layout`` sorts every sample stably, on every time scale (rows tied
    in stratum and time in input order, :func:`_time_order`): the replicate's rows by (stratum,
    time) are the full sample's sorted rows, each repeated as drawn, ties in row order. The replicate's
    event times are those of the full sample holding a drawn event, so each row's event-time
    indices (last at or before its time, its entry, its stratum's first) are counts of them
    up to the full sample's indices; a row the full sample drops (at risk at no event time) is
    dropped by the replicate too. The result equals ``prepare_layout``'s array for array.
    None where no drawn row is an event: the caller then prepares the layout (which reports
    that)."""
    copies = np.asarray(copies).astype(np.int64)
    if copies.shape != (full.n,):
        raise ValueError(f"copies must have one value per row of the full sample ({full.n}), "
                         f"got shape {copies.shape}")
    N = int(copies.sum())
    K = full.k_time.size
    if N == 0 or K == 0:
        return None
    b_full = full.b_idx - 1
    has = np.zeros(K, dtype=bool)  # the replicate's event times (among the full sample's)
    has[b_full[full.ev[copies[full.order[full.ev]] > 0]]] = True
    if not has.any():
        return None
    count = np.zeros(K + 1, dtype=np.int64)  # replicate event times before each full one
    np.cumsum(has, out=count[1:])
    # each row's first copy among the drawn rows (a row's copies side by side, in row order)
    first = np.cumsum(copies)
    first -= copies
    if codes is None:
        recode, labels, n_strata = None, full.labels, 1
        k_stratum = full.k_stratum[has]
    else:
        present = np.zeros(full.labels.size, dtype=bool)
        present[codes[copies > 0]] = True
        recode = np.cumsum(present) - 1
        labels, n_strata = full.labels[present], int(present.sum())
        k_stratum = recode[full.k_stratum[has]]
    w = None if weights is None else np.asarray(weights, dtype=float)
    if compiled.wanted(N, DRAW_FROM_ROWS):
        rows = _drawn_rows_compiled(full, copies, first, count, recode, w, N)
    else:
        rows = _drawn_rows(full, copies, first, count, recode, w)
    order, t_s, e_s, sc_s, en_s, w_s, b, a, lo, events, src = rows
    out = _assemble(N, order, t_s, e_s, sc_s, en_s, w_s, b, a, lo, full.k_time[has],
                    k_stratum, labels, n_strata, events)
    if src.size == out.order.size:  # (every drawn row is kept: _assemble drops none)
        # each laid-out row's position in the full layout, for the replicate refits' design
        # (``fit._sorted_replicate_design``)
        out.kernel["drawn_from"] = (full, src)
    return out


DRAW_FROM_ROWS = 20_000  # drawn rows from which draw_layout's rows come from one compiled pass

_DrawnRows = tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None, np.ndarray | None,
                   np.ndarray | None, np.ndarray, np.ndarray, np.ndarray, int, np.ndarray]


def _drawn_rows(
    full: Layout, copies: np.ndarray, first: np.ndarray, count: np.ndarray,
    recode: np.ndarray | None, w: np.ndarray | None,
) -> _DrawnRows:
    """:func:`draw_layout`'s replicate rows in (stratum, time) order, by numpy passes: their
    positions among the drawn rows, time, event, stratum code, entry, weight, event-time
    indices b, a and lo, the replicate's number of events and each row's position among the
    full sample's laid-out rows."""
    c_k = copies[full.order]  # copies of each of the full sample's kept rows
    b_full = full.b_idx - 1
    lo_full = full.seg_start[b_full]
    a_full = np.where(full.a_idx > 0, full.a_idx - 1, lo_full - 1)
    b = count[b_full + 1] - 1
    a = count[a_full + 1] - 1
    rows = np.flatnonzero((c_k > 0) & (b > a))  # drawn, at risk at a replicate event time
    c = c_k[rows]
    rep = np.repeat(rows, c)  # the full sample's kept row of each of the replicate's
    order = np.repeat(first[full.order[rows]], c)
    order += np.arange(rep.size)
    order -= np.repeat(np.cumsum(c) - c, c)
    lo = count[lo_full[rep]]
    if recode is None:
        sc_s = None
    else:
        assert full.code_s is not None
        sc_s = recode[full.code_s[rep]]
    w_s = None if w is None else w[full.order[rep]]
    events = int(np.dot(c_k, full.event_s))
    return (order, full.time_s[rep], full.event_s[rep], sc_s,
            None if full.entry_s is None else full.entry_s[rep], w_s, b[rep], a[rep], lo, events,
            rep)


def _drawn_rows_compiled(
    full: Layout, copies: np.ndarray, first: np.ndarray, count: np.ndarray,
    recode: np.ndarray | None, w: np.ndarray | None, N: int,
) -> _DrawnRows:
    """:func:`_drawn_rows` as one compiled pass (``compiled.cox_draw``), the same arrays."""
    from ..compiled import cox_draw

    none_i, none_f = np.zeros(0, dtype=np.int64), np.zeros(0)
    order = np.empty(N, dtype=np.int64)
    t_s, e_s = np.empty(N), np.empty(N, dtype=bool)
    en_s = none_f if full.entry_s is None else np.empty(N)
    sc_s = none_i if recode is None else np.empty(N, dtype=np.int64)
    w_s = none_f if w is None else np.empty(N)
    b, a, lo, src = (np.empty(N, dtype=np.int64) for _ in range(4))
    # the draws of the laid-out rows gathered first (independent loads), then read in order
    m, events = cox_draw.drawn_rows(
        copies[full.order], first[full.order], full.b_idx, full.a_idx, full.seg_start, count, full.time_s,
        full.event_s, none_f if full.entry_s is None else full.entry_s,
        none_i if recode is None or full.code_s is None else full.code_s,
        none_i if recode is None else recode, none_f if w is None else w[full.order],
        order, t_s, e_s, en_s, sc_s, w_s, b, a, lo, src)
    return (order[:m], t_s[:m], e_s[:m], None if recode is None else sc_s[:m],
            None if full.entry_s is None else en_s[:m], None if w is None else w_s[:m],
            b[:m], a[:m], lo[:m], int(events), src[:m])
