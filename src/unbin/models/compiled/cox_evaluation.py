"""The Cox log partial likelihood, score and observed information (Efron or Breslow ties,
strata, delayed entry, case weights) as compiled loops over one layout's arrays.

The numbers are those of ``unbin.models.cox.likelihood``'s numpy path (``_point``,
``_row_weights``, ``_score``, ``_information``), whose docstrings and DEVELOPERS.md ("The Cox
engine's performance") give the algebra; only the summation order (and, in ``score_point``,
the shift of the linear predictor and its own ``exp``, within 1 ulp of numpy's) differs. Rows are the
layout's kept rows in (stratum, time) order, each at risk at the event times ``(a_i, b_i]``
(``b_i`` nondecreasing; the argument ``b`` holds ``b_i + 1``, the layout's ``b_idx``); the
risk-set sums are per-event-time contributions (``+`` at ``b_i``, ``-`` at ``a_i`` for a row
that entered after its stratum's first event time, listed in ``late_rows`` with ``late_at``)
summed backwards within each stratum, and the weights of the Gram product ``X' diag(v) X``
are forward sums over event times. Every function here is one pass over the rows and one or
two over the event times. ``score_point`` forms ``X beta``, ``exp`` and the score in its
pass; the logarithms and the Gram product's BLAS blocks stay numpy's."""

from __future__ import annotations

import math

import numba
import numpy as np

__all__ = ["exp_values", "information", "row_weights", "score_point"]


# exp(x) = 2^k exp(r), k = round(x / ln 2), r = x - k ln 2 in [-ln 2 / 2, ln 2 / 2] (ln 2 in two
# parts, the first with trailing zero bits so that k times it is exact: Cody & Waite 1980; the
# split of fdlibm's e_exp.c), exp(r) by its Taylor polynomial of degree 13 (remainder below
# r^14 / 14! < 5e-18), 2^k written into the exponent bits. k is rounded by adding 1.5 * 2^52,
# whose last bits then hold k (no conversion to an integer, which the compiler cannot
# vectorise). Within 1 ulp of numpy's ``exp`` (tests/models/test_cox_compiled.py); outside
# [-708, 709] (results near or below the smallest normal number, overflow) and for NaN the
# library's ``exp`` is taken.
_LN2_HI = 6.93147180369123816490e-01
_LN2_LO = 1.90821492927058770002e-10
_INV_LN2 = 1.44269504088896338700e00
_ROUND = 6755399441055744.0  # 1.5 * 2^52
_EXP_LO, _EXP_HI = -708.0, 709.0
_C2, _C3, _C4, _C5, _C6, _C7, _C8, _C9, _C10, _C11, _C12, _C13 = (
    1.0 / math.factorial(k) for k in range(2, 14))
# a stratum's shift is its largest linear predictor among the blocks read so far; a later
# block's largest value may exceed it by this much before the sums so far are rescaled to a
# new shift (exp(30) times a stratum's rows stays far from overflow)
_SHIFT_SLACK = 30.0
_ROWS = 256  # rows per block: their linear predictors stay in cache until exp and the sums


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _exp_shifted(eta, n, shift, out, at):  # pragma: no cover
    """``out[at + i] = exp(eta[i] - shift)`` for i < n (a loop the compiler vectorises)."""
    outside = 0
    for i in range(n):
        x = eta[i] - shift
        outside += not (_EXP_LO <= x <= _EXP_HI)
        x = min(max(x, _EXP_LO), _EXP_HI)
        kd = x * _INV_LN2 + _ROUND
        ki = np.float64(kd).view(np.int64)
        kd -= _ROUND
        r = (x - kd * _LN2_HI) - kd * _LN2_LO
        q = _C13
        q = q * r + _C12
        q = q * r + _C11
        q = q * r + _C10
        q = q * r + _C9
        q = q * r + _C8
        q = q * r + _C7
        q = q * r + _C6
        q = q * r + _C5
        q = q * r + _C4
        q = q * r + _C3
        q = q * r + _C2
        q = q * r + 1.0
        q = q * r + 1.0
        out[at + i] = q * np.int64((ki + 1023) << 52).view(np.float64)
    if outside:
        for i in range(n):
            x = eta[i] - shift
            if not (_EXP_LO <= x <= _EXP_HI):
                out[at + i] = math.exp(x)


@numba.njit(cache=True, nogil=True, error_model="numpy")
def exp_values(x, out):  # pragma: no cover
    """``out = exp(x)`` by the kernels' own ``exp`` (for the tests against numpy's)."""
    _exp_shifted(x, x.size, 0.0, out, 0)


