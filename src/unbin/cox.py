"""The proportional-hazards engine: Cox partial likelihood on numpy arrays.

What it does
------------
``fit_cox`` maximises the Cox partial likelihood by Newton's method with step halving, with
Efron (default) or Breslow handling of tied event times, strata (a separate baseline hazard
per stratum), delayed entry (left truncation: a row is at risk at event time t when
``entry < t <= time``) and optional case weights. ``baseline_cumhaz`` gives the Breslow
estimate of the baseline cumulative hazard per stratum, ``predict_risk`` the absolute risk by a
horizon, and ``concordance`` Harrell's C in O(n log n).

How it is fast
--------------
The data are sorted once. Every event time t_k of every stratum gets an index k (sorted by
stratum, then time), and every row the range of indices ``(a_i, b_i]`` of the event times at
which it is at risk. A sparse (K x n) matrix with +1 at ``b_i`` and -1 at ``a_i`` turns a
reverse cumulative sum over event times into the risk-set sums of ``w exp(eta)`` and
``w exp(eta) x`` at every event time (the -1 removes rows that have not yet entered). The
second derivatives never need per-event-time p x p matrices: the sum over event times of
``c_k * sum_{i in R_k} r_i x_i x_i'`` equals ``X' diag(r_i * sum_{k: i in R_k} c_k) X``, one
matrix product, and the ``E[x] E[x]'`` part needs only the (event times x p) risk-set means.
Memory is therefore a few n x p arrays; nothing of size n x p x p (or n x p^2) is formed.
Efron's tied-event terms are expanded over events (one entry per event, ``l/d`` fractions)
and summed with ``np.bincount``, so there is no Python loop over event times or strata.

Numerics
--------
Columns are centred and scaled internally (the partial likelihood is invariant to centring;
estimates are transformed back). The linear predictor is shifted by its maximum within each
stratum before ``exp`` (the partial likelihood is invariant to that too). With several strata
the cumulative sums over event times run in extended precision (``np.longdouble``) so that
one stratum's sums do not lose digits to another's.

Failures
--------
Invalid input (event not 0/1, ``time <= entry``, non-finite values, non-positive weights)
raises ``ValueError`` naming the problem. Numerical trouble never raises and never returns a
silent NaN: ``CoxFit.converged`` is False and ``CoxFit.message`` says what happened and what
to try (iteration limit, singular information, diverging coefficient, non-finite likelihood).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy import linalg, sparse

__all__ = ["CoxFit", "baseline_cumhaz", "concordance", "fit_cox", "predict_risk"]


@dataclass(frozen=True)
class CoxFit:
    """Result of :func:`fit_cox`.

    ``coef`` are log hazard ratios per unit of each column of X; ``cov`` is the inverse of the
    observed information at ``coef``. ``loglik``/``loglik0`` are the log partial likelihood at
    ``coef`` and at zero (summed over strata). ``message`` is ``""`` when the fit is fine and
    otherwise says what went wrong and what to try. When the information matrix is singular,
    ``coef``/``cov`` are NaN (and ``message`` says so); when the iteration limit is reached or a
    coefficient diverges, they hold the last iterate. ``n`` counts the rows given, ``events``
    the rows with event = 1 (unweighted).
    """

    coef: np.ndarray
    cov: np.ndarray
    loglik: float
    loglik0: float
    iterations: int
    converged: bool
    message: str
    n: int
    events: int


# --------------------------------------------------------------------------- input checks


def _as_1d(name: str, values: Any, n: int | None, dtype: Any = float) -> np.ndarray:
    arr = np.asarray(values, dtype=dtype)
    if arr.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional, got shape {arr.shape}")
    if n is not None and arr.shape[0] != n:
        raise ValueError(f"{name} has {arr.shape[0]} values but X has {n} rows")
    return arr


def _check_finite(name: str, arr: np.ndarray) -> None:
    if arr.size == 0 or np.isfinite(np.add.reduce(arr, axis=None)):
        return  # a finite sum means no NaN or infinity (fast path)
    bad = ~np.isfinite(arr)
    if not bad.any():
        return
    if bad.any():
        first = int(np.flatnonzero(bad.reshape(bad.shape[0], -1).any(axis=1))[0])
        raise ValueError(
            f"{name} has {int(bad.sum())} missing or infinite value(s) (first at row {first}); "
            "drop or impute those rows before fitting"
        )


def _event_array(event: Any, n: int | None) -> np.ndarray:
    raw = np.asarray(event)
    if raw.ndim != 1 or (n is not None and raw.shape[0] != n):
        raise ValueError(f"event must be one-dimensional with {n} values, got shape {raw.shape}")
    if raw.dtype == bool:
        return raw
    num = np.asarray(raw, dtype=float)
    ok = (num == 0) | (num == 1)
    if not ok.all():
        bad = num[~ok][:3]
        raise ValueError(
            f"event must be 0/1 (or boolean); found {int((~ok).sum())} other value(s), "
            f"e.g. {bad.tolist()}"
        )
    return num == 1


def _design(X: Any) -> np.ndarray:
    arr = np.asarray(X, dtype=float)
    if arr.ndim != 2:
        raise ValueError(f"X must be a 2-D (n, p) array, got shape {arr.shape}")
    return arr


@dataclass(frozen=True)
class _Layout:
    """The data sorted once, with the at-risk index ranges and the sparse risk-set operator."""

    order: np.ndarray  # rows of the input at risk at some event time, by (stratum, time)
    w: np.ndarray  # weights of kept rows (sorted)
    we: np.ndarray  # weight * event of kept rows
    ev: np.ndarray  # positions (in kept rows) of events, grouped by event time
    g: np.ndarray  # event-time index k of each event in ``ev``
    lfrac: np.ndarray  # l / d_k for each event (Efron), l = 0 .. d_k - 1
    wavg: np.ndarray  # (K,) mean weight of the events tied at t_k
    wsum: np.ndarray  # (K,) summed weight of the events at t_k
    risk_op: sparse.csr_matrix  # (K, m): +1 at b_i, -1 at a_i (entered after t_k)
    tie_op: sparse.csr_matrix  # (K, m): 1 for the events at t_k
    b_idx: np.ndarray  # b_i + 1 (index into a zero-padded cumulative array)
    a_idx: np.ndarray  # a_i + 1 if entered after the stratum's first event time, else 0
    seg_end: np.ndarray  # (K,) one past the last event-time index of t_k's stratum
    seg_start: np.ndarray  # (K,) first event-time index of t_k's stratum
    row_starts: np.ndarray  # start of each stratum among kept rows
    row_counts: np.ndarray
    k_stratum: np.ndarray  # (K,) stratum code of each event time
    k_time: np.ndarray  # (K,) the event time t_k
    labels: np.ndarray  # stratum labels (index = code)
    n_strata: int
    ties: bool  # some event time has more than one event
    late_entry: bool  # some row enters after the first event time of its stratum
    n: int
    events: int


def _prepare(
    n: int,
    time: Any,
    event: Any,
    entry: Any | None,
    strata: Any | None,
    weights: Any | None,
) -> _Layout:
    t = _as_1d("time", time, n)
    _check_finite("time", t)
    e = _event_array(event, n)
    if weights is None:
        w = np.ones(n)
    else:
        w = _as_1d("weights", weights, n)
        _check_finite("weights", w)
        if (w <= 0).any():
            raise ValueError(
                f"weights must be positive; {int((w <= 0).sum())} are zero or negative "
                "(drop those rows instead)"
            )
    if entry is not None:
        en = _as_1d("entry", entry, n)
        _check_finite("entry", en)
        late = ~(t > en)
        if late.any():
            first = int(np.flatnonzero(late)[0])
            raise ValueError(
                f"time must be greater than entry (delayed entry): {int(late.sum())} row(s) "
                f"have time <= entry, e.g. row {first} with entry={float(en[first])}, "
                f"time={float(t[first])}"
            )
    if strata is None:
        scode = np.zeros(n, dtype=np.int64)
        labels = np.array([0])
    else:
        s_arr = np.asarray(strata)
        if s_arr.ndim != 1 or s_arr.shape[0] != n:
            raise ValueError(f"strata must be one-dimensional with {n} values, got {s_arr.shape}")
        codes, uniq = pd.factorize(s_arr, sort=True)
        if (codes < 0).any():
            raise ValueError(f"strata has {int((codes < 0).sum())} missing value(s)")
        scode = codes.astype(np.int64)
        labels = np.asarray(uniq)

    # sort once: by stratum, then time (a quicksort on time, then a stable pass on the codes)
    order = np.argsort(t)
    n_strata = int(labels.size)
    if n_strata > 1:
        codes_small = scode.astype(np.uint16) if n_strata < 2**16 else scode
        order = order[np.argsort(codes_small[order], kind="stable")]
    t_s, e_s, sc_s = t[order], e[order], scode[order]
    # runs of rows sharing (stratum, time); the runs holding an event are the event times k
    new_run = np.ones(n, dtype=bool)
    new_run[1:] = (t_s[1:] != t_s[:-1]) | (sc_s[1:] != sc_s[:-1])
    run_id = np.cumsum(new_run) - 1
    run_first = np.flatnonzero(new_run)
    run_event = np.bincount(run_id[e_s], minlength=run_first.size) > 0
    run_k = np.cumsum(run_event) - 1  # last event time at or before each run
    b = run_k[run_id]  # a row is at risk at event times (a, b]
    k_first = run_first[run_event]
    k_time, k_stratum = t_s[k_first], sc_s[k_first]
    K = int(k_first.size)

    new_stratum = np.ones(n, dtype=bool)
    new_stratum[1:] = sc_s[1:] != sc_s[:-1]
    s_first = np.flatnonzero(new_stratum)
    s_runs = run_id[s_first]
    lo_stratum = run_k[s_runs] + 1 - run_event[s_runs]  # first event time of each stratum
    lo = np.repeat(lo_stratum, np.diff(np.r_[s_first, n]))
    if entry is None:
        a = lo - 1
    else:
        en_s = en[order]
        if n_strata == 1:
            a = np.searchsorted(k_time, en_s, side="right") - 1
        else:
            values = np.unique(k_time)
            span = np.int64(values.size + 1)
            k_key = k_stratum * span + np.searchsorted(values, k_time) + 1
            row_key = sc_s * span + np.searchsorted(values, en_s, side="right")
            a = np.searchsorted(k_key, row_key, side="right") - 1
    keep = b > a  # at risk at one event time at least
    if not keep.all():
        kept = np.flatnonzero(keep)
        order, b, a, lo, e_s, sc_s = order[kept], b[kept], a[kept], lo[kept], e_s[kept], sc_s[kept]
    m = order.size
    w_s = w[order]

    ev = np.flatnonzero(e_s)
    g = b[ev]
    d = np.bincount(g, minlength=K)
    first_of_group = np.cumsum(d) - d
    lfrac = (np.arange(ev.size) - first_of_group[g]) / d[g]
    wsum = np.bincount(g, weights=w_s[ev], minlength=K)
    wavg = wsum / np.maximum(d, 1)

    entered_late = a >= lo
    n_late = int(entered_late.sum())
    if n_late == 0:  # rows are sorted by b: the operator's rows are runs of consecutive rows
        indptr = np.r_[0, np.cumsum(np.bincount(b, minlength=K))]
        risk_op = sparse.csr_matrix((np.ones(m), np.arange(m), indptr), shape=(K, m))
    else:
        rows = np.concatenate([b, a[entered_late]])
        cols = np.concatenate([np.arange(m), np.flatnonzero(entered_late)])
        vals = np.concatenate([np.ones(m), -np.ones(n_late)])
        risk_op = sparse.csr_matrix((vals, (rows, cols)), shape=(K, m))
    # events are sorted by event time, so the tie operator's rows are runs of events
    tie_indptr = np.r_[0, np.cumsum(d)]
    tie_op = sparse.csr_matrix((np.ones(ev.size), ev, tie_indptr), shape=(K, m))

    k_new = np.ones(K, dtype=bool)
    k_new[1:] = k_stratum[1:] != k_stratum[:-1]
    k_bounds = np.flatnonzero(k_new)
    k_sizes = np.diff(np.r_[k_bounds, K])
    seg_start = np.repeat(k_bounds, k_sizes)
    seg_end = np.repeat(np.r_[k_bounds[1:], K], k_sizes)

    if m:
        starts = np.flatnonzero(np.r_[True, sc_s[1:] != sc_s[:-1]])
    else:
        starts = np.zeros(0, dtype=np.int64)
    counts = np.diff(np.r_[starts, m])
    return _Layout(
        order=order,
        w=w_s,
        we=w_s * e_s,
        ev=ev,
        g=g,
        lfrac=lfrac,
        wavg=wavg,
        wsum=wsum,
        risk_op=risk_op,
        tie_op=tie_op,
        b_idx=b + 1,
        a_idx=np.where(entered_late, a + 1, 0),
        seg_end=seg_end,
        seg_start=seg_start,
        row_starts=starts,
        row_counts=counts,
        k_stratum=k_stratum,
        k_time=k_time,
        labels=labels,
        n_strata=n_strata,
        ties=bool((d > 1).any()),
        late_entry=n_late > 0,
        n=n,
        events=int(e.sum()),
    )


# ------------------------------------------------------------------- sums over event times


def _scaled(op: sparse.csr_matrix, r: np.ndarray) -> sparse.csr_matrix:
    """``op @ diag(r)``: the operator's values times r of their rows (columns of op)."""
    return sparse.csr_matrix((op.data * r[op.indices], op.indices, op.indptr), shape=op.shape)


