"""The two middle values of a multiset given as values with whole-number copies, without
forming it (the numpy path: ``np.median`` of the values repeated as counted, by partition,
which ``decision_resampling`` uses below ``MIDDLE_FROM_ROWS`` rows or when this kernel
declines).

One pass finds the range of the values that have copies; a second counts the copies in 65,536
equal buckets of that range (a bucket ``floor((v - min) * 65535 / (max - min))``, non-decreasing
in v, as floating-point subtraction, multiplication by a positive number and floor are); the
running sum of the buckets' copies names the buckets that hold the two middle ranks, and only
the values in those buckets (few) are gathered and sorted, their copies summed in that order
from the copies below the first of them. The values at those ranks are exact order
statistics: the same numbers a partition of the repeated values puts there."""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["middle_pair"]

_BUCKETS = 65536


@numba.njit(cache=True, nogil=True, error_model="numpy")
def middle_pair(v: np.ndarray, counts: np.ndarray, first: int, second: int
                ) -> tuple[int, float, float]:
    """(status, the value at rank ``first``, the value at rank ``second``) of the values ``v``
    (n,) float each repeated ``counts`` (n,) int64 times (ranks from 0 in ascending order,
    ``first <= second`` below the total of the counts). Status 0; 1 when a value with copies
    is NaN (the median is NaN); 2 when declined (an infinite value or a NaN without copies, or more
    than a quarter of the rows in the middle buckets: a partition does better)."""
    n = v.shape[0]
    lo = np.inf
    hi = -np.inf
    for i in range(n):  # every row's value (one without copies only widens the range)
        x = v[i]
        lo = min(lo, x)
        hi = max(hi, x)
    if not (np.isfinite(lo) and np.isfinite(hi)):  # a NaN or an infinite value
        for i in range(n):
            if counts[i] > 0 and v[i] != v[i]:
                return 1, np.nan, np.nan
        return 2, np.nan, np.nan
    if hi == lo:
        return 0, lo, lo
    scale = (_BUCKETS - 1) / (hi - lo)
    if not np.isfinite(scale):
        return 2, np.nan, np.nan
    hist = np.zeros(_BUCKETS, dtype=np.int64)
    for i in range(n):
        hist[min(int((v[i] - lo) * scale), _BUCKETS - 1)] += counts[i]
    below = 0  # copies in the buckets before b1
    b1 = 0
    while below + hist[b1] <= first:
        below += hist[b1]
        b1 += 1
    b2 = b1
    upto = below + hist[b1]  # copies up to and including b2
    while upto <= second:
        b2 += 1
        upto += hist[b2]
    room = n // 4 + 64
    vals = np.empty(room)
    cop = np.empty(room, dtype=np.int64)
    m = 0
    for i in range(n):
        b = min(int((v[i] - lo) * scale), _BUCKETS - 1)
        if b1 <= b <= b2 and counts[i] > 0:
            if m == room:
                return 2, np.nan, np.nan
            vals[m] = v[i]
            cop[m] = counts[i]
            m += 1
    vals = vals[:m]
    order = np.argsort(vals)
    at_first = np.nan
    at_second = np.nan
    seen = below
    for j in range(m):
        k = order[j]
        seen += cop[k]
        if at_first != at_first and seen > first:
            at_first = vals[k]
        if seen > second:
            at_second = vals[k]
            break
    return 0, at_first, at_second
