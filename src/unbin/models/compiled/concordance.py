"""Harrell's C pair counts in one compiled sweep (the numpy path: ``models/cox/concordance.py``,
``_one_score``, which this module stands in for from ``_COMPILED_ROWS`` rows).

The sweep walks a sample's time order (rows by stratum, then time, events first at equal
times) from its last row to its first and keeps, per count vector, a binary indexed (Fenwick)
tree of the counts of the rows of its stratum "behind" it (those that outlived it), indexed
by the rows' run of equal score in the stratum (one stratum's tree at a time, emptied when the
sweep enters the next: small strata keep it in cache). At an event i the tree's sum over runs
below i's run is the count of comparable rows with a lower score, and the plain tally of i's
own run the count with an equal score. Events tied in time are all queried
before any of them is put in the tree (two events at one time are not comparable); censored
rows at an event's time sort after it and are in the tree already (they outlived it).

Delayed entry takes a row j out of i's comparisons when entry_j >= t_i. The time order's
late-entry items (``_LateEntry``: events at their time and entries at their entry time, by
stratum and value, events first at equal values; only items that form such a pair) hold the
rows to take out: before i is queried, every entry item after i's item is removed from the
tree (a row is removed once; it is always in the tree by then, as t_j > entry_j >= t_i puts
it after i in the time order). Event items appear in the same order as the events of the time
order, so one pointer walks the items backwards beside the sweep; an event without an item
(no row of its stratum entered at or after its time) takes nothing out.

Every count is an integer sum (int64), the same integers the numpy path counts."""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["sweep_pairs"]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def sweep_pairs(run: np.ndarray, event: np.ndarray, tied: np.ndarray, weights: np.ndarray,
                late_row: np.ndarray, late_event: np.ndarray, late_at: np.ndarray,
                cuts: np.ndarray, run_cuts: np.ndarray, table: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray]:
    """(higher, equal), one value per column of ``weights``: over comparable pairs (event i,
    row j), the sum of w_i w_j where i's score is above j's (higher) or equal to it (equal).

    ``run`` (n,) each time-order position's run of equal (stratum, score), numbered 0.. in
    (stratum, score) order; ``event`` (n,) bool; ``tied`` (n,) int64 the event's group of
    events tied in time (contiguous positions), -1 where the event is not tied or the row is
    censored; ``weights`` (n, K) non-negative counts per position; ``late_row`` (m,) int64 and
    ``late_event`` (m,) bool the late-entry items, ``late_at`` (n,) int64 each event's item
    (-1: an event without one, or a censored row); all three empty without delayed entry.
    ``cuts`` (S + 1,) where each stratum's positions start (and n), ``run_cuts`` (S + 1,)
    where its runs start (and the number of runs). ``table`` (the most runs of a stratum + 1,
    2K) of the weights' type (wide enough for a column's total): the stratum being swept,
    row x its Fenwick tree's node x in the first K columns and the tally of its run x - 1 in
    the last K (a run's tally and its first tree node share a cache line); one stratum's
    tree at a time keeps it small."""
    n_k = weights.shape[1]
    higher = np.zeros(n_k, dtype=np.int64)
    equal = np.zeros(n_k, dtype=np.int64)
    below = np.zeros(n_k, dtype=np.int64)
    has_late = late_at.shape[0] > 0
    p = late_row.shape[0] - 1  # the next late-entry item to look at, walking backwards
    for g in range(cuts.shape[0] - 2, -1, -1):
        lo, hi = run_cuts[g], run_cuts[g + 1]  # the stratum's runs
        top = hi - lo
        table[: top + 1, :] = 0
        k = cuts[g + 1] - 1
        while k >= cuts[g]:
            if event[k]:
                # the events of k's group tied in time: positions first..k
                first = k
                if tied[k] >= 0:
                    while first > cuts[g] and tied[first - 1] == tied[k]:
                        first -= 1
                for i in range(k, first - 1, -1):
                    # take out the rows not yet entered at i's time: the entry items after
                    # i's item (those of later strata are passed over; none when i has no
                    # item: no row of its stratum entered at or after its time)
                    stop = late_at[i] if has_late else -1
                    while stop >= 0 and p > stop:
                        j = late_row[p]
                        if not late_event[p] and lo <= run[j] < hi:
                            x = run[j] - lo + 1
                            for c in range(n_k):
                                table[x, n_k + c] -= weights[j, c]
                            while x <= top:
                                for c in range(n_k):
                                    table[x, c] -= weights[j, c]
                                x += x & (-x)
                        p -= 1
                    r = run[i] - lo
                    for c in range(n_k):  # (one walk down the tree for every column)
                        below[c] = 0
                    x = r
                    while x > 0:
                        for c in range(n_k):
                            below[c] += table[x, c]
                        x -= x & (-x)
                    for c in range(n_k):
                        wi = np.int64(weights[i, c])
                        higher[c] += wi * below[c]
                        equal[c] += wi * np.int64(table[r + 1, n_k + c])
                last = k
                k = first - 1
            else:
                first = k
                last = k
                k -= 1
            for j in range(first, last + 1):  # now behind the sweep
                x = run[j] - lo + 1
                for c in range(n_k):
                    table[x, n_k + c] += weights[j, c]
                while x <= top:
                    for c in range(n_k):
                        table[x, c] += weights[j, c]
                    x += x & (-x)
    return higher, equal