def _risk_sums(L: _Layout, contrib: np.ndarray) -> np.ndarray:
    """Risk-set sums per event time from per-event-time contributions.

    ``contrib`` is (q, K): for each event time, the summed values of the rows whose last event
    time at risk it is, minus those of the rows that entered just after it. Returns (q, K): the
    reverse cumulative sum over event times, restarted at every stratum.
    """
    z = contrib
    if L.n_strata == 1:
        out = np.empty_like(z)
        np.cumsum(z[:, ::-1], axis=1, out=out[:, ::-1])  # ``out`` stays C-contiguous
        return out
    # restarted per stratum by subtracting the later strata's total; in extended precision so
    # that those totals do not swamp a stratum's small late risk sets
    rev = np.zeros((z.shape[0], z.shape[1] + 1), dtype=np.longdouble)
    rev[:, :-1] = np.cumsum(z[:, ::-1].astype(np.longdouble), axis=1)[:, ::-1]
    return np.asarray(rev[:, :-1] - rev[:, L.seg_end], dtype=float)


def _forward_cum(L: _Layout, c: np.ndarray) -> np.ndarray:
    """Cumulative sum of ``c`` over event times within each stratum, zero-padded in front."""
    if L.n_strata == 1:
        return np.concatenate([[0.0], np.cumsum(c)])
    cum = np.concatenate([[0.0], np.cumsum(c.astype(np.longdouble))])
    within = cum[1:] - cum[L.seg_start]
    return np.concatenate([[0.0], np.asarray(within, dtype=float)])


