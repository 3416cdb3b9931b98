"""Competing risks: the Aalen–Johansen cumulative incidence and the Fine–Gray model.

A competing-risks outcome has one cause code per row: 0 censored, the event of interest, or a
competing event. Its *cause-specific* hazard of the event of interest is the ordinary Cox model
with competing events treated as censored (``unbin.models.survival``, unchanged). What a person's
absolute risk by a horizon needs is the *cumulative incidence* of the event of interest, which
the competing events lower; ``1 - Kaplan–Meier`` overstates it.

- :func:`aalen_johansen`: the nonparametric cumulative incidence (Aalen & Johansen 1978),
  ``F(t) = sum_{t_k <= t} S(t_k-) d_1(t_k) / Y(t_k)`` with ``S`` the all-cause Kaplan–Meier,
  risk sets honouring delayed entry (at risk at t when entry < t <= time), optional case weights.
- :func:`fit_fine_gray`: the subdistribution hazards model (Fine & Gray 1999),
  ``1 - F(t | x) = exp(-Lambda0(t) exp(x b))``, the weighted Cox model of a counting-process
  expansion (Geskus 2011; :func:`fine_gray_data` builds it): a row with a competing event at
  T_i stays in the risk set after T_i, one row per later event time t_k of the event of
  interest, with weight ``G(t_k-) H(t_k) / (G(T_i-) H(T_i))``. ``G`` is the Kaplan–Meier of
  the censoring time (all events as censoring's "survivors"; risk sets with delayed entry) and
  ``H(t) = P(entry < t)`` the product-limit of the entry times in reversed time (1 without
  delayed entry): the probability, relative to T_i, that the person would still have been
  seen at t_k. Censoring and entry are taken as independent of the covariates and of the
  strata (one G and one H for the sample). The expansion grows as competing events x later
  event times (some 9e8 rows for a registry of a million), so the fit never builds it: its
  risk sets are the sample's own rows plus a running sum over the competing times times the
  current weight (:mod:`unbin.models.fine_gray`; O(n log n) time, O(n p) memory), with the
  expansion's likelihood, ties, strata and weights. The covariance is the cluster-robust
  sandwich with each person as a cluster (the expanded rows of one person are not
  independent); the person's own cluster column, when the analysis has one, is used
  instead. Each person's score term is their rows' Cox score residuals plus the influence of
  their row on the estimated ``G`` and ``H``
  (:func:`weight_estimation_scores`; Fine & Gray 1999's censoring term, here with the entry
  term of the delayed-entry weights too).
- :func:`fine_gray_bootstrap_cov`: the nonparametric bootstrap over persons (or clusters),
  which re-estimates ``G`` and ``H`` in every resample before the refit;
  ``fit_fine_gray(..., bootstrap=B)`` returns that covariance (the sandwich stays in
  ``extra["robust_cov"]``). With heavy delayed entry at n = 300 the sandwich's intervals
  fall short of 95% (``benchmarks/checks/fine_gray.py``; README's checks table).
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import pandas as pd

from . import fine_gray
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
    return _censoring_steps(ct, hi, lo, cens, weights, at)


def _censoring_steps(ct: np.ndarray, hi: np.ndarray, lo: np.ndarray, cens: np.ndarray,
                     weights: np.ndarray, at: np.ndarray) -> np.ndarray:
    """:func:`censoring_survival_before` from the distinct censoring times ``ct`` and each
    row's count of them at or before its time (``hi``) and its entry (``lo``)."""
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
    # entry <= s: index from searchsorted(st, entry, left); s < time: s below searchsorted left
    lo = np.searchsorted(st, entry, side="left")
    hi = np.searchsorted(st, time, side="left")
    return _entry_steps(st, lo, hi, weights, at)


def _entry_steps(st: np.ndarray, lo: np.ndarray, hi: np.ndarray, weights: np.ndarray,
                 at: np.ndarray) -> np.ndarray:
    """:func:`entry_distribution` from the distinct entry times ``st`` and each row's count of
    them before its entry (``lo``) and before its time (``hi``)."""
    K = st.size
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


