"""Discrimination of a fitted linear predictor: the C-index (AUC for binary outcomes, Harrell's C
for survival outcomes). Not defined here for count and continuous outcomes (NaN).

Several tables ask for the C-index of the same fits, so ``c_index`` computes it once per linear
predictor: the value is kept in ``outcome.cache``, keyed by the identity of the array and holding
a reference to it (so that the identity cannot pass to another array while the entry exists);
linear predictors are never changed in place. A caller that drops predictors releases their
entries with ``forget_c_indices``. For survival, Harrell's C compares only pairs
within a stratum in which the longer-lived row was at risk at the earlier event time (entry
before it); the time order and the tie and delayed-entry bookkeeping depend on (time, event,
entry, strata) only and are kept there too (``unbin.models.cox.concordance_order``), with references
to the arrays they were made from, so that they serve only the same arrays.

With weights (``outcome.weights``, either kind) every pair (i, j) counts w_i w_j. Frequency
weights then give exactly the C-index of the rows repeated by their weights (a row stands for
w_i persons: its w_i copies tie with each other in time or outcome and form no pair); sampling
weights give the usual estimate of the population's C-index, each sampled pair standing for
w_i w_j pairs of the population."""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np

from .base import Outcome
from .compiled import wanted
from .radix import stable_order


def auc(y: np.ndarray, score: np.ndarray) -> float:
    """Area under the ROC curve: the Mann–Whitney count of (event, non-event) pairs in which
    the event scores higher, ties one half, over n1 n0 (NaN without events or non-events, or
    with a NaN score). Counted by :func:`count_aucs` (the scores ordered once by a radix
    sort, whole-number counts): the value of the rank formula (the events' midranks summed,
    less n1 (n1 + 1) / 2) bit for bit, as both numerators are the same whole or half number,
    exact in float64, divided by the same n1 n0."""
    y = np.asarray(y, dtype=bool)
    n1, n0 = int(y.sum()), int((~y).sum())
    if n1 == 0 or n0 == 0:
        return float("nan")
    got = count_aucs(y, score, [None])
    return float("nan") if got is None else got[0]


def count_aucs(y: np.ndarray, score: np.ndarray,
               counts: list[np.ndarray | None]) -> list[float] | None:
    """The AUC of each data set in which row i is repeated ``counts[i]`` times (None: once
    each; a bootstrap replicate's drawn rows as draw counts): over (event, non-event) pairs of
    copies, the share in which the event scores higher, ties one half. All scores are sorted
    once (:func:`ascending_order`); the runs of equal scores in that order are the groups of
    tied rows. Per data set, the copies of each group's events and non-events are sums of
    counts over its run, and the non-event copies below a group a running sum over the runs
    before it (whole numbers in int64, exact); the numerator, twice the lower pairs plus the
    tied ones, is divided as :func:`auc`'s Mann–Whitney count is, so each value is bit for
    bit that of the repeated rows. ``counts`` are whole numbers. None when a score is
    NaN."""
    e = np.asarray(y, dtype=bool)
    s = np.asarray(score, dtype=float)
    if np.isnan(s).any():
        return None
    if s.size == 0:
        return [float("nan")] * len(counts)
    order = ascending_order(s)  # ties in any order: the runs below group them
    if wanted(s.size, AUC_FROM_ROWS):
        return _compiled_aucs(e, s, order, counts)
    ranked = s[order]
    first = np.flatnonzero(np.r_[True, ranked[1:] != ranked[:-1]])  # each run's first place
    size = np.diff(np.r_[first, s.size])  # rows per group of tied scores
    event = e[order]
    out: list[float] = []
    for c in counts:
        if c is None:  # each row once
            tot_g = size
            ev_g = np.add.reduceat(event, first, dtype=np.int64)
        else:
            c_s = np.asarray(c)[order]
            if c_s.dtype.kind not in "iub":
                if not np.array_equal(c_s, np.rint(c_s)):
                    raise ValueError("count_aucs: counts must be whole numbers")
                c_s = c_s.astype(np.int64)
            tot_g = np.add.reduceat(c_s, first, dtype=np.int64)  # copies per group
            ev_g = np.add.reduceat(c_s * event, first, dtype=np.int64)  # event copies
        ot_g = tot_g - ev_g  # non-event copies tied with the group's events
        n1, n0 = int(ev_g.sum()), int(ot_g.sum())
        if n1 == 0 or n0 == 0:
            out.append(float("nan"))
            continue
        below = np.cumsum(ot_g) - ot_g  # non-event copies with a lower score
        twice = int(ev_g @ (2 * below + ot_g))  # whole numbers in int64: exact
        out.append(float(twice / 2 / (n1 * n0)))
    return out


