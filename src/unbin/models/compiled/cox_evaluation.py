"""The Cox log partial likelihood, score and observed information (Efron or Breslow ties,
strata, delayed entry, case weights) as compiled loops over one layout's arrays.

The numbers are those of ``unbin.models.cox.likelihood``'s numpy path (``_point``,
``_row_weights``, ``_score``, ``_information``), whose docstrings and DEVELOPERS.md ("The Cox
engine's performance") give the algebra; only the summation order differs. Rows are the
layout's kept rows in (stratum, time) order, each at risk at the event times ``(a_i, b_i]``
(``b_i`` nondecreasing; the argument ``b`` holds ``b_i + 1``, the layout's ``b_idx``); the
risk-set sums are per-event-time contributions (``+`` at ``b_i``, ``-`` at ``a_i`` for a row
that entered after its stratum's first event time, listed in ``late_rows`` with ``late_at``)
summed backwards within each stratum, and the weights of the Gram product ``X' diag(v) X``
are forward sums over event times. Every function here is one pass over the rows and one or
two over the event times. ``X beta``, ``exp``, ``log`` and the score's ``X' v`` stay with
the caller (numpy's vectorised loops and BLAS are faster than compiled scalar ones: numba has
no vectorised ``exp``/``log`` without Intel's SVML)."""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["information", "risk_sums", "row_weights"]


@numba.njit(cache=True, nogil=True)
def risk_sums(r, w, unit_w, b, late_rows, late_at, k_bounds, tie_k, tie_d, tie_f, tie_ev, s0,
              t0, den):  # pragma: no cover
    """Given ``r`` (m,) = exp(eta), multiply it by the weights ``w`` (unless ``unit_w``) and
    fill ``s0`` (K,) with the risk-set sums of r; where ``tie_k`` is not empty (Efron's ties),
    ``t0`` (T,) with each tied event time's summed r of its events and ``den`` (one per tied
    event, in ``tie_ev``'s order) with ``s0 - f t0``. The logarithms are left to numpy
    (vectorised; a compiled scalar ``log`` per tied event costs more than the rest)."""
    m = r.size
    K = s0.size
    # rows are sorted by b: each b's rows are a run, summed in a register; the rows that
    # entered after their stratum's first event time (``late_rows``) are taken off again at
    # the last event time before their entry (``late_at``)
    for k in range(K):
        s0[k] = 0.0
    k_run = b[0] - 1 if m else 0
    acc = 0.0
    for i in range(m):
        if unit_w:
            ri = r[i]
        else:
            ri = r[i] * w[i]
            r[i] = ri
        if b[i] - 1 != k_run:
            s0[k_run] += acc
            k_run = b[i] - 1
            acc = 0.0
        acc += ri
    if m:
        s0[k_run] += acc
    for e in range(late_rows.size):
        s0[late_at[e]] -= r[late_rows[e]]
    for s in range(k_bounds.size - 1):  # backwards within each stratum
        acc = 0.0
        for k in range(k_bounds[s + 1] - 1, k_bounds[s] - 1, -1):
            acc += s0[k]
            s0[k] = acc
    pos = 0
    for g in range(tie_k.size):
        acc = 0.0
        for e in range(pos, pos + tie_d[g]):
            acc += r[tie_ev[e]]
        t0[g] = acc
        sk = s0[tie_k[g]]
        for e in range(pos, pos + tie_d[g]):
            den[e] = sk - tie_f[e] * acc
        pos += tie_d[g]


