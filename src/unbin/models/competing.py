"""Competing risks: the Aalen–Johansen cumulative incidence and the Fine–Gray model.

A competing-risks outcome has one cause code per row: 0 censored, the event of interest, or a
competing event. Its *cause-specific* hazard of the event of interest is the ordinary Cox model
with competing events treated as censored (``unbin.models.survival``, unchanged). What a person's
absolute risk by a horizon needs is the *cumulative incidence* of the event of interest, which
the competing events lower; ``1 - Kaplan–Meier`` overstates it.

- :func:`aalen_johansen`: the nonparametric cumulative incidence (Aalen & Johansen 1978),
  ``F(t) = sum_{t_k <= t} S(t_k-) d_1(t_k) / Y(t_k)`` with ``S`` the all-cause Kaplan–Meier,
  risk sets honouring delayed entry (at risk at t when entry < t <= time), optional case weights.
- :func:`fine_gray_data` / :func:`fit_fine_gray`: the subdistribution hazards model (Fine &
  Gray 1999), ``1 - F(t | x) = exp(-Lambda0(t) exp(x b))``, fitted as a weighted Cox model on a
  counting-process expansion (Geskus 2011): a row with a competing event at T_i stays in the
  risk set after T_i, one row per later event time t_k of the event of interest, with weight
  ``G(t_k-) H(t_k) / (G(T_i-) H(T_i))``. ``G`` is the Kaplan–Meier of the censoring time (all
  events as censoring's "survivors"; risk sets with delayed entry) and ``H(t) = P(entry < t)``
  the product-limit of the entry times in reversed time (1 without delayed entry): the
  probability, relative to T_i, that the person would still have been seen at t_k. Censoring
  and entry are taken as independent of the covariates and of the strata (one G and one H for
  the sample). The covariance is the cluster-robust sandwich with each person as a cluster
  (the expanded rows of one person are not independent); the person's own cluster column,
  when the analysis has one, is used instead.
- :func:`fine_gray_bootstrap_cov`: the sandwich treats ``G`` and ``H`` as known. With heavy
  delayed entry that understates the variance (the check in ``benchmarks/checks/fine_gray.py``:
  92.5% coverage at n = 300); the nonparametric bootstrap over persons (or clusters), which
  re-estimates ``G`` and ``H`` in every resample before the refit, accounts for their
  estimation. ``fit_fine_gray(..., bootstrap=B)`` returns that covariance (the sandwich stays in
  ``extra["robust_cov"]``).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from .base import FitResult, Outcome, failed_fit


def _check(time: np.ndarray, cause: np.ndarray, entry: np.ndarray | None) -> None:
    if time.ndim != 1 or cause.shape != time.shape:
        raise ValueError("time and cause must be 1-d arrays of the same length")
    if not np.all(np.isfinite(time)) or not np.all(np.isfinite(cause)):
        raise ValueError("time and cause must be finite")
    if entry is not None and (entry.shape != time.shape or np.any(entry >= time)):
        raise ValueError("entry must have one value per row and lie before time")


def aalen_johansen(time: np.ndarray, cause: np.ndarray, event_of_interest: int = 1, *,
                   entry: np.ndarray | None = None,
                   weights: np.ndarray | None = None) -> pd.DataFrame:
    """The Aalen–Johansen cumulative incidence of ``event_of_interest`` at every distinct event
    time (any cause): columns ``time``, ``cif`` (step function, right-continuous) and
    ``survival`` (all-cause Kaplan–Meier)."""
    t = np.asarray(time, dtype=float)
    c = np.asarray(cause, dtype=float)
    e = None if entry is None else np.asarray(entry, dtype=float)
    _check(t, c, e)
    w = np.ones(t.size) if weights is None else np.asarray(weights, dtype=float)
    any_event = c != 0
    et = np.unique(t[any_event])
    K = et.size
    hi = np.searchsorted(et, t, side="right")  # at risk at event times [lo, hi)
    lo = np.zeros(t.size, dtype=int) if e is None else np.searchsorted(et, e, side="right")
    Y = np.cumsum(np.bincount(lo, w, K + 1) - np.bincount(hi, w, K + 1))[:K]
    k = hi - 1
    d_all = np.bincount(k[any_event], w[any_event], K)
    mine = c == event_of_interest
    d_1 = np.bincount(k[mine], w[mine], K)
    with np.errstate(invalid="ignore", divide="ignore"):
        step = np.where(Y > 0, d_all / Y, 0.0)
        haz1 = np.where(Y > 0, d_1 / Y, 0.0)
    S = np.cumprod(1.0 - step)
    S_before = np.concatenate([[1.0], S[:-1]])
    return pd.DataFrame({"time": et, "cif": np.cumsum(S_before * haz1), "survival": S})


def step_at(times: np.ndarray, values: np.ndarray, at: np.ndarray | float,
            before: bool = False) -> np.ndarray:
    """A right-continuous step function through (times, values), 0 before the first time, read
    at ``at`` (``before``: its left limit, the value just before ``at``)."""
    at_ = np.asarray(at, dtype=float)
    if len(times) == 0:
        return np.zeros(at_.shape)
    pos = np.searchsorted(times, at_, side="left" if before else "right") - 1
    return np.where(pos >= 0, np.asarray(values)[np.maximum(pos, 0)], 0.0)


def censoring_survival_before(time: np.ndarray, cause: np.ndarray, entry: np.ndarray | None,
                              weights: np.ndarray, at: np.ndarray) -> np.ndarray:
    """G(at-): the Kaplan–Meier of the censoring time just before ``at`` (an event at the same
    time as a censoring is taken to come first, so censorings at t are not yet counted)."""
    cens = cause == 0
    ct = np.unique(time[cens])
    if ct.size == 0:
        return np.ones(np.shape(at))
    hi = np.searchsorted(ct, time, side="right")
    lo = (np.zeros(time.size, dtype=int) if entry is None
          else np.searchsorted(ct, entry, side="right"))
    K = ct.size
    Y = np.cumsum(np.bincount(lo, weights, K + 1) - np.bincount(hi, weights, K + 1))[:K]
    dc = np.bincount(hi[cens] - 1, weights[cens], K)
    G = np.cumprod(1.0 - np.where(Y > 0, dc / np.where(Y > 0, Y, 1.0), 0.0))
    pos = np.searchsorted(ct, at, side="left") - 1
    return np.where(pos >= 0, G[np.maximum(pos, 0)], 1.0)


def entry_distribution(time: np.ndarray, entry: np.ndarray | None, weights: np.ndarray,
                       at: np.ndarray) -> np.ndarray:
    """H(at) = P(entry < at): the product-limit estimate of the entry-time distribution in
    reversed time (Lynden-Bell's estimator), ``prod_{s >= at} (1 - d(s) / R(s))`` over distinct
    entry times s, with d(s) the (weighted) entries at s and R(s) those with entry <= s < time.
    1 everywhere without delayed entry."""
    if entry is None:
        return np.ones(np.shape(at))
    st = np.unique(entry)
    K = st.size
    # entry <= s: index from searchsorted(st, entry, left); s < time: s below searchsorted left
    lo = np.searchsorted(st, entry, side="left")
    hi = np.searchsorted(st, time, side="left")
    R = np.cumsum(np.bincount(lo, weights, K + 1) - np.bincount(hi, weights, K + 1))[:K]
    d = np.bincount(lo, weights, K)
    factor = 1.0 - np.where(R > 0, d / np.where(R > 0, R, 1.0), 0.0)
    # product over s >= at: a reversed cumulative product
    tail = np.concatenate([np.cumprod(factor[::-1])[::-1], [1.0]])
    return np.asarray(tail[np.searchsorted(st, at, side="left")])


@dataclass(frozen=True)
class FineGrayData:
    """The counting-process expansion of one sample for the Fine–Gray model: the expanded
    rows' ``start``, ``stop``, ``event`` (the event of interest) and ``weight`` (case weight
    times the censoring-and-entry weight), and ``person``, the sample row each comes from."""

    start: np.ndarray
    stop: np.ndarray
    event: np.ndarray
    weight: np.ndarray
    person: np.ndarray

    def take(self, X: np.ndarray) -> np.ndarray:
        """The design rows of the expanded sample (a person's row repeated)."""
        return np.asarray(X)[self.person]


def fine_gray_data(time: np.ndarray, cause: np.ndarray, event_of_interest: int = 1, *,
                   entry: np.ndarray | None = None,
                   weights: np.ndarray | None = None) -> FineGrayData:
    """The weighted counting-process expansion (module docstring; Geskus 2011)."""
    t = np.asarray(time, dtype=float)
    c = np.asarray(cause, dtype=float)
    e = None if entry is None else np.asarray(entry, dtype=float)
    _check(t, c, e)
    n = t.size
    w = np.ones(n) if weights is None else np.asarray(weights, dtype=float)
    mine = c == event_of_interest
    tk = np.unique(t[mine])
    competing = np.flatnonzero((c != 0) & ~mine)
    j0 = np.searchsorted(tk, t[competing], side="right")  # first event time after T_i
    counts = tk.size - j0
    who = np.repeat(competing, counts)
    first = np.repeat(j0, counts)
    k = first + (np.arange(who.size) - np.repeat(np.cumsum(counts) - counts, counts))
    stop = tk[k]
    start = np.where(k == first, t[who], tk[np.maximum(k - 1, 0)])
    G_k = censoring_survival_before(t, c, e, w, stop)
    G_i = censoring_survival_before(t, c, e, w, t[who])
    H_k = entry_distribution(t, e, w, stop)
    H_i = entry_distribution(t, e, w, t[who])
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(G_i * H_i > 0, G_k * H_k / (G_i * H_i), 0.0)
    keep = ratio > 0
    own_start = np.zeros(n) if e is None else e
    return FineGrayData(
        start=np.concatenate([own_start, start[keep]]),
        stop=np.concatenate([t, stop[keep]]),
        event=np.concatenate([mine.astype(float), np.zeros(int(keep.sum()))]),
        weight=np.concatenate([w, w[who][keep] * ratio[keep]]),
        person=np.concatenate([np.arange(n), who[keep]]),
    )


_CACHE = "fine_gray_outcome"


def fine_gray_outcome(outcome: Outcome, cause: np.ndarray, event_of_interest: int
                      ) -> tuple[Outcome, FineGrayData]:
    """The expanded sample as a weighted survival Outcome (robust variance clustered by person,
    or by the analysis' cluster), kept in ``outcome.cache`` for every fit of the sample."""
    cached = outcome.cache.get(_CACHE)
    if cached is not None:
        return cached
    assert outcome.time is not None
    data = fine_gray_data(outcome.time, cause, event_of_interest, entry=outcome.entry,
                          weights=outcome.weights)
    cluster = data.person if outcome.cluster is None else np.asarray(outcome.cluster)[data.person]
    strata = None if outcome.strata is None else np.asarray(outcome.strata)[data.person]
    expanded = Outcome("survival", data.event, time=data.stop, entry=data.start, strata=strata,
                       weights=data.weight, weight_kind="sampling", cluster=cluster)
    outcome.cache[_CACHE] = (expanded, data)
    return expanded, data


def fit_fine_gray(X: np.ndarray, outcome: Outcome, cause: np.ndarray, event_of_interest: int,
                  names: tuple[str, ...], bootstrap: int = 0, seed: int = 0) -> FitResult:
    """The Fine–Gray model of one design: coefficients are log subdistribution hazard ratios,
    the covariance cluster-robust (module docstring), or with ``bootstrap`` = B > 0 the
    covariance of B bootstrap refits (:func:`fine_gray_bootstrap_cov`; the sandwich is then in
    ``extra["robust_cov"]``, the refits that failed counted in ``extra["bootstrap_failed"]``);
    ``linear_predictor`` is per sample row and ``extra["baseline"]`` the Breslow baseline
    cumulative subdistribution hazard (per stratum, at covariates 0;
    :func:`unbin.models.cox.baseline_cumhaz`). A failed fit is returned, never raised."""
    from . import fit
    from .cox import baseline_cumhaz
    from .survival import cox_layout

    X = np.asarray(X, dtype=float).reshape(outcome.n, -1)
    events = int(np.sum(np.asarray(cause) == event_of_interest))
    try:
        expanded, data = fine_gray_outcome(outcome, cause, event_of_interest)
    except ValueError as exc:
        return failed_fit("survival", names, outcome.n, events, f"Fine–Gray expansion: {exc}")
    Xe = data.take(X)
    res = fit("survival", Xe, expanded, names)
    if not res.ok:
        return res
    lp = X @ res.coef
    centre = float(np.mean(lp)) if lp.size else 0.0
    # baseline at the centred predictor (no underflow), moved back to covariates 0
    base = baseline_cumhaz((data.take(lp) - centre)[:, None], expanded.time, expanded.y, [1.0],
                           entry=expanded.entry, strata=expanded.strata,
                           weights=expanded.weights, layout=cox_layout(expanded))
    base = base.assign(cumhaz=base["cumhaz"].to_numpy(float) * np.exp(-centre))
    cov = res.cov
    extra: dict[str, object] = {**res.extra, "baseline": base,
                                "expanded_rows": int(data.stop.size)}
    if bootstrap > 0:
        cov, failed = fine_gray_bootstrap_cov(X, outcome, cause, event_of_interest, names,
                                              bootstrap, seed)
        extra.update(robust_cov=res.cov, bootstrap=bootstrap, bootstrap_failed=failed)
    return FitResult(family="survival", names=res.names, coef=res.coef, cov=cov,
                     loglik=res.loglik, n=outcome.n, events=events, n_params=res.n_params,
                     converged=True, iterations=res.iterations, warnings=res.warnings,
                     linear_predictor=lp, extra=extra)


def fine_gray_bootstrap_cov(X: np.ndarray, outcome: Outcome, cause: np.ndarray,
                            event_of_interest: int, names: tuple[str, ...], replicates: int,
                            seed: int = 0) -> tuple[np.ndarray, int]:
    """The covariance of the Fine–Gray coefficients over ``replicates`` nonparametric bootstrap
    resamples of the persons (of the clusters when the outcome has them, Efron & Tibshirani
    1993, ch. 6), the censoring and entry distributions re-estimated in each (module
    docstring), and how many refits failed (left out; all NaN when fewer than two fitted)."""
    from . import fit

    X = np.asarray(X, dtype=float).reshape(outcome.n, -1)
    c = np.asarray(cause)
    rng = np.random.default_rng(seed)
    if outcome.cluster is None:
        units, members = np.arange(outcome.n), None
    else:
        codes, inverse = np.unique(np.asarray(outcome.cluster), return_inverse=True)
        units = np.arange(codes.size)
        members = [np.flatnonzero(inverse == u) for u in units]
    draws, failed = [], 0
    for _ in range(replicates):
        pick = rng.choice(units, size=units.size, replace=True)
        rows = pick if members is None else np.concatenate([members[u] for u in pick])
        o = outcome.subset(rows)
        # each drawn row is its own person (a person drawn twice is two people)
        o = replace(o, cluster=None if members is None else np.repeat(
            np.arange(pick.size), [members[u].size for u in pick]))
        try:
            expanded, data = fine_gray_outcome(o, c[rows], event_of_interest)
        except ValueError:
            failed += 1
            continue
        res = fit("survival", data.take(X[rows]), expanded, names)
        if res.ok and np.all(np.isfinite(res.coef)):
            draws.append(res.coef)
        else:
            failed += 1
    if len(draws) < 2:
        return np.full((X.shape[1], X.shape[1]), np.nan), failed
    return np.atleast_2d(np.cov(np.asarray(draws), rowvar=False)), failed
