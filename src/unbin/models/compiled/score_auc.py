"""A linear predictor's binary AUC in a bootstrap replicate's drawn rows (as draw counts) and in
the full sample, from one compiled call: the compared score, its order and the pair counts in
one kernel (the numpy path: ``models/discrimination.py``, ``count_aucs`` of
``compared_score(lp)`` with the counts and None, which :func:`unbin.models.discrimination.
drawn_aucs` uses below ``DRAWN_AUC_FROM_ROWS`` rows or when this kernel declines).

The C index compares the predictors rounded to ``SCORE_DECIMALS`` (10) decimals, which numpy
computes as ``rint(lp * 1e10) / 1e10``; the whole number ``k = rint(lp * 1e10)`` is computed
here the same way. For ``|k| <= 1e14`` (predictors up to 1e4 in size) two rounded scores are
equal exactly when their k are, and ordered as their k (consecutive k differ by 1e-10 in score,
far more than a unit in the last place of a number below 1e4, so the division keeps them
apart and in order), so the pairs are counted on k. Each row becomes one 64-bit item,
``(k - min k) << 16 | count << 1 | event`` (``k - min k < 2^48``, counts below 2^15), and the
items are sorted by a bucket of their k (the top 22 bits of ``k - min k``; all of it when it
spans less than 2^22) with two stable 11-bit radix passes (tables of 2,048 counters). A run of
items sharing a bucket with more than one k is then put in order by k (insertion sort; runs are
short, a long one is sorted whole). Walking the items in that order, the runs of equal k are the
groups of tied scores: per data set (the drawn rows' counts, every row once) their event and
non-event copies, and the non-event copies below them as a running sum, give twice the
Mann-Whitney count, ev (2 below + tied non-events), in int64: the same integers as
``count_aucs`` sums, so the same AUC bit for bit.

The kernel declines (status 2) when a predictor is outside that range (or infinite), a count
is negative or at least 2^15; a NaN predictor gives status 1 (no AUC, as ``count_aucs``)."""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["drawn_full_pairs"]

_LONG_RUN = 48  # runs of a shared bucket longer than this are sorted by np.sort


@numba.njit(cache=True, nogil=True, error_model="numpy")
def drawn_full_pairs(lp: np.ndarray, event: np.ndarray, counts: np.ndarray
                     ) -> tuple[int, np.ndarray]:
    """(status, pairs): status 0 with ``pairs`` (2, 3) int64, per data set (row 0 the drawn
    rows repeated ``counts`` times, row 1 every row once) the event copies, the non-event
    copies and twice the pairs in which the event scores higher plus the tied pairs; status 1
    (a NaN predictor) or 2 (declined: module docstring) with zeros.

    ``lp`` (n,) float the linear predictors (unrounded), ``event`` (n,) bool, ``counts`` (n,)
    int64 draw counts."""
    n = lp.shape[0]
    pairs = np.zeros((2, 3), dtype=np.int64)
    if n == 0:
        return 0, pairs
    big = 1e14
    lo = np.inf
    hi = -np.inf
    for i in range(n):
        x = lp[i]
        if x != x:
            return 1, pairs
        k = np.rint(x * 1e10)
        if not (-big <= k <= big):
            return 2, pairs
        if k < lo:
            lo = k
        if k > hi:
            hi = k
        c = counts[i]
        if c < 0 or c >= 32768:
            return 2, pairs
    k_lo = np.int64(lo)
    span = np.int64(hi) - k_lo
    shift = 0
    while (span >> shift) >= 4194304:  # 2^22 buckets at most
        shift += 1
    items = np.empty(n, dtype=np.uint64)
    hist = np.zeros((2, 2048), dtype=np.int64)
    for i in range(n):
        d = np.int64(np.rint(lp[i] * 1e10)) - k_lo
        b = d >> shift
        hist[0, b & 2047] += 1
        hist[1, b >> 11] += 1
        items[i] = ((np.uint64(d) << np.uint64(16)) | (np.uint64(counts[i]) << np.uint64(1))
                    | np.uint64(1 if event[i] else 0))
    for p in range(2):
        total = 0
        for q in range(2048):
            h = hist[p, q]
            hist[p, q] = total
            total += h
    spare = np.empty(n, dtype=np.uint64)
    low = np.uint64(16 + shift)
    mask = np.uint64(2047)
    for i in range(n):
        it = items[i]
        b = (it >> low) & mask
        d = hist[0, b]
        hist[0, b] = d + 1
        spare[d] = it
    high = np.uint64(16 + shift + 11)
    for i in range(n):
        it = spare[i]
        b = it >> high
        d = hist[1, b]
        hist[1, b] = d + 1
        items[d] = it
    if shift > 0:  # the runs of a shared bucket in order by k
        start = 0
        for i in range(1, n + 1):
            if i < n and (items[i] >> low) == (items[start] >> low):
                continue
            if i - start > 1:
                ordered = True
                for j in range(start + 1, i):
                    if (items[j] >> np.uint64(16)) < (items[j - 1] >> np.uint64(16)):
                        ordered = False
                        break
                if not ordered:
                    if i - start > _LONG_RUN:
                        items[start:i] = np.sort(items[start:i])
                    else:
                        for j in range(start + 1, i):
                            v = items[j]
                            m = j - 1
                            while m >= start and items[m] > v:
                                items[m + 1] = items[m]
                                m -= 1
                            items[m + 1] = v
            start = i
    n1d = n0d = twd = n1f = n0f = twf = 0
    evd = otd = evf = otf = 0
    count_mask = np.uint64(32767)
    prev = items[0] >> np.uint64(16)
    for i in range(n + 1):  # the step past the last item closes the last group
        it = items[i] if i < n else np.uint64(0)
        key = it >> np.uint64(16)
        if i == n or key != prev:  # a new group of tied scores: close the last one
            twd += evd * (2 * n0d + otd)
            n1d += evd
            n0d += otd
            twf += evf * (2 * n0f + otf)
            n1f += evf
            n0f += otf
            if i == n:
                break
            evd = otd = evf = otf = 0
            prev = key
        copies = int((it >> np.uint64(1)) & count_mask)
        if it & np.uint64(1):
            evd += copies
            evf += 1
        else:
            otd += copies
            otf += 1
    pairs[0, 0], pairs[0, 1], pairs[0, 2] = n1d, n0d, twd
    pairs[1, 0], pairs[1, 1], pairs[1, 2] = n1f, n0f, twf
    return 0, pairs
