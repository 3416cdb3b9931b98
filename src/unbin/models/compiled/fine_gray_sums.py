"""The Fine–Gray fit's risk-set sums and row weights (``unbin.models.fine_gray``'s
``risk_sum0``, ``risk_sums`` and ``row_weights``) as loops over the sample's rows.

The numpy path forms each sum as several passes with temporaries: the gathered ``r`` (or ``r x``)
of the rows at risk, a ``bincount`` per column by the row's last event time, another for the
late entries and for the competing persons, then cumulative sums per stratum. Here each is one
loop that adds in the same order as ``bincount`` (row by row into its bin, the late entries and
the competing persons into bins of their own that are then subtracted or added) and the same
sequential cumulative sums, with the same products: the results are the numpy path's bit for
bit (``tests/models/test_fine_gray_compiled.py``)."""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["gather_standardised", "risk_sum0", "risk_sums", "row_weights"]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def risk_sum0(r, rows, b, late, a, comp, comp_c, comp_qinv, Q, k_bounds):  # pragma: no cover
    """``S0(t_k)`` (K,): the sums of ``r`` over each event time's risk set, expanded rows
    included (``fine_gray.risk_sum0``)."""
    K = Q.size
    contrib = np.zeros(K)
    for i in range(rows.size):
        contrib[b[i]] += r[rows[i]]
    if late.size:
        gone = np.zeros(K)
        for j in range(late.size):
            gone[a[j]] += r[rows[late[j]]]
        for k in range(K):
            contrib[k] -= gone[k]
    S = np.empty(K)
    for s in range(k_bounds.size - 1):
        lo, hi = k_bounds[s], k_bounds[s + 1]
        if hi > lo:
            acc = contrib[hi - 1]
            S[hi - 1] = acc
            for k in range(hi - 2, lo - 1, -1):
                acc = acc + contrib[k]
                S[k] = acc
    if comp.size:
        add = np.zeros(K)
        for j in range(comp.size):
            add[comp_c[j]] += r[comp[j]] * comp_qinv[j]
        for s in range(k_bounds.size - 1):
            lo, hi = k_bounds[s], k_bounds[s + 1]
            acc = 0.0
            for k in range(lo, hi):
                acc = add[k] if k == lo else acc + add[k]
                S[k] += Q[k] * acc
    return S


@numba.njit(cache=True, nogil=True, error_model="numpy")
def risk_sums(r, cols, rows, b, late, a, comp, comp_c, comp_qinv, Q,
              k_bounds):  # pragma: no cover
    """``S(t_k)`` (K x q) of the columns ``cols`` (n x q) weighted by ``r``
    (``fine_gray.risk_sums``)."""
    K = Q.size
    q = cols.shape[1]
    contrib = np.zeros((K, q))
    for i in range(rows.size):
        j = rows[i]
        k = b[i]
        rj = r[j]
        for m in range(q):
            contrib[k, m] += rj * cols[j, m]
    if late.size:
        gone = np.zeros((K, q))
        for i in range(late.size):
            j = rows[late[i]]
            k = a[i]
            rj = r[j]
            for m in range(q):
                gone[k, m] += rj * cols[j, m]
        for k in range(K):
            for m in range(q):
                contrib[k, m] -= gone[k, m]
    S = np.empty((K, q))
    for s in range(k_bounds.size - 1):
        lo, hi = k_bounds[s], k_bounds[s + 1]
        if hi > lo:
            for m in range(q):
                S[hi - 1, m] = contrib[hi - 1, m]
            for k in range(hi - 2, lo - 1, -1):
                for m in range(q):
                    S[k, m] = S[k + 1, m] + contrib[k, m]
    if comp.size:
        add = np.zeros((K, q))
        for i in range(comp.size):
            j = comp[i]
            k = comp_c[i]
            rj = r[j]
            qi = comp_qinv[i]
            for m in range(q):
                add[k, m] += (rj * cols[j, m]) * qi
        for s in range(k_bounds.size - 1):
            lo, hi = k_bounds[s], k_bounds[s + 1]
            for k in range(lo + 1, hi):
                for m in range(q):
                    add[k, m] = add[k - 1, m] + add[k, m]
        for k in range(K):
            for m in range(q):
                S[k, m] += Q[k] * add[k, m]
    return S


@numba.njit(cache=True, nogil=True, error_model="numpy")
def row_weights(r, c, rows, b, late, a, comp, comp_c, comp_qinv, Q,
                k_bounds):  # pragma: no cover
    """Per sample row, ``r_i`` times the sum of ``c`` (K,) over the event times at which the
    row or its expanded copies are at risk (``fine_gray.row_weights``)."""
    K = Q.size
    n = r.size
    cum = np.empty(K)
    for s in range(k_bounds.size - 1):
        lo, hi = k_bounds[s], k_bounds[s + 1]
        acc = 0.0
        for k in range(lo, hi):
            acc = c[k] if k == lo else acc + c[k]
            cum[k] = acc
    v = np.zeros(n)
    for i in range(rows.size):
        v[rows[i]] = cum[b[i]]
    for i in range(late.size):
        j = rows[late[i]]
        v[j] = v[j] - cum[a[i]]
    if comp.size:
        suffix = np.empty(K)
        for s in range(k_bounds.size - 1):
            lo, hi = k_bounds[s], k_bounds[s + 1]
            if hi > lo:
                acc = Q[hi - 1] * c[hi - 1]
                suffix[hi - 1] = acc
                for k in range(hi - 2, lo - 1, -1):
                    acc = acc + Q[k] * c[k]
                    suffix[k] = acc
        for i in range(comp.size):
            j = comp[i]
            v[j] = v[j] + comp_qinv[i] * suffix[comp_c[i]]
    for i in range(n):
        v[i] = r[i] * v[i]
    return v


@numba.njit(cache=True, nogil=True, error_model="numpy")
def gather_standardised(X, rows, mean, inv, used):  # pragma: no cover
    """``(X[rows] - mean) * inv`` (the same products as numpy's, so the same numbers), and each
    column's largest and smallest value over its rows ``used`` (2 x p), in one pass over the
    drawn rows instead of numpy's gather, two in-place passes, a second gather of the rows used
    and two reductions (``fine_gray.fit_replicate``)."""
    m = rows.size
    p = X.shape[1]
    out = np.empty((m, p))
    for i in range(m):
        o = rows[i]
        for j in range(p):
            out[i, j] = (X[o, j] - mean[j]) * inv[j]
    bounds = np.empty((2, p))
    for j in range(p):
        bounds[0, j] = -np.inf
        bounds[1, j] = np.inf
    for q in range(used.size):
        i = used[q]
        for j in range(p):
            x = out[i, j]
            if x != x:  # NaN, as numpy's maximum and minimum: it stays
                bounds[0, j] = x
                bounds[1, j] = x
            else:
                if x > bounds[0, j]:
                    bounds[0, j] = x
                if x < bounds[1, j]:
                    bounds[1, j] = x
    return out, bounds