def _shifted_eta(L: _Layout, eta: np.ndarray) -> np.ndarray:
    if eta.size == 0:
        return eta
    if L.row_starts.size <= 1:
        return eta - eta.max()
    top = np.maximum.reduceat(eta, L.row_starts)
    return eta - np.repeat(top, L.row_counts)


def _evaluate(
    L: _Layout, Xs: np.ndarray, beta: np.ndarray, efron: bool, work: np.ndarray | None = None
) -> tuple[float, np.ndarray, np.ndarray]:
    """Log partial likelihood, score and observed information at ``beta``.

    ``Xs`` is the (m, p) C-contiguous array of standardised covariates of the kept rows;
    ``work`` an (m, p) scratch array reused between calls. Without ``work`` only the log
    partial likelihood is computed.
    """
    p = Xs.shape[1]
    if p and beta.any():
        eta = _shifted_eta(L, Xs @ beta)
        with np.errstate(over="ignore", under="ignore"):
            r = L.w * np.exp(eta)
    else:
        eta, r = np.zeros(Xs.shape[0]), L.w
    K = L.wavg.size
    g, lfrac = L.g, L.lfrac
    efron_terms = efron and L.ties
    derivs = work is not None and p > 0
    # (1 + p, K): risk-set sums of r and of r x at each event time
    contrib = np.empty((1 + p if derivs else 1, K))
    contrib[0] = L.risk_op @ r
    if derivs:
        contrib[1:] = (_scaled(L.risk_op, r) @ Xs).T
    sums = _risk_sums(L, contrib)
    s0 = sums[0]
    with np.errstate(divide="ignore", invalid="ignore"):
        if efron_terms:  # one term per event: denominators S0 - (l/d) T0
            t0 = L.tie_op @ r
            den = s0[g] - lfrac * t0[g]
            loglik = float(L.we[L.ev] @ eta[L.ev] - L.wavg[g] @ np.log(den))
        else:  # Breslow, or no tied events: one term per event time
            loglik = float(L.we[L.ev] @ eta[L.ev] - L.wsum @ np.log(s0))
    if not derivs or not np.isfinite(loglik):
        return loglik, np.zeros(p), np.zeros((p, p))
    assert work is not None
    if efron_terms:
        inv = 1.0 / den
        c = L.wavg * np.bincount(g, weights=inv, minlength=K)
        t1 = np.asarray(_scaled(L.tie_op, r) @ Xs).T
        mean = (sums[1:, g] - lfrac * t1[:, g]) * inv  # (p, events): risk-set means
        mean_w = L.wavg[g]
    else:
        c = L.wsum / s0
        mean = sums[1:]  # (p, K): risk-set sums; the means are sums / s0
        mean_w = L.wsum / s0**2
    # sum_k c_k sum_{i in R_k} r_i x_i x_i' = X' diag(v) X with v_i = r_i sum_{k: i in R_k} c_k
    cum = _forward_cum(L, c)
    v = r * (cum[L.b_idx] - cum[L.a_idx]) if L.late_entry else r * cum[L.b_idx]
    if efron_terms:
        bk = L.wavg * np.bincount(g, weights=lfrac * inv, minlength=K)
        v[L.ev] -= r[L.ev] * bk[g]
    score = Xs.T @ (L.we - v)
    np.multiply(Xs, v[:, None], out=work)
    info = Xs.T @ work - (mean * mean_w) @ mean.T
    info = (info + info.T) / 2.0
    return loglik, score, info


