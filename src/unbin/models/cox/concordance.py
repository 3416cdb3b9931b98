"""Harrell's C in O(n log n): the time order and tie counts of one sample
(``concordance_order``), kept for the C-indices of many scores, and ``concordance``; with
weights, ``weighted_concordance`` (every pair counted w_i w_j) on ``weighted_pair_sums``."""

from __future__ import annotations

import threading
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..compiled import wanted
from ..radix import stable_order
from .inputs import (
    _as_1d,
    _check_finite,
    _entry_array,
    _event_array,
    _positive_weights,
    _stratum_codes,
)


class _Scratch:
    """Work arrays of one call of :func:`scores_concordances`, reused from pass to pass and
    from score to score (per thread). A fresh array of a few hundred thousand numbers costs
    the kernel a page fault per 4 KiB the first time it is written (at 200,000 rows about as
    much as the pass itself); reusing them saves that. They go with the call: a bootstrap's
    replicate gets all its scores in one call, so nothing stays resident between replicates.
    ``get`` hands out a named buffer as an array of ``size`` values of ``dtype``, contents
    undefined (the bytes of the largest use so far, so one name serves several types; the
    callers give a name to one array at a time); ``arange`` one holding 0..size-1."""

    def __init__(self) -> None:
        self._arrays: dict[tuple[int, str], np.ndarray] = {}

    def get(self, name: str, size: int, dtype: Any) -> np.ndarray:
        key = (threading.get_ident(), name)
        nbytes = size * np.dtype(dtype).itemsize
        a = self._arrays.get(key)
        if a is None or a.size < nbytes:
            a = np.empty(max(nbytes, 8), dtype=np.uint8)
            self._arrays[key] = a
        return a[:nbytes].view(dtype)

    def arange(self, size: int, dtype: Any) -> np.ndarray:
        key = (threading.get_ident(), "arange")
        a = self._arrays.get(key)
        if a is None or a.size < size or a.dtype != np.dtype(dtype):
            a = np.arange(size, dtype=dtype)
            self._arrays[key] = a
        return a[:size]


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
    last: np.ndarray  # each item's stratum's end (exclusive) in the kept items


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
    events: np.ndarray | None = None  # positions of the events in that order
    events_end: np.ndarray | None = None  # the end (exclusive) of each event's stratum


def _small_stratum_codes(strata: Any | None, n: int) -> np.ndarray | None:
    """Stratum codes 0..S-1 (sorted labels) in the smallest unsigned type, None for one."""
    if strata is None:
        return None
    codes, labels = _stratum_codes(strata, n)
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
    st_kept = None if st is None else st[keep]
    last_kept = (np.full(int(keep.sum()), int(keep.sum()), dtype=np.intp) if st_kept is None
                 else np.searchsorted(st_kept, st_kept, side="right"))
    return _LateEntry(rows[keep], is_event[keep], st_kept, pairs, last_kept)