@numba.njit(cache=True, nogil=True)
def row_weights(r, s0, den, b, late_rows, late_at, k_bounds, wsum, wsum_untied, tie_k, tie_d, tie_f,
                tie_wavg, tie_ev, efron, v, a, a1, a2):  # pragma: no cover
    """Fill ``v`` (m,) = r_i sum_{k: i in R_k} c_k less, for a tied event, r_i times its
    time's summed f wavg / den (the Gram product's row weights), ``a`` (K,) the weights of
    S1 S1' in the information (at a tied time a0 = sum wavg / den^2), and with ``efron``
    ``a1``, ``a2`` (T,) = sum f^j wavg / den^2 over the tied time's events (j = 1, 2)."""
    K = s0.size
    m = r.size
    c = np.empty(K)
    tied = efron and tie_k.size > 0
    for k in range(K):
        ws = wsum_untied[k] if tied else wsum[k]
        c[k] = ws / s0[k]
        a[k] = c[k] / s0[k] if not tied else ws / (s0[k] * s0[k])
    bk = np.empty(tie_k.size)
    if tied:
        pos = 0
        for g in range(tie_k.size):
            cg = 0.0
            bg = 0.0
            g0 = 0.0
            g1 = 0.0
            g2 = 0.0
            for e in range(pos, pos + tie_d[g]):
                inv = 1.0 / den[e]
                wi = tie_wavg[e] * inv
                fwi = tie_f[e] * wi
                cg += wi
                bg += fwi
                g0 += wi * inv
                g1 += fwi * inv
                g2 += fwi * tie_f[e] * inv
            c[tie_k[g]] = cg
            bk[g] = bg
            a[tie_k[g]] = g0
            a1[g] = g1
            a2[g] = g2
            pos += tie_d[g]
    cum = np.zeros(K + 1)  # forward within each stratum, zero in front
    for s in range(k_bounds.size - 1):
        acc = 0.0
        for k in range(k_bounds[s], k_bounds[s + 1]):
            acc += c[k]
            cum[k + 1] = acc
    for i in range(m):
        v[i] = r[i] * cum[b[i]]
    for e in range(late_rows.size):
        v[late_rows[e]] -= r[late_rows[e]] * cum[late_at[e] + 1]
    if tied:
        pos = 0
        for g in range(tie_k.size):
            for e in range(pos, pos + tie_d[g]):
                v[tie_ev[e]] -= r[tie_ev[e]] * bk[g]
            pos += tie_d[g]


@numba.njit(cache=True, nogil=True)
def information(X1, r, v, xwe, b, late_rows, late_at, k_bounds, tie_k, tie_d, tie_ev, a, a1, a2,
                efron):  # pragma: no cover
    """The score and the observed information at the point whose ``r``, row weights ``v``
    and event-time weights ``a`` (``a1``, ``a2``) are given. One pass over the rows in blocks
    that stay in cache: the Gram product ``X1' diag(v) X1`` (a BLAS product per block; its
    first row holds the score's ``X' v``) and the risk-set contributions of ``r x``; then the
    risk-set sums S1 per stratum and the event-time terms."""
    m, q = X1.shape
    p = q - 1
    K = a.size
    B = 1024
    gram = np.zeros((q, q))
    S1 = np.zeros((K, p))
    buf = np.empty((min(B, m), q))
    for start in range(0, m, B):
        stop = min(start + B, m)
        block = X1[start:stop]
        scaled = buf[: stop - start]
        for i in range(stop - start):
            vi = v[start + i]
            ri = r[start + i]
            bi = b[start + i] - 1
            for j in range(q):
                scaled[i, j] = block[i, j] * vi
            for j in range(p):
                S1[bi, j] += ri * block[i, 1 + j]
        gram += np.dot(block.T, scaled)
    for e in range(late_rows.size):
        i = late_rows[e]
        al = late_at[e]
        for j in range(p):
            S1[al, j] -= r[i] * X1[i, 1 + j]
    for s in range(k_bounds.size - 1):  # backwards within each stratum
        for k in range(k_bounds[s + 1] - 2, k_bounds[s] - 1, -1):
            for j in range(p):
                S1[k, j] += S1[k + 1, j]
    info = np.zeros((p, p))
    for k in range(K):
        ak = a[k]
        for j in range(p):
            sj = ak * S1[k, j]
            for h in range(j, p):
                info[j, h] -= sj * S1[k, h]
    if efron and tie_k.size:
        t1 = np.empty(p)
        pos = 0
        for g in range(tie_k.size):
            for j in range(p):
                t1[j] = 0.0
            for e in range(pos, pos + tie_d[g]):
                ri = r[tie_ev[e]]
                for j in range(p):
                    t1[j] += ri * X1[tie_ev[e], 1 + j]
            k = tie_k[g]
            g1 = a1[g]
            g2 = a2[g]
            for j in range(p):
                for h in range(j, p):
                    info[j, h] += g1 * (S1[k, j] * t1[h] + t1[j] * S1[k, h])
                    info[j, h] -= g2 * t1[j] * t1[h]
            pos += tie_d[g]
    out = np.empty((p, p))
    for j in range(p):
        for h in range(j, p):
            out[j, h] = (gram[1 + j, 1 + h] + gram[1 + h, 1 + j]) / 2.0 + info[j, h]
            out[h, j] = out[j, h]
    sc = np.empty(p)
    for j in range(p):
        sc[j] = xwe[j] - gram[1 + j, 0]
    return sc, out