def drawn_aucs(y: np.ndarray, lp: np.ndarray,
               counts: np.ndarray) -> tuple[float, float] | None:
    """The AUC of the linear predictor ``lp`` compared as :func:`c_index` compares it
    (:func:`compared_score`) in the data set in which row i is repeated ``counts[i]`` times (a
    bootstrap replicate's drawn rows as draw counts, whole numbers) and in the rows as they
    are: ``count_aucs(y, compared_score(lp), [counts, None])``, the same numbers. From
    ``DRAWN_AUC_FROM_ROWS`` rows one compiled call rounds, orders and counts
    (``unbin.models.compiled.score_auc``: no rounded copy, no order array, no gathers), unless
    it declines (a predictor beyond 1e4 in size, a count beyond 2^15). None when a predictor
    is NaN."""
    c = np.asarray(counts)
    x = np.asarray(lp, dtype=float)
    if wanted(x.size, DRAWN_AUC_FROM_ROWS) and c.dtype.kind in "iu":
        from .compiled.score_auc import drawn_full_pairs

        e = np.asarray(y)
        e = e if e.dtype == np.bool_ else e.astype(bool)
        status, pairs = drawn_full_pairs(np.ascontiguousarray(x), e,
                                         c.astype(np.int64, copy=False))
        if status == 1:
            return None
        if status == 0:
            n1d, n0d, twd = (int(v) for v in pairs[0])
            n1f, n0f, twf = (int(v) for v in pairs[1])
            return (float("nan") if n1d == 0 or n0d == 0 else float(twd / 2 / (n1d * n0d)),
                    float("nan") if n1f == 0 or n0f == 0 else float(twf / 2 / (n1f * n0f)))
    got = count_aucs(y, compared_score(x), [c, None])
    return None if got is None else (got[0], got[1])


# From this many rows :func:`drawn_aucs` is one compiled call (DEVELOPERS.md, "Compiled
# kernels").
DRAWN_AUC_FROM_ROWS = 50_000


# From this many rows the counts of :func:`count_aucs` are one compiled pass
# (``unbin.models.compiled.auc``) instead of the numpy reductions (DEVELOPERS.md, "Compiled
# kernels").
AUC_FROM_ROWS = 50_000


def _compiled_aucs(e: np.ndarray, s: np.ndarray, order: np.ndarray,
                   counts: list[np.ndarray | None]) -> list[float]:
    """:func:`count_aucs` by the compiled pass over the rows in score order ``order``: the
    same integer counts, divided as there."""
    from .compiled.auc import auc_pairs

    weights = np.ones((s.size, len(counts)), dtype=np.int64)  # in score order
    for k, c in enumerate(counts):
        if c is None:
            continue
        c_s = np.asarray(c)[order]
        if c_s.dtype.kind not in "iub":
            if not np.array_equal(c_s, np.rint(c_s)):
                raise ValueError("count_aucs: counts must be whole numbers")
        weights[:, k] = c_s
    n1s, n0s, twices = auc_pairs(s[order], e[order], weights)
    out: list[float] = []
    for n1, n0, twice in zip(n1s.tolist(), n0s.tolist(), twices.tolist(), strict=True):
        out.append(float("nan") if n1 == 0 or n0 == 0 else float(twice / 2 / (n1 * n0)))
    return out


# From this many scores the buckets' stable order is one compiled radix sort
# (``unbin.models.compiled.score_order``, three 11-bit digits) instead of numpy's two stable
# 16-bit passes (DEVELOPERS.md, "Compiled kernels").
ORDER_FROM_ROWS = 50_000
_RADIX_ROWS = 4096  # from this many scores the order is found by two 16-bit radix passes
_TOP = 4294967295.0  # 2^32 - 1
_FEW_DOWN = 256  # up to this many out-of-order neighbours their buckets are found one by one


