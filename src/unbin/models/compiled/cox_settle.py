"""The Cox engine's stopping test, exactly: does a step change no row's linear predictor by more
than a limit (``unbin.models.cox.fit._settled``, after its bound was not conclusive)?

One pass over the standardised design's rows, ``|x_i' step|`` row by row, that returns at the
first row beyond the limit (the steps that do not settle usually have one early), instead of
numpy's product of the whole design, its absolute values and their maximum (three passes and
an array of n)."""

from __future__ import annotations

import numba

__all__ = ["within"]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def within(X1, step, limit):  # pragma: no cover
    """Whether ``|X1[i, 1:] @ step| <= limit`` for every row i (False at a NaN)."""
    m, q = X1.shape
    for i in range(m):
        e = 0.0
        for j in range(q - 1):
            e += X1[i, 1 + j] * step[j]
        if not abs(e) <= limit:
            return False
    return True
