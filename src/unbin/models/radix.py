"""The stable order of non-negative whole-number keys by 16-bit radix passes, shared by the
C index's sorts (``discrimination.ascending_order``'s 32-bit score buckets; Harrell's C's
grid scores and late-entry runs in ``cox/concordance.py``).

numpy's stable sort of 16-bit integers is a radix sort (linear in the rows); sorting by the
low 16 bits, then stably by each higher 16 bits in turn, gives the stable order of the whole
keys (least significant digit first), cheaper than numpy's stable sort of 64-bit integers
while the keys need at most three passes. The result is ``np.argsort(key, kind="stable")``
exactly: a stable order is unique."""

from __future__ import annotations

import numpy as np

__all__ = ["stable_order"]

_PASSES = 3  # keys below 2^(16 x this) are sorted by passes; larger ones by numpy's sort


def stable_order(key: np.ndarray) -> np.ndarray:
    """``np.argsort(key, kind="stable")`` of non-negative whole numbers (any integer type),
    by one stable 16-bit radix pass per 16 bits of the largest key (up to three)."""
    top = int(key.max(initial=0))
    if top >= 1 << (16 * _PASSES):
        return np.argsort(key, kind="stable")
    order = np.argsort((key & 0xFFFF).astype(np.uint16), kind="stable")
    shift = 16
    while top >> shift:
        part = np.take(key, order)
        part >>= shift
        part &= 0xFFFF
        order = order[np.argsort(part.astype(np.uint16), kind="stable")]
        shift += 16
    return order
