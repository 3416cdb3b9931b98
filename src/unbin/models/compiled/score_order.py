"""The stable ascending order of whole-number keys by a compiled least-significant-digit
radix sort (the numpy path: ``models/radix.py``, ``stable_order``, stable 16-bit passes of
numpy's sort). ``stable_order32`` (32-bit keys) stands in for it in
``discrimination.ascending_order`` from ``ORDER_FROM_ROWS`` rows; ``stable_order48`` (keys
below 2^48) in Harrell's C's sort of grid scores (``cox/concordance._grid_order``, from
``GRID_ORDER_FROM_ROWS`` rows of the sample).

One pass counts every key's three digits (11, 11 and 10 bits: tables of 2,048 counters that
stay in cache), then three scatter passes place the rows by each digit in turn, lowest first,
carrying the keys along (no gather of the keys by the order between passes). Each pass is
stable, so the result is ``np.argsort(key, kind="stable")`` exactly: a stable order is
unique."""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["stable_order32", "stable_order48"]


@numba.njit(cache=True, nogil=True, error_model="numpy")
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


@numba.njit(cache=True, nogil=True, error_model="numpy")
def stable_order48(key: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``np.argsort(key, kind="stable")`` of ``key`` (n,) int64, every key in [0, 2^48), as
    int64 positions, and the keys in that order. The keys less their smallest are split into
    four 13-bit digits (tables of 8,192 counters), all counted in one pass; a digit that is
    the same for every key (the high ones of keys spanning a small range) keeps the order as
    it is, so its pass is skipped (keys spanning less than 2^39: three passes)."""
    n = key.shape[0]
    bits = 13
    mask = np.int64(8191)
    low = np.int64(0)
    if n:
        low = key[0]
        for i in range(n):
            if key[i] < low:
                low = key[i]
    count = np.zeros((4, 8192), dtype=np.int64)
    for i in range(n):
        k = key[i] - low
        count[0, k & mask] += 1
        count[1, (k >> bits) & mask] += 1
        count[2, (k >> (2 * bits)) & mask] += 1
        count[3, (k >> (3 * bits)) & mask] += 1
    order = np.arange(n)
    sorted_key = key.copy()
    spare = np.empty(n, dtype=np.int64)
    spare_key = np.empty(n, dtype=np.int64)
    for p in range(4):
        total = 0
        one_digit = False
        for b in range(8192):  # each digit's first place; one digit for all: no pass
            c = count[p, b]
            if c == n:
                one_digit = True
                break
            count[p, b] = total
            total += c
        if one_digit or n == 0:
            continue
        shift = bits * p
        for i in range(n):
            k = sorted_key[i]
            b = ((k - low) >> shift) & mask
            d = count[p, b]
            count[p, b] = d + 1
            spare[d] = order[i]
            spare_key[d] = k
        order, spare = spare, order
        sorted_key, spare_key = spare_key, sorted_key
    return order, sorted_key