# --------------------------------------------------------------------------------- fitting


def _singular_message(info: np.ndarray, sd: np.ndarray) -> str:
    if not np.isfinite(info).all():
        return (
            "the score or information is not finite (numerical overflow); rescale columns with "
            "extreme values or give starting values (init)"
        )
    const = np.flatnonzero(sd == 0)
    if const.size:
        return (
            f"information matrix is singular: column(s) {const.tolist()} are constant among "
            "the rows at risk; drop them"
        )
    diag = np.sqrt(np.clip(np.diag(info), 1e-300, None))
    vals, vecs = np.linalg.eigh(info / np.outer(diag, diag))
    weak = vecs[:, 0]
    involved = np.flatnonzero(np.abs(weak) > 0.1 * np.abs(weak).max()).tolist()
    return (
        "information matrix is singular (or not positive definite): columns "
        f"{involved} are (nearly) collinear, or a coefficient is diverging "
        f"(smallest scaled eigenvalue {vals[0]:.2g}); drop or combine those columns"
    )


def _solve(info: np.ndarray, score: np.ndarray) -> np.ndarray | None:
    if not (np.isfinite(info).all() and np.isfinite(score).all()):
        return None
    try:
        factor = linalg.cho_factor(info, check_finite=False)
    except linalg.LinAlgError:
        return None
    step = linalg.cho_solve(factor, score, check_finite=False)
    return step if np.isfinite(step).all() else None