def concordance_order(time: Any, event: Any, entry: Any | None = None,
                      strata: Any | None = None) -> TimeOrder:
    """Check and order (time, event, entry, strata) once, for :func:`concordance` of any number
    of scores.

    Invalid input raises ``ValueError`` as :func:`concordance` does."""
    t = _as_1d("time", time, None)
    n = t.shape[0]
    e = _event_array(event, n)
    _check_finite("time", t)
    code = _small_stratum_codes(strata, n)
    en = None if entry is None else _entry_array(entry, t)
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
    return TimeOrder(n, order, e_s, pairs, slots, tied_grp, tied_at, c_s, late, ev, end)


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

    O(n log n), exact in integers (a sort by score, then one stable partition per bit of the
    position down to blocks of 64 positions, counted within by 64-bit masks; DEVELOPERS.md,
    "The Cox engine's performance", describes the passes).
    """
    if time_order is None:
        time_order = concordance_order(time, event, entry, strata)
    return concordances(time_order, risk_score, [None])[0]


def concordances(time_order: TimeOrder, risk_score: Any,
                 counts: Sequence[np.ndarray | None]) -> list[float]:
    """Harrell's C of one score on several multisets of one sample's rows: for each entry of
    ``counts``, the rows each repeated as often as it says (non-negative whole numbers, one per
    row in the sample's order; None: every row once). Each value equals :func:`concordance` of
    the repeated rows (a bootstrap replicate's drawn data set) exactly: a pair of rows counts
    c_i c_j times and a row's copies form no pair with each other (two events at one time, or
    no event), so the integer pair counts are the same. The sort by score and the partition
    passes are shared by all entries; only the counts' tallies are added per entry.
    :func:`scores_concordances` does this for several scores at once."""
    return scores_concordances(time_order, [risk_score], counts)[0]


def scores_concordances(time_order: TimeOrder, risk_scores: Iterable[Any],
                        counts: Sequence[np.ndarray | None]) -> list[list[float]]:
    """:func:`concordances` of every score of ``risk_scores`` (each one value per row of the
    sample; read one at a time, so a generator holds one score at once), as a list per score:
    what depends on the counts alone (their time order, the comparable pairs they make) is
    computed once for all scores, e.g. the models of one bootstrap replicate. The work arrays
    (``_Scratch``, about 120 bytes per row) live for this call only: nothing is kept on
    ``time_order`` between calls."""
    T = time_order
    checked = [None if c is None else _counts_array(c, T.n) for c in counts]
    if wanted(T.n, CONCORDANCE_FROM_ROWS):
        return _compiled_scores(T, risk_scores, checked)
    sc = _Scratch()  # (arrays reused from score to score, released at the end)
    w_time: list[np.ndarray | None] | None = None
    pairs: list[int] = []
    out = []
    for risk_score in risk_scores:
        s = np.asarray(risk_score, dtype=float)
        if s.ndim != 1 or s.shape[0] != T.n:
            raise ValueError(
                f"risk_score must be one-dimensional with {T.n} values, got shape {s.shape}"
            )
        _check_finite("risk_score", s)
        if T.n < 2 or not T.event_s.any() or T.pairs <= 0:
            out.append([float("nan")] * len(counts))
            continue
        if w_time is None:  # the counts in time order and their pairs, once
            w_time = [None if c is None else
                      np.take(c, T.order, out=sc.get(f"w_time{k}", T.n, np.int64))
                      for k, c in enumerate(checked)]
            pairs = [T.pairs if w is None else _weighted_pairs(T, w, sc) for w in w_time]
        out.append(_one_score(T, s, w_time, pairs, sc))
    return out


# From this many rows the pair counts of one score are one compiled sweep
# (``unbin.models.compiled.concordance``) instead of the numpy passes (measured crossover:
# DEVELOPERS.md, "Compiled kernels").
CONCORDANCE_FROM_ROWS = 20_000


def _checked_score(s: Any, n: int) -> np.ndarray:
    """A risk score as floats, one finite value per row (else ``ValueError``)."""
    out = np.asarray(s, dtype=float)
    if out.ndim != 1 or out.shape[0] != n:
        raise ValueError(
            f"risk_score must be one-dimensional with {n} values, got shape {out.shape}"
        )
    _check_finite("risk_score", out)
    return out


def _compiled_scores(T: TimeOrder, risk_scores: Iterable[Any],
                     checked: list[np.ndarray | None]) -> list[list[float]]:
    """:func:`scores_concordances` by the compiled sweep: per score, the runs of equal
    (stratum, score) from the same sort as the numpy path's, then one sweep counting the
    higher and equal pairs of every count vector at once; the comparable pairs as the numpy
    path counts them (once per call)."""
    from ..compiled.concordance import sweep_pairs

    n = T.n
    out: list[list[float]] = []
    prepared: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray,
                   list[int]] | None = None
    itype = np.int32 if n < 2**30 else np.int64
    for risk_score in risk_scores:
        s = _checked_score(risk_score, n)
        if n < 2 or not T.event_s.any() or T.pairs <= 0:
            out.append([float("nan")] * len(checked))
            continue
        if prepared is None:  # what depends on the counts and the time order alone, once
            sc = _Scratch()
            w_time = [None if c is None else np.take(c, T.order) for c in checked]
            pairs = [T.pairs if w is None else _weighted_pairs(T, w, sc) for w in w_time]
            del sc
            # (rows, counts) in time order, 32 bits when every column's total fits
            wide = max((int(w.sum()) for w in w_time if w is not None), default=n) >= 2**31
            weights = np.ones((n, len(checked)), dtype=np.int64 if wide else np.int32)
            for k, w in enumerate(w_time):
                if w is not None:
                    weights[:, k] = w
            del w_time
            tied = T.tied_at.astype(np.int64)
            tied[T.tied_at == np.iinfo(T.tied_at.dtype).max] = -1
            late_row = np.zeros(0, dtype=np.int64)
            late_event = np.zeros(0, dtype=bool)
            late_at = np.zeros(0, dtype=np.int64)
            if T.late is not None:  # the items, and each event's item (-1: none)
                late_row = T.late.row.astype(np.int64)
                late_event = np.ascontiguousarray(T.late.is_event, dtype=bool)
                late_at = np.full(n, -1, dtype=np.int64)
                late_at[late_row[late_event]] = np.flatnonzero(late_event)
            # where each stratum's positions start (the same in time and in score order)
            cuts = (np.array([0, n], dtype=np.int64) if T.stratum_s is None else
                    np.r_[0, np.flatnonzero(T.stratum_s[1:] != T.stratum_s[:-1]) + 1, n]
                    .astype(np.int64))
            prepared = (weights, tied, late_row, late_event, late_at, cuts, pairs)
        weights, tied, late_row, late_event, late_at, cuts, pairs = prepared
        s_time = np.take(s, T.order)
        pos = _by_key(s_time, T.stratum_s, itype)
        run: np.ndarray = np.cumsum(_new_runs(s_time[pos], T.stratum_s), dtype=itype)
        np.subtract(run, 1, out=run)
        run_at = np.empty(n, dtype=itype)
        run_at[pos] = run
        run_cuts = np.r_[run[cuts[:-1]], run[-1] + 1].astype(np.int64)
        table = np.empty((int(np.diff(run_cuts).max()) + 1, 2 * len(checked)),
                         dtype=weights.dtype)
        higher, equal = sweep_pairs(run_at, T.event_s, tied, weights, late_row, late_event,
                                    late_at, cuts, run_cuts, table)
        del table
        out.append([float("nan") if p <= 0 else (int(h) + 0.5 * int(e)) / p
                    for h, e, p in zip(higher, equal, pairs, strict=True)])
    return out


def _one_score(T: TimeOrder, s: np.ndarray, w_time: list[np.ndarray | None],
               pairs: list[int], sc: _Scratch) -> list[float]:
    """:func:`scores_concordances` of one score ``s`` (sample order), the counts already in
    time order (``w_time``, kept intact) with their comparable pairs."""
    n = T.n
    s_time = np.take(s, T.order, out=sc.get("s1", n, float))  # scores in time order
    itype = np.int32 if n < 2**30 else np.int64
    # positions sorted by (stratum, score), ties by position (stable sorts)
    pos = _by_key(s_time, T.stratum_s, itype)
    by_score = np.take(s_time, pos, out=sc.get("s2", n, float))
    w_sorted = [None if w is None else np.take(w, pos, out=sc.get(f"w_sorted{k}", n, w.dtype))
                for k, w in enumerate(w_time)]  # (before the move below)
    # runs of equal (stratum, score); each position's run number orders the late-entry items
    # (the strata in score order are T.stratum_s itself: it is sorted, and so is the order)
    new_s = _new_runs(by_score, T.stratum_s)
    run_at = None
    if T.late is not None:
        run = np.cumsum(new_s, out=sc.get("s2", n, np.int64))
        run -= 1
        run_at = sc.get("run_at", n, np.int64)
        run_at[pos] = run
    # the events tied in time take their time's slots by increasing score: the tied events in
    # score order, grouped by their time (a stable sort, so still by score within a time)
    same_time_same_score = [0] * len(w_time)
    if T.tied_slots.size:
        tied_at = np.take(T.tied_at, pos, out=sc.get("s3", n, T.tied_at.dtype))
        seq = pos[tied_at != np.iinfo(T.tied_at.dtype).max]  # tied events, by score
        seq = seq[np.argsort(T.tied_at[seq], kind="stable")]  # by time, then score
        st = s_time[seq]  # the scores at T.tied_slots after the move
        moved = sc.get("s1", n, itype)
        moved[...] = sc.arange(n, itype)
        moved[seq] = T.tied_slots
        pos = np.take(moved, pos, out=sc.get("s2", n, itype))  # still by score, ties
        # by (new) position; events tied in time and in score: counted as tied below, but
        # not comparable
        new_ts = np.ones(st.size, dtype=bool)
        new_ts[1:] = (T.tied_grp[1:] != T.tied_grp[:-1]) | (st[1:] != st[:-1])
        starts = np.flatnonzero(new_ts)
        same_time_same_score = [_pairs_within_runs(starts, None if w is None else w[seq], st.size)
                                for w in w_time]
    dead = np.take(T.event_s, pos, out=sc.get("s3", n, bool))
    # tied scores: every event with the later rows of its run of equal (stratum, score), from
    # the runs' sums: sum over events k of (run end - 1 - k), with counts sum of c_k times the
    # counts after k in its run (running sums at the run's end less at k)
    run_start = np.flatnonzero(new_s)
    run_last = np.r_[run_start[1:], n] - 1
    equal = []
    for w, tts in zip(w_sorted, same_time_same_score, strict=True):
        if w is None:
            per_run = np.add.reduceat(dead, run_start, dtype=np.int64)
            e_k = int(np.dot(run_last, per_run)) - int(np.flatnonzero(dead).sum())
        else:
            q = np.multiply(w, dead, out=sc.get("s1", n, w.dtype))  # the events' counts
            cw = np.cumsum(w, out=sc.get("dest", n, np.int64))
            per_run = np.add.reduceat(q, run_start, dtype=np.int64)
            e_k = int(np.dot(cw[run_last], per_run)) - int(np.dot(q, cw))
        equal.append(e_k - tts)
    higher = _earlier_events_above_later(pos, dead, weights=w_sorted, scratch=sc)
    if T.late is not None:
        assert run_at is not None
        late = _late_pairs(T.late, w_time, run_at, sc)
        for k, (late_higher, late_equal) in enumerate(late):
            higher[k] -= late_higher
            equal[k] -= late_equal
    return [float("nan") if p <= 0 else (h + 0.5 * e) / p
            for h, e, p in zip(higher, equal, pairs, strict=True)]


def _counts_array(counts: np.ndarray, n: int) -> np.ndarray:
    """Checked per-row repeat counts as int64."""
    c = np.asarray(counts)
    if c.shape != (n,):
        raise ValueError(f"counts must have one value per row ({n}), got shape {c.shape}")
    ci = c.astype(np.int64)
    if np.any(ci != c) or np.any(ci < 0):
        raise ValueError("counts must be non-negative whole numbers (how often each row is "
                         "repeated)")
    return ci


def _pairs_within_runs(starts: np.ndarray, w: np.ndarray | None, size: int) -> int:
    """Pairs of items within the runs starting at ``starts`` (of ``size`` items), every pair
    counted w_i w_j (once each: (sum w)^2 - sum w^2, halved); without ``w`` k (k - 1) / 2."""
    if w is None:
        k = np.diff(np.r_[starts, size])
        return int((k * (k - 1) // 2).sum())
    if size == 0:
        return 0
    tot = np.add.reduceat(w, starts)
    sq = np.add.reduceat(w * w, starts)
    return int(((tot * tot - sq) // 2).sum())


def _weighted_pairs(T: TimeOrder, w: np.ndarray, sc: _Scratch) -> int:
    """The comparable pairs of :class:`TimeOrder` with every pair counted w_i w_j (``w`` in
    time order): each event with the later rows of its stratum, less the events tied in time,
    less the pairs delayed entry takes out."""
    assert T.events is not None and T.events_end is not None
    ev, end = T.events, T.events_end
    cw = np.cumsum(w, out=sc.get("s1", w.size, np.int64))  # (inclusive)
    total = int(np.dot(w[ev], cw[end - 1] - cw[ev]))
    if T.tied_slots.size:
        starts = np.flatnonzero(np.r_[True, T.tied_grp[1:] != T.tied_grp[:-1]])
        total -= _pairs_within_runs(starts, w[T.tied_slots], T.tied_slots.size)
    if T.late is not None:
        L = T.late
        m = L.row.size
        wl = np.take(w, L.row, out=sc.get("s2", m, np.int64))
        entries = np.multiply(wl, ~L.is_event, out=sc.get("s3", m, np.int64))
        ce = np.cumsum(entries, out=entries)  # entry counts so far (inclusive)
        at = np.flatnonzero(L.is_event)
        total -= int(np.dot(wl[at], ce[L.last[at] - 1] - ce[at]))
    return total


_SORT_BY_STRATUM = 64  # up to this many strata, each stratum's scores are sorted apart


def _ordered_bits(score: np.ndarray) -> np.ndarray:
    """64-bit integers in the order of the (finite or infinite, not NaN) scores, equal exactly
    where the scores are equal: the IEEE bits, with every bit but the sign flipped for
    negative numbers, after -0.0 is made 0.0 (-0.0 + 0.0 = 0.0). numpy's stable sort of
    64-bit integers is about a quarter faster than of doubles, with the same result."""
    bits = np.add(score, 0.0).view(np.int64)
    bits ^= (bits >> 63) & np.int64(0x7FFFFFFFFFFFFFFF)
    return bits


# Scores on a grid of 1e-10 (the C index compares linear predictors rounded to 10 decimals)
# and below _GRID_TOP in size are sorted as whole numbers score x 1e10 (below 2^48: up to
# three stable 16-bit radix passes, radix.stable_order, about twice as fast as numpy's stable
# sort of 64-bit keys);
# _grid_order checks that no two different scores share a number, else the scores are sorted
# as they are.
_GRID_SCALE = 1e10
_GRID_TOP = 1e4


def _grid_key(score: np.ndarray) -> np.ndarray | None:
    """``rint(score x 1e10)`` less its smallest value, as non-negative whole numbers below 2^48
    (None where the scores are too large for that or not finite). Multiplying by a positive
    number and rounding never reverse two scores' order, so sorted by these numbers the scores
    are sorted, provided no two different scores got the same number (see _grid_order)."""
    if score.size == 0:
        return None
    lo, hi = float(score.min()), float(score.max())
    if not (-_GRID_TOP < lo and hi < _GRID_TOP):
        return None
    key = np.rint(score * _GRID_SCALE).astype(np.int64)
    key -= np.int64(np.rint(lo * _GRID_SCALE))
    return key


def _grid_order(key: np.ndarray, score: np.ndarray, compiled: bool = False
                ) -> np.ndarray | None:
    """The stable order of ``key`` (< 2^48) by 16-bit radix passes (``radix.stable_order``;
    ``compiled``: by the compiled 12-bit radix sort, ``compiled.score_order.stable_order48``,
    the same order); None when two different scores share a key (adjacent in that order with
    equal keys but unequal scores), so that the order is not the scores' own."""
    if compiled:
        from ..compiled.score_order import stable_order48

        order, k = stable_order48(key)
    else:
        order = stable_order(key)
        k = np.take(key, order)
    s = np.take(score, order)
    if not np.array_equal(k[1:] == k[:-1], s[1:] == s[:-1]):
        return None
    return order


# From this many rows of the sample (not of one stratum's run) the grid scores are sorted by
# the compiled radix sort (``compiled.score_order.stable_order48``).
GRID_ORDER_FROM_ROWS = 50_000


def _by_key(score: np.ndarray, stratum: np.ndarray | None, itype: Any) -> np.ndarray:
    """Positions sorted by (stratum, score), ties by position; ``stratum`` non-decreasing (the
    time order's). With few strata each stratum's run of positions is sorted by itself
    (shorter sorts); else one sort by score and a stable (radix) sort by stratum. Scores on
    the C index's grid are sorted as whole numbers (``_grid_key``)."""
    key = _grid_key(score)
    if key is not None:
        pos = _by_grid(key, score, stratum, itype,
                       wanted(score.size, GRID_ORDER_FROM_ROWS))
        if pos is not None:
            return pos
    score = _ordered_bits(score)
    if stratum is not None:
        cuts = np.flatnonzero(stratum[1:] != stratum[:-1]) + 1
        if cuts.size < _SORT_BY_STRATUM:
            pos = np.empty(score.size, dtype=itype)
            for a, b in zip(np.r_[0, cuts], np.r_[cuts, score.size], strict=True):
                np.add(np.argsort(score[a:b], kind="stable"), a, out=pos[a:b])
            return pos
    pos = np.argsort(score, kind="stable")
    if stratum is not None:
        pos = pos[np.argsort(stratum[pos], kind="stable")]
    return pos.astype(itype)


def _by_grid(key: np.ndarray, score: np.ndarray, stratum: np.ndarray | None, itype: Any,
             compiled: bool = False) -> np.ndarray | None:
    """:func:`_by_key` by the grid numbers ``key`` (None where ``_grid_order`` declines):
    each stratum's run of positions by itself, or all at once and then a stable sort by
    stratum (``compiled``: the runs sorted by the compiled radix sort)."""
    if stratum is not None:
        cuts = np.flatnonzero(stratum[1:] != stratum[:-1]) + 1
        if cuts.size < _SORT_BY_STRATUM:
            pos = np.empty(score.size, dtype=itype)
            for a, b in zip(np.r_[0, cuts], np.r_[cuts, score.size], strict=True):
                got = _grid_order(key[a:b], score[a:b], compiled)
                if got is None:
                    return None
                np.add(got, a, out=pos[a:b])
            return pos
    order = _grid_order(key, score, compiled)
    if order is None:
        return None
    if stratum is not None:
        order = order[np.argsort(stratum[order], kind="stable")]
    return order.astype(itype)


def _new_runs(values: np.ndarray, stratum: np.ndarray | None) -> np.ndarray:
    """Where a run of equal (stratum, value) starts, for values sorted by (stratum, value)."""
    new = np.ones(values.size, dtype=bool)
    np.not_equal(values[1:], values[:-1], out=new[1:])
    if stratum is not None:
        new[1:] |= stratum[1:] != stratum[:-1]
    return new


def _late_pairs(L: _LateEntry, w_time: Sequence[np.ndarray | None], run_at: np.ndarray,
                scratch: _Scratch) -> list[tuple[int, int]]:
    """Among the pairs delayed entry takes out (event item before an entry item of its
    stratum), those where the event has the higher score, and those with equal scores; per
    entry of ``w_time`` (row counts in time order, None: every row once). ``run_at``: every
    position's run of equal (stratum, score) in their order, so that the items' order by
    (stratum, score), ties by item, is a stable sort of whole numbers."""
    m = L.row.size
    item_run = np.take(run_at, L.row, out=scratch.get("s1", m, run_at.dtype))
    ip = stable_order(item_run)
    item_run = np.take(item_run, ip, out=scratch.get("s2", m, run_at.dtype))
    row = np.take(L.row, ip, out=scratch.get("s3", m, L.row.dtype))
    first = np.take(L.is_event, ip, out=scratch.get("s4", m, bool))
    w_items = [None if w is None else np.take(w, row, out=scratch.get(f"w_sorted{k}", m, w.dtype))
               for k, w in enumerate(w_time)]
    higher = _earlier_events_above_later(ip, first, non_event_targets=True, weights=w_items,
                                         scratch=scratch)
    # equal scores: each entry item with the events before it in its run of equal (stratum,
    # score), by the running sum of the events' weights less its value before the run
    starts = np.flatnonzero(_new_runs(item_run, None))
    out = []
    q, t, run_q = (scratch.get(name, m, np.int64) for name in ("dest", "wprod", "count"))
    for h, w in zip(higher, w_items, strict=True):
        if w is None:
            np.copyto(q, first)  # the events' weights
            np.logical_not(first, out=t, casting="unsafe")  # the entries' weights
        else:
            np.multiply(w, first, out=q)
            np.subtract(w, q, out=t)
        np.cumsum(q, out=run_q)
        before_run = run_q[starts] - q[starts]
        equal = int(np.dot(run_q, t)) - int(np.dot(before_run, np.add.reduceat(t, starts)))
        out.append((h, equal))
    return out


_BLOCK_BITS = 6  # pairs within blocks of 2^6 positions: one 64-bit mask per row (below)


def _earlier_events_above_later(pos: np.ndarray, dead: np.ndarray,
                                non_event_targets: bool = False,
                                weights: Sequence[np.ndarray | None] = (None,),
                                scratch: _Scratch | None = None) -> list[int]:
    """Count pairs of positions i < j with i an event and a higher score than j (with
    ``non_event_targets``, only those with j not an event), once per entry of ``weights``
    (aligned with ``pos``): None counts every pair once, an array of non-negative whole
    numbers counts a pair w_i w_j.

    ``pos`` are the positions 0..n-1 sorted by score (ties by position), ``dead`` whether each
    is an event. At the level of bit L the rows are arranged in blocks of 2^(L+1) positions
    (block b at indices from b 2^(L+1), as the positions are a permutation), each in score
    order; the later half of a block is bit L = 1. Its running count before an earlier-half
    event is the number of later rows with a lower score (an equal score sorts after, by
    position); with weights, the running sum of the later (target) rows' weights. The count is
    also each row's rank within its half, which places it in the next level's arrangement (a
    stable partition, one scatter). A row's position and event flag travel packed in one
    integer (position << 1 | event); weights travel beside it. The pairs within the smallest
    blocks (64 positions) are counted from one 64-bit mask per row (:func:`_within_blocks`).
    """
    n = pos.size
    if n < 2:
        return [0] * len(weights)
    ktype: Any = np.int32 if n < 2**30 else np.int64
    sc = _Scratch() if scratch is None else scratch
    key = sc.get("key", n, ktype)
    np.left_shift(pos, 1, out=key)
    key |= dead
    # (own copies: the work arrays take turns with them; 32 bits when every running sum fits)
    ws: list[np.ndarray | None] = []
    for k, w in enumerate(weights):
        if w is None:
            ws.append(None)
            continue
        wtype = np.int32 if int(w.sum(dtype=np.int64)) < 2**31 else np.int64
        own = sc.get(f"w{k}", n, wtype)
        own[...] = w
        ws.append(own)
    higher = [0] * len(weights)
    top = (n - 1).bit_length() - 1
    if top >= _BLOCK_BITS:
        at = sc.arange(n, ktype)
        key_next = sc.get("key_next", n, ktype)
        ws_next = [None if w is None else sc.get(f"w{k}_next", n, w.dtype)
                   for k, w in enumerate(ws)]
        first_event = sc.get("first_event", n, bool)  # an event in the earlier half
        later_target = sc.get("later_target", n, bool) if non_event_targets else None
        event, later, count, tmp = (sc.get(name, n, ktype)
                                    for name in ("event", "later", "count", "tmp"))
        dest = sc.get("dest", n, np.intp)
        wsum = {w.dtype: sc.get(f"wsum{w.dtype}", n, w.dtype) for w in ws if w is not None}
        wprod = sc.get("wprod", n, np.int64)
        count_t = sc.get("count_t", n, ktype) if non_event_targets else None
        for level in range(top, _BLOCK_BITS - 1, -1):
            half = 1 << level
            size = 2 * half  # the block
            full = n // size * size
            np.right_shift(key, level + 1, out=later)
            later &= 1  # bit L of the position (0/1)
            np.bitwise_and(key, 1, out=event)
            np.greater(event, later, out=first_event)
            np.cumsum(later, out=count)  # later rows up to each row (at an earlier row: before it)
            _restart(count, size, full)  # ... in its block
            tally: np.ndarray = count
            later_w: np.ndarray = later
            if count_t is not None and later_target is not None:
                np.greater(later, event, out=later_target)  # a later row that is a target
                np.cumsum(later_target, out=count_t)
                _restart(count_t, size, full)
                tally, later_w = count_t, later_target
            for k, w in enumerate(ws):
                if w is None:
                    np.multiply(tally, first_event, out=tmp)
                    higher[k] += int(tmp.sum(dtype=np.int64))
                    continue
                ws_k = wsum[w.dtype]
                np.multiply(w, later_w, out=ws_k)  # the later (target) rows' weights ...
                np.cumsum(ws_k, out=ws_k)  # ... summed up to each row ...
                _restart(ws_k, size, full)  # ... in its block
                np.multiply(ws_k, w, out=wprod, dtype=np.int64)
                wprod *= first_event
                higher[k] += int(wprod.sum())
            # earlier half: its rank among the block's earlier rows (position - later rows
            # before it), at - count; later half: after the block's 2^L earlier rows, by its
            # count, (at - offset in the block) + half + count - 1
            np.bitwise_and(at, size - 1, out=tmp)
            np.subtract(half - 1, tmp, out=tmp)
            tmp += count
            tmp += count
            tmp *= later
            tmp -= count
            np.add(at, tmp, out=dest)
            key_next[dest] = key
            key, key_next = key_next, key
            for k, w in enumerate(ws):
                w_next = ws_next[k]
                if w is not None and w_next is not None:
                    w_next[dest] = w
                    ws[k], ws_next[k] = w_next, w
    within = _within_blocks(key, non_event_targets, ws, min(top + 1, _BLOCK_BITS), sc)
    return [h + b for h, b in zip(higher, within, strict=True)]


def _restart(running: np.ndarray, size: int, full: int) -> None:
    """Make inclusive running sums restart at every block of ``size`` (in place; the blocks
    whole up to ``full``, then one shorter block)."""
    if 0 < full < running.size:
        running[full:] -= running[full - 1]
    if full > size:
        ends = running[size - 1 : full - size : size].copy()  # each block's total so far
        running[size:full].reshape(-1, size)[...] -= ends[:, None]


def _popcount(x: np.ndarray) -> np.ndarray:
    """The number of bits set in each uint64 (numpy >= 2: ``np.bitwise_count``)."""
    if hasattr(np, "bitwise_count"):
        return np.bitwise_count(x)
    return _popcount_swar(x)


def _popcount_swar(x: np.ndarray) -> np.ndarray:
    """The number of bits set in each uint64, by summing bit fields in the word."""
    x = x - ((x >> np.uint64(1)) & np.uint64(0x5555555555555555))
    x = (x & np.uint64(0x3333333333333333)) + ((x >> np.uint64(2)) & np.uint64(0x3333333333333333))
    x = (x + (x >> np.uint64(4))) & np.uint64(0x0F0F0F0F0F0F0F0F)
    return (x * np.uint64(0x0101010101010101)) >> np.uint64(56)


def _within_blocks(key: np.ndarray, non_event_targets: bool,
                   weights: Sequence[np.ndarray | None], bits: int,
                   sc: _Scratch) -> list[int]:
    """The pairs of :func:`_earlier_events_above_later` within blocks of 2^bits (at most 64)
    positions, with the rows of every block in score order (``key``: position << 1 | event,
    ``weights`` aligned with it). Within a block a row's bit at its position offset p is
    unique, so the running sum of 2^p over the block is the set of positions with a lower
    score; the bits above an event's own offset are its later rows with a lower score. With
    weights, one such set per bit of the weights (w = sum 2^b [bit b of w]) gives their sums
    exactly."""
    size = 1 << bits
    n = key.size
    offset = sc.get("dest", n, np.uint64)
    np.right_shift(key, 1, out=offset, casting="unsafe")
    offset &= np.uint64(size - 1)
    event = sc.get("first_event", n, bool)
    np.bitwise_and(key, 1, out=event, casting="unsafe")
    at = np.flatnonzero(event)
    unit = sc.get("wprod", n, np.uint64)
    np.left_shift(np.uint64(1), offset, out=unit)  # 2^p
    if non_event_targets:
        unit *= ~event
    above = offset[at] + np.uint64(1)  # each event's bits above its own
    block = at >> bits
    blocks = -(-n // size)
    running = sc.get("count", n, np.uint64)

    def lower_later(mask: np.ndarray) -> np.ndarray:
        """At every event, the rows of ``mask`` (2^p or 0 per row) before it in its block at
        later positions, counted."""
        np.cumsum(mask, out=running)  # (uint64 sums may wrap; the differences are exact)
        before = np.zeros(blocks, dtype=np.uint64)  # the running sum before each block
        before[1:] = running[size - 1 : (blocks - 1) * size : size]
        got = running[at] - before[block]
        got >>= above
        return _popcount(got).astype(np.int64)

    totals = []
    plain = None
    for w in weights:
        if w is None:
            if plain is None:
                plain = int(lower_later(unit).sum())
            totals.append(plain)
            continue
        total = 0
        w_at = w[at].astype(np.int64)
        wu = sc.get("later", n, np.uint64)
        wu[...] = w
        plane = sc.get("tmp", n, np.uint64)
        for b in range(int(w.max(initial=0)).bit_length()):
            np.right_shift(wu, np.uint64(b), out=plane)
            plane &= np.uint64(1)
            plane *= unit
            total += int(np.dot(lower_later(plane), w_at)) << b
        totals.append(total)
    return totals


# ------------------------------------------------------------------------- weighted pairs


def _dense(values: np.ndarray) -> np.ndarray:
    """Dense ranks 0..m-1 of ``values`` (equal values share a rank)."""
    return np.unique(values, return_inverse=True)[1].reshape(-1).astype(np.int64)


def _sum_above(q_group: np.ndarray, q_key: np.ndarray, q_w: np.ndarray,
               t_group: np.ndarray, t_key: np.ndarray, t_w: np.ndarray,
               n_groups: int) -> float:
    """Sum over queries i of q_w_i times the summed t_w_j of the targets j of i's group with
    t_key_j > q_key_i (groups 0..n_groups-1 and keys non-negative integers)."""
    if q_w.size == 0 or t_w.size == 0:
        return 0.0
    span = int(max(q_key.max(), t_key.max())) + 2
    if n_groups * span >= 2**62:  # the combined key would not fit: number the groups used
        code = _dense(np.r_[q_group, t_group])
        q_group, t_group = code[: q_group.size], code[q_group.size :]
    t_comb = t_group * span + t_key
    srt = np.argsort(t_comb)
    t_comb = t_comb[srt]
    cum = np.r_[0.0, np.cumsum(t_w[srt])]
    lo = np.searchsorted(t_comb, q_group * span + q_key, side="right")
    hi = np.searchsorted(t_comb, (q_group + 1) * span, side="left")
    return float(q_w @ (cum[hi] - cum[lo]))


def weighted_pair_sums(q_group: np.ndarray, q_key: np.ndarray, q_rank: np.ndarray,
                       q_w: np.ndarray, t_group: np.ndarray, t_key: np.ndarray,
                       t_rank: np.ndarray, t_w: np.ndarray) -> tuple[float, float, float]:
    """Weighted pair counts between queries i and targets j of the same group with
    t_key_j > q_key_i, every pair counted q_w_i t_w_j: (all such pairs, those with equal rank,
    those where the target's rank is lower). Groups, keys and ranks are non-negative integers.

    The lower-rank sum splits the ranks below r_i into the aligned blocks of the binary
    expansion of r_i (one block of 2^L ranks for every bit L set in r_i, the Fenwick-tree
    decomposition); within a block the condition on the rank holds for every target, so each
    level L is one :func:`_sum_above` with the block as part of the group. O(n log^2 n); with
    integer weights every sum is exact in floating point below 2^53."""
    q_group, t_group = q_group.astype(np.int64), t_group.astype(np.int64)
    q_rank, t_rank = q_rank.astype(np.int64), t_rank.astype(np.int64)
    groups = int(max(q_group.max(initial=0), t_group.max(initial=0))) + 1
    total = _sum_above(q_group, q_key, q_w, t_group, t_key, t_w, groups)
    top = int(max(q_rank.max(initial=0), t_rank.max(initial=0))) + 1
    # equal rank: the rank joins the group
    equal = _sum_above(q_group * top + q_rank, q_key, q_w, t_group * top + t_rank, t_key, t_w,
                       groups * top)
    lower = 0.0
    for level in range(max(1, (top - 1).bit_length())):
        has = (q_rank >> level) & 1 == 1
        if not has.any():
            continue
        # the block of 2^level ranks just below r_i's higher bits, as part of the group
        lower += _sum_above(q_group[has] * (top + 1) + (q_rank[has] >> level) - 1, q_key[has],
                            q_w[has], t_group * (top + 1) + (t_rank >> level), t_key, t_w,
                            groups * (top + 1))
    return total, equal, lower


def weighted_concordance(time: Any, risk_score: Any, event: Any, weights: Any, *,
                         entry: Any | None = None, strata: Any | None = None) -> float:
    """Harrell's C with every pair (i, j) counted w_i w_j: with frequency weights (row i stands
    for w_i identical persons) it equals :func:`concordance` of the rows repeated by their
    weights, exactly for integer weights; with sampling weights it estimates the population's
    concordance (each sampled pair standing for w_i w_j pairs of the population). Comparable
    pairs, strata, delayed entry and ties as in :func:`concordance`; NaN without a comparable
    pair."""
    t = _as_1d("time", time, None)
    n = t.shape[0]
    e = _event_array(event, n)
    _check_finite("time", t)
    s = np.asarray(risk_score, dtype=float)
    if s.ndim != 1 or s.shape[0] != n:
        raise ValueError(f"risk_score must be one-dimensional with {n} values, got shape {s.shape}")
    _check_finite("risk_score", s)
    w = _positive_weights(weights, n)
    en = None if entry is None else _entry_array(entry, t)
    code = np.zeros(n, dtype=np.int64) if strata is None else _stratum_codes(strata, n)[0]
    if n < 2 or not e.any():
        return float("nan")
    rank = _dense(s)
    value = _dense(t if en is None else np.r_[t, en])
    rt = value[:n]
    ev = np.flatnonzero(e)
    # event i at 3R(t_i)+1; j outlives i when its key is greater: a later time, or the same
    # time censored (3R+2); an event at the same time (3R+1) does not
    t_key = 3 * rt + np.where(e, 1, 2)
    t_group, t_rank, t_w = code, rank, w
    if en is not None:  # j not yet entered at t_i (entry_j >= t_i): the pair is taken out
        t_key = np.r_[t_key, 3 * value[n:] + 2]
        t_group, t_rank, t_w = np.r_[code, code], np.r_[rank, rank], np.r_[w, -w]
    total, equal, lower = weighted_pair_sums(code[ev], 3 * rt[ev] + 1, rank[ev], w[ev],
                                             t_group, t_key, t_rank, t_w)
    if not total > 0:
        return float("nan")
    return (lower + 0.5 * equal) / total