# Rows of the counting-process expansion above which fine_gray_data does not build it: every
# competing event adds a row per later event time of interest, so a registry with many distinct
# event times grows as (competing events x event times) — at 1,000,000 rows about 9e8 rows,
# beyond this machine's memory. No fit builds it (unbin.models.fine_gray); it is built only as
# the independent reference of the tests and benchmarks/fine_gray.py (fine_gray_outcome), which
# this limit keeps near 4 GB.
EXPANSION_ROWS = 10_000_000


def fine_gray_data(time: np.ndarray, cause: np.ndarray, event_of_interest: int = 1, *,
                   entry: np.ndarray | None = None,
                   weights: np.ndarray | None = None) -> FineGrayData:
    """The weighted counting-process expansion (module docstring; Geskus 2011); the fits do
    not need it (:func:`fine_gray_layout`)."""
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
    rows = int(counts.sum())
    if rows > EXPANSION_ROWS:
        raise ValueError(
            f"the counting-process expansion would add {rows:,} rows ({competing.size:,} "
            f"competing events x up to {tk.size:,} later distinct times of the event of "
            f"interest; limit {EXPANSION_ROWS:,}), more memory than a fit should take; "
            "record follow-up on a coarser time unit (e.g. weeks or months: fewer distinct "
            "event times) for the Fine–Gray rows")
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
_LAYOUT = "fine_gray_layout"
_NEAR = "fine_gray_near_starts"
_GRIDS = "fine_gray_grids"


def fine_gray_outcome(outcome: Outcome, cause: np.ndarray, event_of_interest: int
                      ) -> tuple[Outcome, FineGrayData]:
    """The expanded sample as a weighted survival Outcome (robust variance clustered by person,
    or by the analysis' cluster), kept in ``outcome.cache``. The fits do not use it
    (:func:`fine_gray_layout`); it is the expansion itself, for a refit on its rows."""
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


def fine_gray_layout(outcome: Outcome, cause: np.ndarray, event_of_interest: int
                     ) -> fine_gray.Layout:
    """The sample laid out for the Fine–Gray fit without the expansion
    (:mod:`unbin.models.fine_gray`), with ``G`` and ``H`` estimated on it; kept in
    ``outcome.cache`` for every fit of the sample."""
    cached = outcome.cache.get(_LAYOUT)
    if cached is not None:
        return cached
    assert outcome.time is not None
    t = np.asarray(outcome.time, dtype=float)
    c = np.asarray(cause, dtype=float)
    e = None if outcome.entry is None else np.asarray(outcome.entry, dtype=float)
    _check(t, c, e)
    w = np.ones(t.size) if outcome.weights is None else np.asarray(outcome.weights, dtype=float)
    searched = None
    if _own_causes(outcome, cause, event_of_interest):
        # the sample's sorted times and each row's place in them, made once (_Grids, which
        # the weights' estimation terms and the replicates' layouts use too): the searches
        # censoring_survival_before and entry_distribution would repeat, the same integers
        g = _grids(outcome)
        searched = (g.values, g.v_time, g.v_entry)
        cens = c == 0
        lo = np.zeros(t.size, dtype=int) if g.c_entry is None else g.c_entry
        entry_part = (None if g.entries is None or g.e_entry is None or g.e_time is None
                      else (g.entries, g.e_entry, g.e_time))

        def Q_at(at: np.ndarray) -> np.ndarray:
            G = (_censoring_steps(g.cens, g.c_time, lo, cens, w, at) if g.cens.size
                 else np.ones(np.shape(at)))
            H = np.ones(np.shape(at)) if entry_part is None else _entry_steps(*entry_part, w, at)
            return G * H
    else:
        def Q_at(at: np.ndarray) -> np.ndarray:
            return censoring_survival_before(t, c, e, w, at) * entry_distribution(t, e, w, at)

    layout = fine_gray.prepare(t, c, event_of_interest, entry=e, weights=outcome.weights,
                               strata=outcome.strata, Q_at=Q_at, searched=searched)
    outcome.cache[_LAYOUT] = layout
    return layout


