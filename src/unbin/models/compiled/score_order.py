"""The stable ascending order of 32-bit whole-number keys by a compiled least-significant-digit
radix sort (the numpy path: ``models/radix.py``, ``stable_order``, two stable 16-bit passes
of numpy's sort; this module stands in for it in ``discrimination.ascending_order`` from
``ORDER_FROM_ROWS`` rows).

One pass counts every key's three digits (11, 11 and 10 bits: tables of 2,048 counters that
stay in cache), then three scatter passes place the rows by each digit in turn, lowest first,
carrying the keys along (no gather of the keys by the order between passes). Each pass is
stable, so the result is ``np.argsort(key, kind="stable")`` exactly: a stable order is
unique."""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["stable_order32"]


@numba.njit(cache=True, nogil=True)
def stable_order32(key: np.ndarray) -> np.ndarray:
    """``np.argsort(key, kind="stable")`` of ``key`` (n,) uint32, as int64 positions."""
    n = key.shape[0]
    mask = np.uint32(2047)
    count = np.zeros((3, 2048), dtype=np.int64)
    for i in range(n):
        k = key[i]
        count[0, k & mask] += 1
        count[1, (k >> np.uint32(11)) & mask] += 1
        count[2, k >> np.uint32(22)] += 1
    for p in range(3):  # each digit's first place
        total = 0
        for b in range(2048):
            c = count[p, b]
            count[p, b] = total
            total += c
    first = np.empty(n, dtype=np.int64)
    first_key = np.empty(n, dtype=np.uint32)
    for i in range(n):
        k = key[i]
        b = k & mask
        d = count[0, b]
        count[0, b] = d + 1
        first[d] = i
        first_key[d] = k
    second = np.empty(n, dtype=np.int64)
    second_key = np.empty(n, dtype=np.uint32)
    for i in range(n):
        k = first_key[i]
        b = (k >> np.uint32(11)) & mask
        d = count[1, b]
        count[1, b] = d + 1
        second[d] = first[i]
        second_key[d] = k
    for i in range(n):  # the last digit: the rows' final places (reusing ``first``)
        b = second_key[i] >> np.uint32(22)
        d = count[2, b]
        count[2, b] = d + 1
        first[d] = second[i]
    return first