def ascending_order(s: np.ndarray) -> np.ndarray:
    """A permutation that sorts the finite scores ``s`` ascending (equal scores in any
    order), as ``np.argsort`` would sort them. From ``_RADIX_ROWS`` scores: each score's
    32-bit bucket on the range (``floor((s - min) * (2^32 - 1) / (max - min))``, non-decreasing
    in the score, as floating-point subtraction, multiplication by a positive number and floor
    are) is sorted by stable 16-bit passes (``radix.stable_order``: numpy's radix sort, linear
    in the rows, cheaper than a comparison sort of the doubles; from ``ORDER_FROM_ROWS`` scores
    the same stable order by a compiled radix sort); the buckets shared by scores out of order
    are then sorted by score (few rows)."""
    n = s.size
    if n < _RADIX_ROWS:
        return np.argsort(s)
    lo, hi = float(s.min()), float(s.max())
    scale = _TOP / (hi - lo) if np.isfinite(hi - lo) and hi > lo else float("nan")
    if not np.isfinite(scale):
        return np.argsort(s)
    key = np.minimum(np.floor((s - lo) * scale), _TOP).astype(np.uint32)
    if wanted(n, ORDER_FROM_ROWS):  # the same stable order, by a compiled radix sort
        from .compiled.score_order import stable_order32

        order = stable_order32(key)
    else:
        order = stable_order(key)
    ranked = s[order]
    down = np.flatnonzero(ranked[1:] < ranked[:-1])  # only within a shared bucket
    if down.size == 0:
        return order
    ks = key[order]  # the buckets in the order: ascending
    if down.size <= _FEW_DOWN:  # each such bucket's places by a binary search
        shared = np.unique(ks[down])
        start = np.searchsorted(ks, shared, side="left")
        stop = np.searchsorted(ks, shared, side="right")
        pos = np.concatenate([np.arange(a, b) for a, b in zip(start, stop, strict=True)])
        run = np.repeat(np.arange(shared.size), stop - start)
    else:
        runs = np.cumsum(np.r_[True, ks[1:] != ks[:-1]])  # bucket runs in the order
        fix = np.zeros(int(runs[-1]) + 1, dtype=bool)
        fix[runs[1:][down]] = True
        pos = np.flatnonzero(fix[runs])
        run = runs[pos]
    sub = order[pos]
    order[pos] = sub[np.lexsort((s[sub], run))]
    return order


def weighted_auc(y: np.ndarray, score: np.ndarray, weights: np.ndarray,
                 sets: np.ndarray | None = None) -> float:
    """The AUC with every (case, control) pair counted w_case w_control (ties one half); with
    ``sets``, only pairs within a matched set (as :func:`matched_auc`)."""
    import pandas as pd

    from .cox.concordance import _dense, weighted_pair_sums

    y = np.asarray(y, dtype=bool)
    w = np.asarray(weights, dtype=float)
    rank = _dense(np.asarray(score, dtype=float))
    group = (np.zeros(y.size, dtype=np.int64) if sets is None
             else pd.factorize(np.asarray(sets))[0].astype(np.int64))
    zero, one = np.zeros(y.size, dtype=np.int64), np.ones(y.size, dtype=np.int64)
    total, equal, lower = weighted_pair_sums(group[y], zero[y], rank[y], w[y],
                                             group[~y], one[~y], rank[~y], w[~y])
    if not total > 0:
        return float("nan")
    return (lower + 0.5 * equal) / total


def matched_auc(y: np.ndarray, score: np.ndarray, sets: np.ndarray) -> float:
    """The AUC within matched sets: over every (case, control) pair of the same set, the share
    in which the case has the higher score (ties one half); pairs across sets, which the
    conditional model does not order, are not counted. Per set, the Mann-Whitney count from
    the ranks within the set."""
    import pandas as pd

    y = np.asarray(y, dtype=float)
    sets = np.asarray(sets)
    ranks = pd.Series(np.asarray(score, dtype=float)).groupby(sets).rank().to_numpy()
    n1 = np.bincount(pd.factorize(sets)[0], weights=y)
    n = np.bincount(pd.factorize(sets)[0])
    pairs = float(np.sum(n1 * (n - n1)))
    if pairs == 0:
        return float("nan")
    return float((ranks @ y - np.sum(n1 * (n1 + 1) / 2)) / pairs)