@dataclass(frozen=True)
class _Grids:
    """The full sample's sorted distinct times that a Fine–Gray layout searches (event times
    of interest, censoring times, entry times) and each row's count of them at or before (or
    before) its time and its entry: a replicate's distinct times are a subset, and its counts
    are the full sample's mapped through the running count of that subset (integers, so the
    replicate's layout is the one :func:`fine_gray_layout` would make, bit for bit)."""

    values: np.ndarray  # event times of interest
    v_time: np.ndarray  # per row: how many are at or before its time
    v_entry: np.ndarray | None  # ... at or before its entry
    cens: np.ndarray  # censoring times
    c_time: np.ndarray  # per row: how many are at or before its time
    c_entry: np.ndarray | None  # ... at or before its entry
    entries: np.ndarray | None  # entry times
    e_entry: np.ndarray | None  # per row: how many are before its entry
    e_time: np.ndarray | None  # ... before its time


def _grids(outcome: Outcome) -> _Grids:
    """The full sample's :class:`_Grids`, kept in its cache."""
    got = outcome.cache.get(_GRIDS)
    if got is None:
        assert outcome.cause is not None
        got = _make_grids(outcome, np.asarray(outcome.cause), outcome.event_of_interest)
        outcome.cache[_GRIDS] = got
    return got


def _make_grids(outcome: Outcome, cause: np.ndarray, event_of_interest: int) -> _Grids:
    """:class:`_Grids` of the outcome's times with the causes ``cause``."""
    assert outcome.time is not None
    t = np.asarray(outcome.time, dtype=float)
    c = np.asarray(cause, dtype=float)
    e = None if outcome.entry is None else np.asarray(outcome.entry, dtype=float)
    values = np.unique(t[c == event_of_interest])
    cens = np.unique(t[c == 0])
    if e is None:
        return _Grids(values, np.searchsorted(values, t, side="right"), None,
                      cens, np.searchsorted(cens, t, side="right"), None, None, None, None)
    entries = np.unique(e)
    return _Grids(
        values, np.searchsorted(values, t, side="right"),
        np.searchsorted(values, e, side="right"),
        cens, np.searchsorted(cens, t, side="right"),
        np.searchsorted(cens, e, side="right"),
        entries, np.searchsorted(entries, e, side="left"),
        np.searchsorted(entries, t, side="left"))


def _sample_grids(outcome: Outcome, cause: np.ndarray, event_of_interest: int) -> _Grids:
    """The outcome's :class:`_Grids` (kept in its cache) when ``cause`` and
    ``event_of_interest`` are its own; else made here for them (not kept)."""
    if _own_causes(outcome, cause, event_of_interest):
        return _grids(outcome)
    return _make_grids(outcome, cause, event_of_interest)


def _own_causes(outcome: Outcome, cause: np.ndarray, event_of_interest: int) -> bool:
    """Whether ``cause`` and ``event_of_interest`` are the outcome's own (its cached grids
    then apply)."""
    return outcome.cause is not None and event_of_interest == outcome.event_of_interest \
        and (cause is outcome.cause or np.array_equal(cause, outcome.cause))


