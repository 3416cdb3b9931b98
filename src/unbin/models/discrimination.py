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

from ..distributions import stats
from .base import Outcome


def auc(y: np.ndarray, score: np.ndarray) -> float:
    """Area under the ROC curve by the Mann–Whitney rank formula (ties count one half)."""
    y = np.asarray(y, dtype=bool)
    n1, n0 = int(y.sum()), int((~y).sum())
    if n1 == 0 or n0 == 0:
        return float("nan")
    ranks = stats.rankdata(score)
    return float((ranks[y].sum() - n1 * (n1 + 1) / 2) / (n1 * n0))


def count_aucs(y: np.ndarray, score: np.ndarray,
               counts: list[np.ndarray | None]) -> list[float] | None:
    """The AUC of each data set in which row i is repeated ``counts[i]`` times (None: once
    each; a bootstrap replicate's drawn rows as draw counts): over (event, non-event) pairs of
    copies, the share in which the event scores higher, ties one half. The events' distinct
    scores are sorted once (the smaller group) and every non-event is placed among them by one
    binary search; per distinct event score, the non-event copies below it and tied with it
    are then sums of counts (whole numbers, exact in float64), and the numerator, twice the
    lower pairs plus the tied ones, is divided as :func:`auc`'s Mann–Whitney count is, so each
    value is bit for bit that of the repeated rows. None when a score is NaN."""
    e = np.asarray(y, dtype=bool)
    s = np.asarray(score, dtype=float)
    if np.isnan(s).any():
        return None
    events, others = s[e], s[~e]
    u, group = np.unique(events, return_inverse=True)  # the events' distinct scores, sorted
    G = u.size
    place = np.searchsorted(u, others, side="right")  # distinct event scores <= the non-event
    tied = np.flatnonzero(place > 0)
    tied = tied[u[place[tied] - 1] == others[tied]]
    out: list[float] = []
    for c in counts:
        c_ev = np.ones(events.size) if c is None else np.asarray(c, dtype=float)[e]
        c_ot = np.ones(others.size) if c is None else np.asarray(c, dtype=float)[~e]
        n1, n0 = int(c_ev.sum()), int(c_ot.sum())
        if n1 == 0 or n0 == 0:
            out.append(float("nan"))
            continue
        per_event = np.bincount(group.ravel(), weights=c_ev, minlength=G)
        # non-event copies below each distinct event score: those placed before it
        below = np.cumsum(np.bincount(place, weights=c_ot, minlength=G + 1))[:G]
        equal = np.bincount(place[tied] - 1, weights=c_ot[tied], minlength=G)
        twice = int(per_event @ (2.0 * below + equal))  # whole numbers below 2^53
        out.append(float(twice / 2 / (n1 * n0)))
    return out


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