_MEMO = "c_index"
_TIME_ORDER = "concordance_order"
# Linear predictors are compared to this many decimals: two rows whose predictors differ by less
# are tied. Differences that small are floating-point rounding (the same model reached by another
# order of operations moves a predictor by ~1e-15), and an exact comparison would let them turn
# a tie into an ordered pair, so that the C-index of one fit depended on how it was computed.
SCORE_DECIMALS = 10


def compared_score(lp: np.ndarray) -> np.ndarray:
    """The score as the C-index compares it: ``lp`` rounded to ``SCORE_DECIMALS`` decimals
    (``np.round``, halves to even). Element by element, so the rounded scores of a subset of
    rows are that subset of the rounded scores; every C index of a linear predictor (the fits'
    and the bootstrap replicates') is computed from these."""
    return np.round(np.asarray(lp, dtype=float), SCORE_DECIMALS)


def remembered_scores(outcome: Outcome) -> list[np.ndarray]:
    """The linear predictors whose C-index :func:`c_index` keeps for ``outcome`` (each entry
    holds a reference to its predictor, so these stay in memory while it is kept)."""
    memo: dict[int, tuple[np.ndarray, float]] = outcome.cache.get(_MEMO, {})
    return [lp for lp, _ in memo.values()]


def forget_c_indices(outcome: Outcome, keep: Iterable[np.ndarray | None] = ()) -> None:
    """Forget the C-index :func:`c_index` keeps for each of ``outcome``'s linear predictors
    except those in ``keep`` (by identity), and so the reference to the predictor that came
    with it: a caller that drops a predictor calls this so that the memo does not hold it.
    A forgotten predictor's C-index is computed again if asked for."""
    memo: dict[int, tuple[np.ndarray, float]] | None = outcome.cache.get(_MEMO)
    if not memo:
        return
    held = {id(lp) for lp in keep if lp is not None}
    for key in [k for k in memo if k not in held]:
        del memo[key]


def c_index(outcome: Outcome, lp: np.ndarray | None) -> float:
    """AUC (binary) or Harrell's C (survival; within strata, pairs at risk together) of the
    linear predictor ``lp`` of a fit to ``outcome``'s rows, compared to ``SCORE_DECIMALS``
    decimals (:func:`compared_score`), pairs weighted w_i w_j under ``outcome.weights``; NaN
    for other families or without ``lp``. Computed once per ``lp`` (kept until
    :func:`forget_c_indices`)."""
    if lp is None or outcome.family not in ("binary", "survival"):
        return float("nan")
    memo: dict[int, tuple[np.ndarray, float]] = outcome.cache.setdefault(_MEMO, {})
    hit = memo.get(id(lp))
    if hit is not None and hit[0] is lp:
        return hit[1]
    score = compared_score(lp)
    w = outcome.weights
    if w is not None and outcome.family == "binary":
        value = weighted_auc(outcome.y, score, w, outcome.strata)
    elif w is not None:
        from .cox import weighted_concordance

        value = weighted_concordance(outcome.time, score, outcome.y, w, entry=outcome.entry,
                                     strata=outcome.strata)
    elif outcome.family == "binary" and outcome.strata is not None:
        value = matched_auc(outcome.y, score, outcome.strata)
    elif outcome.family == "binary":
        value = auc(outcome.y, score)
    else:
        from .cox import concordance, concordance_order

        assert outcome.time is not None
        source = (outcome.time, outcome.y, outcome.entry, outcome.strata)
        kept = outcome.cache.get(_TIME_ORDER)
        if kept is None or any(a is not b for a, b in zip(kept[0], source, strict=True)):
            order = concordance_order(outcome.time, outcome.y, outcome.entry, outcome.strata)
            kept = outcome.cache[_TIME_ORDER] = (source, order)
        value = float(concordance(outcome.time, score, outcome.y, time_order=kept[1]))
    memo[id(lp)] = (lp, value)
    return value