def _subset_counts(size: int, present: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For the grid positions ``present`` (of ``size``): the mask of the subset and the running
    count of it (``size + 1`` entries: how many of the subset lie below each position)."""
    mask = np.zeros(size, dtype=bool)
    mask[present] = True
    return mask, np.r_[0, np.cumsum(mask)]


def replicate_layout(outcome: Outcome, rows: np.ndarray, sample: Outcome) -> fine_gray.Layout:
    """:func:`fine_gray_layout` of ``sample``, the rows ``rows`` of ``outcome`` (a bootstrap
    replicate, with its own case weights), without sorting or searching its times: from the
    full sample's sorted times and each row's position in them (:class:`_Grids`). The same
    layout bit for bit; kept in ``sample.cache``."""
    cached = sample.cache.get(_LAYOUT)
    if cached is not None:
        return cached
    assert sample.time is not None and sample.cause is not None
    g = _grids(outcome)
    t = np.asarray(sample.time, dtype=float)
    c = np.asarray(sample.cause, dtype=float)
    e = None if sample.entry is None else np.asarray(sample.entry, dtype=float)
    _check(t, c, e)
    w = np.ones(t.size) if sample.weights is None else np.asarray(sample.weights, dtype=float)
    v_time = g.v_time[rows]
    mask, count = _subset_counts(g.values.size, v_time[c == sample.event_of_interest] - 1)
    searched = (g.values[mask], count[v_time],
                None if g.v_entry is None else count[g.v_entry[rows]])
    cens = c == 0
    c_time = g.c_time[rows]
    cmask, ccount = _subset_counts(g.cens.size, c_time[cens] - 1)
    ct = g.cens[cmask]
    hi = ccount[c_time]
    lo = np.zeros(t.size, dtype=int) if g.c_entry is None else ccount[g.c_entry[rows]]
    entry_part = None
    if g.entries is not None and g.e_entry is not None and g.e_time is not None:
        e_entry = g.e_entry[rows]
        emask, ecount = _subset_counts(g.entries.size, e_entry)
        entry_part = (g.entries[emask], ecount[e_entry], ecount[g.e_time[rows]])

    def Q_at(at: np.ndarray) -> np.ndarray:
        G = _censoring_steps(ct, hi, lo, cens, w, at) if ct.size else np.ones(np.shape(at))
        H = np.ones(np.shape(at)) if entry_part is None else _entry_steps(*entry_part, w, at)
        return G * H

    layout = fine_gray.prepare(t, c, sample.event_of_interest, entry=e,
                               weights=sample.weights, strata=sample.strata, Q_at=Q_at,
                               searched=searched)
    sample.cache[_LAYOUT] = layout
    return layout


def _fit_coef(X: np.ndarray, outcome: Outcome, cause: np.ndarray, event_of_interest: int,
              names: tuple[str, ...], init: np.ndarray | None = None
              ) -> tuple[fine_gray.Layout, fine_gray.Fit] | FitResult:
    """The layout and Newton fit, or the failed result (no events, a bad design, a fit that
    did not converge) with the Cox fitter's messages."""
    from ._glm import check_design

    events = int(np.sum(np.asarray(cause) == event_of_interest))
    if events == 0:
        return failed_fit("survival", names, outcome.n, 0, "no events in the analysis sample; "
                          "a Cox model needs at least one event.")
    problem = check_design(X, names)
    if problem:
        return failed_fit("survival", names, outcome.n, events, problem)
    try:
        L = fine_gray_layout(outcome, cause, event_of_interest)
    except ValueError as exc:  # the sample's arrays (e.g. an entry not before its time)
        return failed_fit("survival", names, outcome.n, events, f"Fine–Gray: {exc}")
    res = fine_gray.fit(L, X, init=init)
    if not res.converged:
        message = res.message
        if "monotone likelihood" in message:
            message += ("; or set design: {firth: true} in the analysis for Firth-penalised "
                        "(finite) estimates")
        return failed_fit("survival", names, outcome.n, events, message)
    return L, res


def fit_fine_gray(X: np.ndarray, outcome: Outcome, cause: np.ndarray, event_of_interest: int,
                  names: tuple[str, ...], bootstrap: int = 0,
                  seed: int | np.random.Generator = 0) -> FitResult:
    """The Fine–Gray model of one design: coefficients are log subdistribution hazard ratios,
    the covariance cluster-robust (module docstring), or with ``bootstrap`` = B > 0 the
    covariance of B bootstrap refits (:func:`fine_gray_bootstrap_cov`; the sandwich is then in
    ``extra["robust_cov"]``, the refits that failed counted in ``extra["bootstrap_failed"]``);
    ``linear_predictor`` is per sample row and ``extra["baseline"]`` the Breslow baseline
    cumulative subdistribution hazard (per stratum, at covariates 0;
    :func:`unbin.models.cox.baseline_cumhaz` of the expansion). Fitted without building the
    expansion (:mod:`unbin.models.fine_gray`); ``extra["expanded_rows"]`` is the size the
    expansion would have. A failed fit is returned, never raised."""
    from .robust import describe, sandwich

    X = np.asarray(X, dtype=float).reshape(outcome.n, -1)
    names = tuple(names)
    got = _fit_coef(X, outcome, cause, event_of_interest, names)
    if isinstance(got, FitResult):
        return got
    L, res = got
    events = int(np.sum(np.asarray(cause) == event_of_interest))
    lp = X @ res.coef
    clusters = np.arange(outcome.n) if outcome.cluster is None else np.asarray(outcome.cluster)
    at = fine_gray.at_estimate(L, X, res.coef)
    own = fine_gray.score_terms(L, X, res.coef, at=at)
    known, G = sandwich(res.cov, own, clusters)
    extra: dict[str, object] = {"loglik0": res.loglik0, "variance": "model"}
    cov = cov_known = res.cov
    if np.all(np.isfinite(known)):  # the sandwich, with the weights' estimation terms
        extra.update(variance=describe(G), model_cov=res.cov, clusters=G)
        cov = cov_known = known
        scores = own + weight_estimation_scores(X, outcome, cause, event_of_interest, res.coef,
                                                at=at)
        V, _ = sandwich(res.cov, scores, clusters)
        if np.all(np.isfinite(V)):
            cov = V
    extra.update(baseline=fine_gray.baseline(L, lp), expanded_rows=L.expanded_rows,
                 cov_weights_known=cov_known)
    if bootstrap > 0:
        extra.update(robust_cov=cov, bootstrap=bootstrap)
        cov, extra["bootstrap_failed"] = fine_gray_bootstrap_cov(
            X, outcome, cause, event_of_interest, names, bootstrap, seed, init=res.coef)
    return FitResult(family="survival", names=names, coef=res.coef, cov=cov,
                     loglik=res.loglik, n=outcome.n, events=events, n_params=len(names),
                     converged=True, iterations=res.iterations, warnings=(),
                     linear_predictor=lp, extra=extra)


def fine_gray_near(X: np.ndarray, sample: Outcome, start: np.ndarray
                   ) -> tuple[np.ndarray | None, pd.DataFrame | None]:
    """Coefficients and Breslow baseline (at covariates 0) of the Fine–Gray model of ``X`` on
    ``sample`` (its ``cause`` and ``event_of_interest``), as :func:`fit_fine_gray` gives them,
    without the sandwich: a replicate's refit started at the full-sample estimate ``start``,
    by quasi-Newton steps (:func:`unbin.models.fine_gray.fit_near`), or by Newton's method
    from ``start`` where those do not settle; (None, None) when it does not fit."""
    from ._glm import check_design

    assert sample.cause is not None
    X = np.asarray(X, dtype=float).reshape(sample.n, -1)
    names = tuple(f"x{j}" for j in range(X.shape[1]))
    cause = np.asarray(sample.cause)
    start = np.asarray(start, dtype=float)
    coef: np.ndarray | None = None
    L: fine_gray.Layout | None = None
    if np.any(cause == sample.event_of_interest) and not check_design(X, names):
        try:
            L = fine_gray_layout(sample, cause, sample.event_of_interest)
        except ValueError:  # the sample's arrays: _fit_coef below reports it
            L = None
        if L is not None:
            coef = fine_gray.fit_near(L, X, start)
    if coef is None or L is None:
        got = _fit_coef(X, sample, cause, sample.event_of_interest, names, init=start)
        if isinstance(got, FitResult):
            return None, None
        L, coef = got[0], got[1].coef
    if not np.all(np.isfinite(coef)):
        return None, None
    return coef, fine_gray.baseline(L, X @ coef)


def fine_gray_replicate(X: np.ndarray, rows: np.ndarray, sample: Outcome, outcome: Outcome,
                        start: np.ndarray) -> tuple[np.ndarray | None, pd.DataFrame | None]:
    """:func:`fine_gray_near` of a bootstrap replicate of ``outcome`` (the full sample, whose
    Fine–Gray layout its fit left in its cache) whose drawn rows are ``rows`` of the full
    design ``X`` and whose outcome is ``sample`` (those rows, with their case weights): the
    refit (:func:`unbin.models.fine_gray.fit_replicate`) takes the full sample's centring,
    scaling and information at ``start``, prepared once per design and start
    (:func:`unbin.models.fine_gray.near_start`, kept in ``outcome.cache``), instead of
    evaluating the replicate's own information, on the replicate's layout made from the full
    sample's sorted times (:func:`replicate_layout`); where it declines,
    :func:`fine_gray_near` on the replicate's rows decides (its own information, then
    Newton's method)."""
    from ._glm import check_design

    assert sample.cause is not None
    near = _near_start(X, outcome, np.asarray(start, dtype=float))
    X = np.asarray(X, dtype=float).reshape(outcome.n, -1)
    Xm = X[rows]
    cause = np.asarray(sample.cause)
    names = tuple(f"x{j}" for j in range(X.shape[1]))
    if near is None or not np.any(cause == sample.event_of_interest) \
            or check_design(Xm, names):
        return fine_gray_near(Xm, sample, start)
    try:
        L = replicate_layout(outcome, rows, sample)
    except ValueError:  # the replicate's arrays: fine_gray_near reports it
        return fine_gray_near(Xm, sample, start)
    coef = fine_gray.fit_replicate(near, X, rows, L)
    if coef is None:
        return fine_gray_near(Xm, sample, start)
    if not np.all(np.isfinite(coef)):
        return None, None
    return coef, fine_gray.baseline(L, Xm @ coef)


def _near_start(X: np.ndarray, outcome: Outcome, start: np.ndarray
                ) -> fine_gray.NearStart | None:
    """The full sample's :func:`unbin.models.fine_gray.near_start` of the design ``X`` at
    ``start`` on its cached Fine–Gray layout (None without one), kept in ``outcome.cache``
    per design (the same array object ``X``, by a weak reference; an array that is not held
    elsewhere is prepared anew) and start."""
    L = outcome.cache.get(_LAYOUT)
    if L is None:
        return None
    known: dict[int, tuple[weakref.ref[Any], np.ndarray, fine_gray.NearStart | None]] = \
        outcome.cache.setdefault(_NEAR, {})
    seen = known.get(id(X))
    if seen is not None and seen[0]() is X and np.array_equal(seen[1], start):
        return seen[2]
    near = fine_gray.near_start(L, np.asarray(X, dtype=float).reshape(outcome.n, -1), start)
    try:  # a weak reference: the cache must not keep the table's designs alive
        known[id(X)] = (weakref.ref(X), start.copy(), near)
    except TypeError:
        pass
    return near


def fine_gray_bootstrap_cov(X: np.ndarray, outcome: Outcome, cause: np.ndarray,
                            event_of_interest: int, names: tuple[str, ...], replicates: int,
                            seed: int | np.random.Generator = 0,
                            init: np.ndarray | None = None) -> tuple[np.ndarray, int]:
    """The covariance of the Fine–Gray coefficients over ``replicates`` nonparametric bootstrap
    resamples of the persons (of the clusters when the outcome has them, Efron & Tibshirani
    1993, ch. 6), the censoring and entry distributions re-estimated in each (module
    docstring), and how many refits failed (left out; all NaN when fewer than two fitted).
    ``seed`` is an integer or a numpy Generator (drawn from as given); ``init``: starting
    values of every refit (the full-sample estimate; the maximum is the same)."""
    X = np.asarray(X, dtype=float).reshape(outcome.n, -1)
    names = tuple(names)
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
            np.arange(pick.size), [members[u].size for u in pick]), cache={})
        got = _fit_coef(X[rows], o, c[rows], event_of_interest, names, init=init)
        if not isinstance(got, FitResult) and np.all(np.isfinite(got[1].coef)):
            draws.append(got[1].coef)
        else:
            failed += 1
    if len(draws) < 2:
        return np.full((X.shape[1], X.shape[1]), np.nan), failed
    return np.atleast_2d(np.cov(np.asarray(draws), rowvar=False)), failed