def fit_cox(
    X: Any,
    time: Any,
    event: Any,
    *,
    entry: Any | None = None,
    strata: Any | None = None,
    weights: Any | None = None,
    ties: str = "efron",
    max_iter: int = 50,
    tol: float = 1e-9,
    init: Any | None = None,
) -> CoxFit:
    """Fit a Cox proportional-hazards model by maximising the partial likelihood.

    X: (n, p) covariates (p may be 0). time: exit times. event: 0/1 (or bool).
    entry: optional entry times (delayed entry; a row is at risk at t when entry < t <= time).
    strata: optional labels; each stratum has its own baseline hazard.
    weights: optional positive case weights (the information is the model-based one, not a
    robust sandwich). ties: "efron" (default) or "breslow".
    Convergence: Newton steps with step halving until the log partial likelihood changes by
    less than ``tol * max(1, |loglik|)``. ``init`` are starting values on the scale of X.
    """
    if ties not in ("efron", "breslow"):
        raise ValueError(f"ties must be 'efron' or 'breslow', got {ties!r}")
    Xa = _design(X)
    n, p = Xa.shape
    _check_finite("X", Xa)
    L = _prepare(n, time, event, entry, strata, weights)
    efron = ties == "efron"
    nan_coef, nan_cov = np.full(p, np.nan), np.full((p, p), np.nan)

    m = L.order.size
    Xs = Xa[L.order]  # a copy, centred and scaled in place
    mean = np.ones(m) @ Xs / m if m else np.zeros(p)
    Xs -= mean
    sd = np.sqrt(np.einsum("ij,ij->j", Xs, Xs) / m) if m else np.zeros(p)
    sd[sd <= 1e-12 * np.maximum(1.0, np.abs(mean))] = 0.0  # constant up to rounding
    scale = np.where(sd > 0, sd, 1.0)
    Xs /= scale
    work = np.empty((m, p))

    if L.events == 0:
        msg = "" if p == 0 else "no events: the coefficients are not estimable"
        return CoxFit(nan_coef, nan_cov, 0.0, 0.0, 0, p == 0, msg, n, 0)

    ll0, score, info = _evaluate(L, Xs, np.zeros(p), efron, work if init is None else None)
    if p == 0:
        return CoxFit(np.zeros(0), np.zeros((0, 0)), ll0, ll0, 0, True, "", n, L.events)

    if init is None:
        beta = np.zeros(p)
        ll = ll0
    else:
        init_arr = _as_1d("init", init, None)
        if init_arr.shape[0] != p:
            raise ValueError(f"init has {init_arr.shape[0]} values but X has {p} columns")
        _check_finite("init", init_arr)
        beta = init_arr * scale
        ll, score, info = _evaluate(L, Xs, beta, efron, work)
        if not np.isfinite(ll):
            msg = (
                "log partial likelihood is not finite at the starting values (init); "
                "start from zero or from smaller values"
            )
            return CoxFit(nan_coef, nan_cov, ll, ll0, 0, False, msg, n, L.events)

    def back(b: np.ndarray, inf: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        try:
            cov_s = linalg.inv(inf, check_finite=True)
        except (linalg.LinAlgError, ValueError):
            return b / scale, nan_cov
        return b / scale, cov_s / np.outer(scale, scale)

    iterations = 0
    last_change = float("nan")
    message = ""
    converged = False
    while True:
        step = _solve(info, score)
        if step is None:
            message = _singular_message(info, sd)
            return CoxFit(nan_coef, nan_cov, ll, ll0, iterations, False, message, n, L.events)
        if iterations >= max_iter:
            message = (
                f"no convergence after {max_iter} Newton iteration(s) (last change in log "
                f"partial likelihood {last_change:.3g}); raise max_iter, start from better "
                "values (init), or look for a covariate with extreme values or separation"
            )
            break
        iterations += 1
        halving = 0
        while True:
            cand = beta + step
            ll_c, score_c, info_c = _evaluate(L, Xs, cand, efron, work)
            if np.isfinite(ll_c) and ll_c >= ll - 1e-12 * max(1.0, abs(ll)):
                break
            halving += 1
            step = step / 2.0
            if halving > 40:
                break
        if halving > 40:
            message = (
                "step halving could not improve the log partial likelihood "
                f"(at {ll:.6g}); the model may be overparameterised or a covariate may have "
                "extreme values - rescale or drop columns, or give init"
            )
            break
        last_change = ll_c - ll
        beta, ll, score, info = cand, ll_c, score_c, info_c
        if abs(last_change) <= tol * max(1.0, abs(ll)):
            converged = True
            break

    if converged:
        # a coefficient that keeps moving although the likelihood stopped changing is going to
        # infinity (monotone likelihood), as when one group has no events
        nxt = _solve(info, score)
        if nxt is None:
            message = _singular_message(info, sd)
            coef, _ = back(beta, info)
            return CoxFit(coef, nan_cov, ll, ll0, iterations, False, message, n, L.events)
        diverging = np.flatnonzero(
            (np.abs(nxt) > max(tol, 1e-8)) & (np.abs(nxt) > np.sqrt(tol) * np.abs(beta))
        )
        if diverging.size:
            converged = False
            message = (
                f"coefficient(s) of column(s) {diverging.tolist()} diverge while the log "
                "partial likelihood has levelled off (monotone likelihood: e.g. no events in "
                "one group of a binary column); the estimate is infinite - merge groups or "
                "drop the column"
            )
    coef, cov = back(beta, info)
    if not np.isfinite(cov).all() and not message:
        message = "the information matrix could not be inverted at the estimate"
        converged = False
    return CoxFit(coef, cov, float(ll), float(ll0), iterations, converged, message, n, L.events)


# ------------------------------------------------------------------ baseline and prediction


def baseline_cumhaz(
    X: Any,
    time: Any,
    event: Any,
    coef: Any,
    *,
    entry: Any | None = None,
    strata: Any | None = None,
    weights: Any | None = None,
) -> pd.DataFrame:
    """Breslow estimate of the baseline cumulative hazard, per stratum.

    Returns a long table with columns ``stratum`` (the strata labels; 0 without strata),
    ``time`` (each distinct event time of the stratum, increasing) and ``cumhaz``:
    H0(t) = sum over event times t_k <= t of (summed event weights at t_k) /
    (sum over the risk set at t_k of w_i exp(x_i coef)), with the risk set honouring delayed
    entry. The baseline is at covariates = 0 on the scale of X (NOT at the covariate means),
    so ``H(t | x) = H0(t) exp(x coef)``. The Breslow form is used whichever ties method fitted
    ``coef``. If x = 0 is far outside the data, H0 may underflow: centre X first.
    """
    Xa = _design(X)
    n, p = Xa.shape
    _check_finite("X", Xa)
    b = _as_1d("coef", coef, None)
    if b.shape[0] != p:
        raise ValueError(f"coef has {b.shape[0]} values but X has {p} columns")
    _check_finite("coef", b)
    L = _prepare(n, time, event, entry, strata, weights)
    eta = Xa[L.order] @ b if p else np.zeros(L.order.size)
    shifted = _shifted_eta(L, eta)
    s0 = _risk_sums(L, np.asarray(L.risk_op @ (L.w * np.exp(shifted)))[None, :])[0]
    K = L.wsum.size
    if K == 0:
        return pd.DataFrame({"stratum": L.labels[:0], "time": np.zeros(0), "cumhaz": np.zeros(0)})
    # undo the per-stratum shift of eta: H0 = sum(W / S0_shifted) * exp(-shift); the strata
    # with rows at risk are exactly those with event times, in code order
    shift_of_stratum = np.zeros(L.n_strata)
    shift_of_stratum[np.unique(L.k_stratum)] = eta[L.row_starts] - shifted[L.row_starts]
    with np.errstate(over="ignore", under="ignore"):
        hazard = L.wsum / s0 * np.exp(-shift_of_stratum[L.k_stratum])
    cum = _forward_cum(L, hazard)[1:]
    return pd.DataFrame({"stratum": L.labels[L.k_stratum], "time": L.k_time, "cumhaz": cum})


def predict_risk(
    X_new: Any,
    coef: Any,
    cumhaz_df: pd.DataFrame,
    horizon: Any,
    strata_new: Any | None = None,
) -> np.ndarray:
    """Absolute risk of the event by ``horizon``: 1 - exp(-H0(horizon) exp(x coef)).

    ``cumhaz_df`` is the output of :func:`baseline_cumhaz`. H0 is the step function through
    its values (0 before the first event time; constant after the last one, so horizons beyond
    the follow-up are not extrapolated). ``horizon`` is a scalar or one value per row.
    ``strata_new`` gives each row's stratum label; it may be omitted when there is one stratum.
    """
    Xa = _design(X_new)
    b = _as_1d("coef", coef, None)
    if b.shape[0] != Xa.shape[1]:
        raise ValueError(f"coef has {b.shape[0]} values but X_new has {Xa.shape[1]} columns")
    m = Xa.shape[0]
    hz = np.broadcast_to(np.asarray(horizon, dtype=float), (m,))
    labels = pd.unique(cumhaz_df["stratum"])
    if strata_new is None:
        if labels.size > 1:
            raise ValueError(
                f"the baseline has {labels.size} strata; give strata_new (one label per row)"
            )
        st = np.zeros(m, dtype=np.int64)
    else:
        s_arr = np.asarray(strata_new)
        if s_arr.shape != (m,):
            raise ValueError(f"strata_new must have one label per row ({m}), got {s_arr.shape}")
        st = pd.Index(labels).get_indexer(s_arr)
        if (st < 0).any():
            unknown = pd.unique(s_arr[st < 0])[:5].tolist()
            raise ValueError(f"strata_new has labels without a baseline: {unknown}")
    h0 = np.zeros(m)
    for j, lab in enumerate(labels):
        rows = st == j
        if not rows.any():
            continue
        part = cumhaz_df[cumhaz_df["stratum"] == lab]
        t = part["time"].to_numpy(dtype=float)
        c = part["cumhaz"].to_numpy(dtype=float)
        pos = np.searchsorted(t, hz[rows], side="right") - 1
        h0[rows] = np.where(pos >= 0, c[np.maximum(pos, 0)], 0.0)
    with np.errstate(over="ignore"):
        cumhaz = h0 * np.exp(Xa @ b)
    return np.asarray(-np.expm1(-cumhaz), dtype=float)


# ------------------------------------------------------------------------------ concordance


def concordance(time: Any, risk_score: Any, event: Any) -> float:
    """Harrell's C: the share of comparable pairs in which the earlier event had the higher score.

    A pair is comparable when the earlier time is an event and the other row's time is later,
    or equal with the other row censored; pairs of events at the same time are not comparable.
    Tied scores count one half. Equals ``lifelines.utils.concordance_index(time, -risk_score,
    event)``. Returns NaN when there is no comparable pair (e.g. no events).
    O(n log n): a bottom-up merge over the rows sorted by time counts, for every row, the
    earlier events with a higher (or equal) score.
    """
    t = _as_1d("time", time, None)
    n = t.shape[0]
    s = _as_1d("risk_score", risk_score, n)
    e = _event_array(event, n)
    _check_finite("time", t)
    _check_finite("risk_score", s)
    if n < 2 or not e.any():
        return float("nan")
    # order: time ascending; at equal times events first, the events by increasing score
    order = np.lexsort((np.where(e, s, 0.0), ~e, t))
    t, s, e = t[order], s[order], e[order]
    q = np.unique(s, return_inverse=True)[1].astype(np.int64).ravel()

    # pairs: every event with all rows after it, less events tied in time with it
    pos = np.arange(n, dtype=np.int64)
    pairs = int((n - 1 - pos[e]).sum())
    # events tied in time (and, for the score ties, also in score), grouped
    te, qe = t[e], q[e]
    new_t = np.r_[True, te[1:] != te[:-1]]
    size_t = np.diff(np.r_[np.flatnonzero(new_t), te.size])
    pairs -= int((size_t * (size_t - 1) // 2).sum())
    new_tq = new_t | np.r_[True, qe[1:] != qe[:-1]]
    size_tq = np.diff(np.r_[np.flatnonzero(new_tq), te.size])
    same_time_same_score = int((size_tq * (size_tq - 1) // 2).sum())
    if pairs == 0:
        return float("nan")

    higher, equal = _earlier_events_vs_later(q, e)
    equal -= same_time_same_score
    return (higher + 0.5 * equal) / pairs


def _earlier_events_vs_later(q: np.ndarray, dead: np.ndarray) -> tuple[int, int]:
    """Count pairs (i before j) with i an event and q_i > q_j, and with q_i == q_j."""
    n = q.size
    nq = np.int64(q.max()) + 1
    idx = np.arange(n, dtype=np.int64)
    perm = idx.copy()  # rows arranged so that every block of ``width`` is sorted by q
    higher = equal = 0
    width = 1
    while width < n:
        qa, da = q[perm], dead[perm]
        pair = idx // (2 * width)
        right = ((idx // width) & 1).astype(bool)
        key = pair * nq + qa
        left_keys = key[~right & da]  # sorted: pairs ascending, q sorted within each half
        rkey = key[right]
        above = np.searchsorted(left_keys, rkey, side="right")
        at_least = np.searchsorted(left_keys, rkey, side="left")
        end = np.searchsorted(left_keys, (pair[right] + 1) * nq, side="left")
        higher += int((end - above).sum())
        equal += int((above - at_least).sum())
        perm = perm[np.argsort(key, kind="stable")]
        width *= 2
    return higher, equal