@numba.njit(cache=True, nogil=True, error_model="numpy")
def score_point(X1, beta, row_starts, row_counts, k_bounds, w, unit_w, b, late_rows, late_at,
                ws, xwe, tie_k, tie_d, tie_f, tie_wavg, k_group, ev_f, with_score, r, shifts,
                s0, S1, t0, T1, den, score):  # pragma: no cover
    """The linear predictor, ``r = w exp(eta - shift)``, the risk-set sums of r and (with
    ``with_score``) of r x and the score, in one read of the design ``X1`` (m, 1 + p).

    Strata are runs of rows (``row_starts``, ``row_counts``; stratum s holds the event times
    ``k_bounds[s] .. k_bounds[s + 1] - 1``). Blocks of ``_ROWS`` rows are read once: their
    linear predictors go to a buffer, then ``exp`` and the sums read the block again from
    cache. Each stratum's shift (``shifts``) is the largest linear predictor of its first
    block, raised (with the sums so far rescaled) when a later block's exceeds it by more
    than ``_SHIFT_SLACK``; the partial likelihood does not depend on it, and the caller's
    log-likelihood subtracts it from the events' ``w x' beta``. ``r`` receives w exp(eta -
    shift) per row (the information's row weights need it). ``s0`` (K,) the risk-set sums of
    r, ``t0`` (T,) each tied event time's summed r of its events and ``den`` (one per tied
    event) ``s0 - f t0``; ``with_score``: ``S1`` (K, p) the risk-set sums of r x, ``T1``
    (T, p) the tied events', and ``score`` = ``xwe - sum_k c_k S1_k`` less the tied events'
    terms, ``c_k = ws_k / s0_k`` (``ws``: event weights per event time, 0 at the tied times
    under Efron) and per tied time ``sum wavg (S1 - f T1) / den`` (the row weights' algebra
    summed by event time: no second read of the design, no row weights). A tied time's
    events are the events among the rows whose last event time at risk is that time (one run
    of rows), so their sums are the run's sums weighted by ``ev_f`` (1 for an event, else 0:
    no branch per row), stored at the run's end in slot ``k_group[k]`` (-1: not tied). The
    rows that entered late (``late_rows``, at risk after ``late_at``) are taken off from
    their list after the pass (a test per row costs a mispredicted branch where they are
    common)."""
    m, q = X1.shape
    p = q - 1
    # at coefficients all zero (the log-likelihood at zero) eta is 0: the design is read only
    # for the score's sums of r x
    p_read = 0
    for j in range(p):
        if beta[j] != 0.0:
            p_read = p
    K = s0.size
    T = tie_k.size
    for k in range(K):
        s0[k] = 0.0
    for g in range(T):
        t0[g] = 0.0
    if with_score:
        S1[:, :] = 0.0
        T1[:, :] = 0.0
    buf = np.empty(_ROWS)
    acc_x = np.zeros(p)
    acc_ex = np.zeros(p)
    for s in range(row_starts.size):
        lo = row_starts[s]
        hi = lo + row_counts[s]
        shift = -np.inf
        k_run = b[lo] - 1
        acc = 0.0
        acc_e = 0.0
        for j in range(p):
            acc_x[j] = 0.0
            acc_ex[j] = 0.0
        for start in range(lo, hi, _ROWS):
            n = min(_ROWS, hi - start)
            top = -np.inf
            for i in range(n):
                e = 0.0
                for j in range(p_read):
                    e += X1[start + i, 1 + j] * beta[j]
                buf[i] = e
                if e > top:
                    top = e
            if top > shift + _SHIFT_SLACK:
                if shift > -np.inf:  # rescale what was summed at the old shift
                    f = math.exp(shift - top)
                    for k in range(k_bounds[s], k_bounds[s + 1]):
                        s0[k] *= f
                        g = k_group[k] if T else -1
                        if g >= 0:
                            t0[g] *= f
                        if with_score:
                            for j in range(p):
                                S1[k, j] *= f
                                if g >= 0:
                                    T1[g, j] *= f
                    acc *= f
                    acc_e *= f
                    for j in range(p):
                        acc_x[j] *= f
                        acc_ex[j] *= f
                    for i in range(lo, start):
                        r[i] *= f
                shift = top
            _exp_shifted(buf, n, shift, r, start)
            for i in range(start, start + n):
                if b[i] - 1 != k_run:  # the end of a run of rows with one b
                    s0[k_run] += acc
                    g = k_group[k_run] if T else -1
                    if g >= 0:
                        t0[g] = acc_e
                    acc = 0.0
                    acc_e = 0.0
                    if with_score:
                        for j in range(p):
                            S1[k_run, j] += acc_x[j]
                            acc_x[j] = 0.0
                            if g >= 0:
                                T1[g, j] = acc_ex[j]
                            acc_ex[j] = 0.0
                    k_run = b[i] - 1
                if unit_w:
                    ri = r[i]
                else:
                    ri = r[i] * w[i]
                    r[i] = ri
                acc += ri
                if T:
                    re = ri * ev_f[i]
                    acc_e += re
                    if with_score:
                        for j in range(p):
                            xj = X1[i, 1 + j]
                            acc_x[j] += ri * xj
                            acc_ex[j] += re * xj
                elif with_score:
                    for j in range(p):
                        acc_x[j] += ri * X1[i, 1 + j]
        if hi > lo:
            s0[k_run] += acc
            g = k_group[k_run] if T else -1
            if g >= 0:
                t0[g] = acc_e
            if with_score:
                for j in range(p):
                    S1[k_run, j] += acc_x[j]
                    if g >= 0:
                        T1[g, j] = acc_ex[j]
        shifts[s] = shift
    for e in range(late_rows.size):
        i = late_rows[e]
        ka = late_at[e]
        s0[ka] -= r[i]
        if with_score:
            for j in range(p):
                S1[ka, j] -= r[i] * X1[i, 1 + j]
    for s in range(k_bounds.size - 1):  # backwards within each stratum
        acc = 0.0
        for k in range(k_bounds[s + 1] - 1, k_bounds[s] - 1, -1):
            acc += s0[k]
            s0[k] = acc
        if with_score:
            for k in range(k_bounds[s + 1] - 2, k_bounds[s] - 1, -1):
                for j in range(p):
                    S1[k, j] += S1[k + 1, j]
    pos = 0
    for g in range(T):
        sk = s0[tie_k[g]]
        for e in range(pos, pos + tie_d[g]):
            den[e] = sk - tie_f[e] * t0[g]
        pos += tie_d[g]
    if not with_score:
        return
    for j in range(p):
        score[j] = xwe[j]
    for k in range(K):
        c = ws[k] / s0[k]
        if c != 0.0:
            for j in range(p):
                score[j] -= c * S1[k, j]
    pos = 0
    for g in range(T):
        a = 0.0
        bb = 0.0
        for e in range(pos, pos + tie_d[g]):
            wi = tie_wavg[e] / den[e]
            a += wi
            bb += tie_f[e] * wi
        k = tie_k[g]
        for j in range(p):
            score[j] -= a * S1[k, j] - bb * T1[g, j]
        pos += tie_d[g]


