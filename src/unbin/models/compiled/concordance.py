"""Harrell's C pair counts in one compiled sweep (the numpy path: ``models/cox/concordance.py``,
``_one_score``, which this module stands in for from ``_COMPILED_ROWS`` rows).

The sweep walks a sample's time order (rows by stratum, then time, events first at equal
times) from its last row to its first and keeps, per count vector, a binary indexed (Fenwick)
tree of the counts of the rows "behind" it, indexed by the rows' run of equal (stratum,
score). At an event i the rows behind it are those of later strata (runs above i's stratum's,
never summed below i's run) and those of its stratum that outlived it; the tree's sum over
runs below i's run is then the count of comparable rows with a lower score, and the plain
tally of i's own run the count with an equal score. Events tied in time are all queried
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


@numba.njit(cache=True, nogil=True)
def sweep_pairs(run: np.ndarray, event: np.ndarray, tied: np.ndarray, weights: np.ndarray,
                late_row: np.ndarray, late_event: np.ndarray, late_at: np.ndarray,
                table: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(higher, equal), one value per column of ``weights``: over comparable pairs (event i,
    row j), the sum of w_i w_j where i's score is above j's (higher) or equal to it (equal).

    ``run`` (n,) each time-order position's run of equal (stratum, score), numbered 0.. in
    (stratum, score) order; ``event`` (n,) bool; ``tied`` (n,) int64 the event's group of
    events tied in time (contiguous positions), -1 where the event is not tied or the row is
    censored; ``weights`` (n, K) non-negative counts per position; ``late_row`` (m,) int64 and
    ``late_event`` (m,) bool the late-entry items, ``late_at`` (n,) int64 each event's item
    (-1: an event without one, or a censored row); all three empty without delayed entry.
    ``table`` (runs + 1, 2K) zeros of the weights' type (wide enough for a column's total):
    row x holds the Fenwick tree's node x in its first K columns and the tally of run x - 1
    in the last K (a row's tally and its first tree node share a cache line)."""
    n = run.shape[0]
    n_k = weights.shape[1]
    top = table.shape[0] - 1
    higher = np.zeros(n_k, dtype=np.int64)
    equal = np.zeros(n_k, dtype=np.int64)
    has_late = late_at.shape[0] > 0
    p = late_row.shape[0] - 1  # the next late-entry item to look at, walking backwards
    k = n - 1
    while k >= 0:
        if event[k]:
            # the events of k's group tied in time: positions first..k
            first = k
            if tied[k] >= 0:
                while first > 0 and tied[first - 1] == tied[k]:
                    first -= 1
            for i in range(k, first - 1, -1):
                # take out the rows not yet entered at i's time: the entry items after i's
                # item (none when i has no item: no row of its stratum entered at or after
                # its time)
                stop = late_at[i] if has_late else -1
                while stop >= 0 and p > stop:
                    if not late_event[p]:
                        j = late_row[p]
                        x = run[j] + 1
                        for c in range(n_k):
                            table[x, n_k + c] -= weights[j, c]
                        while x <= top:
                            for c in range(n_k):
                                table[x, c] -= weights[j, c]
                            x += x & (-x)
                    p -= 1
                r = run[i]
                for c in range(n_k):
                    wi = np.int64(weights[i, c])
                    if wi == 0:
                        continue
                    below = np.int64(0)
                    x = r
                    while x > 0:
                        below += table[x, c]
                        x -= x & (-x)
                    higher[c] += wi * below
                    equal[c] += wi * np.int64(table[r + 1, n_k + c])
            last = k
            k = first - 1
        else:
            first = k
            last = k
            k -= 1
        for j in range(first, last + 1):  # now behind the sweep
            x = run[j] + 1
            for c in range(n_k):
                table[x, n_k + c] += weights[j, c]
            while x <= top:
                for c in range(n_k):
                    table[x, c] += weights[j, c]
                x += x & (-x)
    return higher, equal
