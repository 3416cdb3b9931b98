"""The Cox engine's standardised, sorted copy of the design as compiled loops: the column
statistics of X and its rows in the layout's order, centred and scaled, behind a column of
ones (what ``unbin.models.cox.likelihood._standardised`` and ``_write_standardised`` compute;
only the summation order differs).

The rows are written by a scatter, not gathered: X is read in its own order (sequentially,
also column by column when it is Fortran-ordered) and each row stored at its position in the
layout. A gather of rows in time order waits on a random load per row; stores do not stall,
so at 1,000,000 rows the scatter takes about half the gather's time.

A bootstrap replicate's design (``unbin.models.cox.fit._replicate_design``, the full sample's
centring and scaling given) is gathered instead, by :func:`gather_standardised`: in blocks of
``GATHER_BLOCK`` rows, a first tight pass loads one value of each row's first and last cache
line (independent loads, many of them in flight at once, so the random reads overlap), and
the second pass, which reads the rows from cache, centres, scales and writes them in order.
At 1,000,000 drawn rows of 6 columns it takes about 25 ms where the scatter took about 60
(``benchmarks/replicate_design.py``)."""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["GATHER_BLOCK", "column_sums", "copy_standardised", "gather_standardised",
           "positions", "scatter_standardised"]

GATHER_BLOCK = 128  # rows whose cache lines are loaded before they are written


@numba.njit(cache=True, nogil=True, error_model="numpy")
def positions(order, we, pos, we_src):  # pragma: no cover
    """``pos[order[i]] = i`` and ``we_src[order[i]] = we[i]`` (``pos`` -1 and ``we_src`` 0 for
    a source row that is not laid out)."""
    for q in range(pos.size):
        pos[q] = -1
        we_src[q] = 0.0
    for i in range(order.size):
        pos[order[i]] = i
        we_src[order[i]] = we[i]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def column_sums(a, rows, pos, masked, total, squares, hi, lo):  # pragma: no cover
    """Each column's sum, sum of squares, largest and smallest value over the source rows
    ``rows[q]`` (``q`` itself when ``rows`` is empty) of the rows q with ``pos[q] >= 0`` (all
    rows unless ``masked``)."""
    p = a.shape[1]
    n = pos.size
    has_rows = rows.size > 0
    for j in range(p):
        total[j] = 0.0
        squares[j] = 0.0
        hi[j] = -np.inf
        lo[j] = np.inf
    for q in range(n):
        if masked and pos[q] < 0:
            continue
        o = rows[q] if has_rows else q
        for j in range(p):
            x = a[o, j]
            total[j] += x
            squares[j] += x * x
            hi[j] = max(hi[j], x)
            lo[j] = min(lo[j], x)


@numba.njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _write_row(X1, i, src, o, wi, mean, inv, bounds, with_bounds, xwe):  # pragma: no cover
    """Row ``i`` of ``X1`` (columns 1..p) = ``(src[o] - mean) * inv``; adds ``wi x`` to ``xwe``
    and, ``with_bounds``, widens ``bounds`` (2, p) to the values written."""
    for j in range(X1.shape[1] - 1):
        x = (src[o, j] - mean[j]) * inv[j]
        X1[i, 1 + j] = x
        xwe[j] += wi * x
        if with_bounds:
            bounds[0, j] = max(bounds[0, j], x)
            bounds[1, j] = min(bounds[1, j], x)


@numba.njit(cache=True, nogil=True, error_model="numpy")
def scatter_standardised(X1, src, rows, pos, we_src, mean, inv, bounds, with_bounds,
                         xwe):  # pragma: no cover
    """Row ``pos[q]`` of ``X1`` (columns 1..p) = ``(src[rows[q]] - mean) * inv`` (``src[q]``
    when ``rows`` is empty) for every q with ``pos[q] >= 0``; ``xwe`` (p,) = the sum of
    ``we_src[q] x`` over them and, ``with_bounds``, ``bounds`` (2, p) each column's largest and
    smallest value written."""
    p = X1.shape[1] - 1
    has_rows = rows.size > 0
    for j in range(p):
        xwe[j] = 0.0
        if with_bounds:
            bounds[0, j] = -np.inf
            bounds[1, j] = np.inf
    for q in range(pos.size):
        i = pos[q]
        if i < 0:
            continue
        _write_row(X1, i, src, rows[q] if has_rows else q, we_src[q], mean, inv, bounds,
                   with_bounds, xwe)


@numba.njit(cache=True, nogil=True, error_model="numpy")
def gather_standardised(X1, src, idx, we, mean, inv, bounds, with_bounds, xwe):  # pragma: no cover
    """Row ``i`` of ``X1`` (columns 1..p) = ``(src[idx[i]] - mean) * inv`` for every i;
    ``xwe`` (p,) = the sum of ``we[i] x`` over them in row order and, ``with_bounds``,
    ``bounds`` (2, p) each column's largest and smallest value written. Returns a sum of the
    values loaded ahead (read it nowhere: it keeps those loads from being dropped)."""
    p = X1.shape[1] - 1
    for j in range(p):
        xwe[j] = 0.0
        if with_bounds:
            bounds[0, j] = -np.inf
            bounds[1, j] = np.inf
    if p == 0:
        return 0.0
    n = idx.size
    touched = 0.0
    for start in range(0, n, GATHER_BLOCK):
        stop = min(n, start + GATHER_BLOCK)
        for i in range(start, stop):  # the rows' cache lines, loaded ahead (8 values a line)
            o = idx[i]
            t = src[o, p - 1]
            for j in range(0, p - 1, 8):
                t += src[o, j]
            touched += t
        for i in range(start, stop):
            _write_row(X1, i, src, idx[i], we[i], mean, inv, bounds, with_bounds, xwe)
    return touched


@numba.njit(cache=True, nogil=True, error_model="numpy")
def copy_standardised(X1, S, pos, we, bounds, xwe):  # pragma: no cover
    """Row ``i`` of ``X1`` = row ``pos[i]`` of ``S`` (a standardised design, ones first, as
    :func:`gather_standardised` writes it) for every i; ``xwe`` (p,) = the sum of ``we[i] x``
    over them in row order and ``bounds`` (2, p) each column's largest and smallest value
    written: :func:`gather_standardised`'s results from the rows it wrote once, bit for bit.
    False (X1 partly written) at a negative position."""
    p = X1.shape[1] - 1
    for j in range(p):
        xwe[j] = 0.0
        bounds[0, j] = -np.inf
        bounds[1, j] = np.inf
    for i in range(pos.size):
        s = pos[i]
        if s < 0:
            return False
        X1[i, 0] = S[s, 0]
        wi = we[i]
        for j in range(1, p + 1):
            x = S[s, j]
            X1[i, j] = x
            xwe[j - 1] += wi * x
            bounds[0, j - 1] = max(bounds[0, j - 1], x)
            bounds[1, j - 1] = min(bounds[1, j - 1], x)
    return True