def weight_estimation_scores(X: np.ndarray, outcome: Outcome, cause: np.ndarray,
                             event_of_interest: int, coef: np.ndarray,
                             ties: str = "efron", at: fine_gray.AtEstimate | None = None
                             ) -> np.ndarray:
    """Each person's influence, through the estimated censoring and entry distributions, on
    the Fine–Gray score at ``coef`` (n x p): the derivative of the score with respect to the
    person's weight in ``G`` and ``H`` alone (an infinitesimal jackknife; Fine & Gray 1999,
    sec. 3, for ``G``).

    A competing-event person j's expanded row at event time t_k carries ``G(t_k-) H(t_k) /
    (G(T_j-) H(T_j))``; its log changes by ``-dLc(u) / (1 - dLc(u))`` for each censoring-hazard
    step ``dLc(u)`` at T_j <= u < t_k and by ``dLe(s) / (1 - dLe(s))`` for each reversed-time
    entry hazard step ``dLe(s) = d(s) / R(s)`` at T_j <= s < t_k. The score moves with that
    row's weight by ``-a_jk``, ``a_jk = (x_j - xbar(t_k)) w_jk r_j dN1(t_k) / S0(t_k)`` in the
    Breslow form (``ties="breslow"``, or no tied events). In Efron's form (``ties="efron"``,
    the fit's default) the d tied events at t_k each carry the mean weight ``wavg`` of the
    tied events and the denominators ``S0 - f T0``, f = 0, 1/d, ..., (d-1)/d (T0, T1: the
    tied events' sums of ``w r`` and ``w r x``), so ``a_jk = w_jk r_j sum_f wavg (x_j -
    xbar_f) / (S0 - f T0)`` with ``xbar_f = (S1 - f T1) / (S0 - f T0)`` (the added rows are
    never events, so they are in no tied set). With ``q(u)`` the sums of ``a_jk`` over the
    rows spanning u (:func:`unbin.models.fine_gray.spanned_sums`, without the rows), a person
    l's term is ``sum_u q(u) / (1 - dLc(u)) w_l (dNc_l(u) - Yc_l(u) dLc(u)) / Yc(u)`` for
    censoring minus the same sum over the entry steps with ``1(entry_l = s) - 1(entry_l <= s <
    time_l) dLe(s)`` and ``R(s)``."""
    assert outcome.time is not None
    time = np.asarray(outcome.time, dtype=float)
    n = time.size
    X = np.asarray(X, dtype=float).reshape(n, -1)
    p = X.shape[1]
    w = np.ones(n) if outcome.weights is None else np.asarray(outcome.weights, dtype=float)
    c = np.asarray(cause)
    out = np.zeros((n, p))
    L = fine_gray_layout(outcome, c, event_of_interest)
    if p == 0 or L.comp.size == 0:
        return out
    if at is None:
        at = fine_gray.at_estimate(L, X, coef, ties)
    cens = c == 0
    g = _sample_grids(outcome, c, event_of_interest)
    ct = g.cens
    grids = ([ct] if ct.size else []) + ([g.entries] if g.entries is not None else [])
    qs = fine_gray.spanned_sums_on(L, at, time, grids)
    if ct.size:
        lo = np.zeros(n, dtype=int) if g.c_entry is None else g.c_entry
        hi = g.c_time
        Y = _at_risk(lo, hi, w, ct.size)
        jumps = np.bincount(hi[cens] - 1, w[cens], ct.size)
        qY, dL = _spanned(qs[0], Y, jumps)
        own = np.zeros((n, p))
        own[cens] = qY[hi[cens] - 1]
        out += w[:, None] * (own - _range_sums(qY * dL[:, None], lo, hi))
    if g.entries is not None:
        assert g.e_entry is not None and g.e_time is not None
        lo, hi = g.e_entry, g.e_time
        R = _at_risk(lo, hi, w, g.entries.size)
        qR, dA = _spanned(qs[-1], R, np.bincount(lo, w, g.entries.size))
        out -= w[:, None] * (qR[lo] - _range_sums(qR * dA[:, None], lo, hi))
    return out


def _at_risk(lo: np.ndarray, hi: np.ndarray, w: np.ndarray, K: int) -> np.ndarray:
    """Weighted counts at risk at grid points lo <= k < hi."""
    return np.cumsum(np.bincount(lo, w, K + 1) - np.bincount(hi, w, K + 1))[:K]


def _range_sums(v: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Per row, the sum of ``v``'s grid rows lo <= k < hi."""
    cum = np.vstack([np.zeros(v.shape[1]), np.cumsum(v, axis=0)])
    return np.asarray(cum[hi] - cum[lo])


def _spanned(q: np.ndarray, at_risk: np.ndarray, jumps: np.ndarray
             ) -> tuple[np.ndarray, np.ndarray]:
    """``q(u) / ((1 - dL(u)) Y(u))`` on the grid and the hazard steps ``dL = jumps / Y``; 0
    where nobody is at risk or a step is 1."""
    safe = at_risk > 0
    dL = np.where(safe, jumps / np.where(safe, at_risk, 1.0), 0.0)
    ok = safe & (dL < 1.0)
    scale = np.where(ok, 1.0 / (np.where(safe, at_risk, 1.0) * np.where(ok, 1.0 - dL, 1.0)), 0.0)
    return q * scale[:, None], dL