@numba.njit(cache=True, nogil=True, error_model="numpy")
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


@numba.njit(cache=True, nogil=True, error_model="numpy")
def information(X1, r, v, xwe, b, late_rows, late_at, k_bounds, tie_k, tie_d, tie_ev, a, a1, a2,
                efron, S1_given, T1_given):  # pragma: no cover
    """The score and the observed information at the point whose ``r``, row weights ``v``
    and event-time weights ``a`` (``a1``, ``a2``) are given. One pass over the rows in blocks
    that stay in cache: the Gram product ``X1' diag(v) X1`` (a BLAS product per block; its
    first row holds the score's ``X' v``) and the risk-set contributions of ``r x``; then the
    risk-set sums S1 per stratum and the event-time terms. ``S1_given`` (K, p) and
    ``T1_given`` (T, p), when they have rows (the point's score already formed them,
    :func:`score_point`), are the risk-set sums of r x and the tied events' sums, which are
    then not formed again."""
    m, q = X1.shape
    p = q - 1
    K = a.size
    B = 1024
    gram = np.zeros((q, q))
    given = S1_given.shape[0] == K and K > 0
    S1 = S1_given if given else np.zeros((K, p))
    buf = np.empty((min(B, m), q))
    for start in range(0, m, B):
        stop = min(start + B, m)
        block = X1[start:stop]
        scaled = buf[: stop - start]
        for i in range(stop - start):
            vi = v[start + i]
            for j in range(q):
                scaled[i, j] = block[i, j] * vi
        if not given:
            for i in range(stop - start):
                ri = r[start + i]
                bi = b[start + i] - 1
                for j in range(p):
                    S1[bi, j] += ri * block[i, 1 + j]
        gram += np.dot(block.T, scaled)
    if not given:
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
            if T1_given.shape[0] == tie_k.size:
                for j in range(p):
                    t1[j] = T1_given[g, j]
            else:
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
