"""The C index with weights (unbin.models.cox.weighted_concordance,
unbin.models.discrimination.weighted_auc and c_index under ``Outcome.weights``): every pair of
rows counted w_i w_j.

References: lifelines.utils.concordance_index (Harrell's C, ties one half) and
scipy.stats.mannwhitneyu (the AUC as U / (n1 n0)) on the rows repeated by their frequency
weights; brute-force pair counts written here for strata, delayed entry and matched sets; a
seeded simulation for sampling weights, whose truth is the C index of the simulated population
itself (the weighted estimate of a population's concordance: each sampled pair stands for
w_i w_j pairs of the population; common practice for survey-weighted C statistics).
"""

from __future__ import annotations

import numpy as np
import pytest
from lifelines.utils import concordance_index
from scipy import special, stats

from unbin.models.base import Outcome
from unbin.models.cox import concordance, weighted_concordance
from unbin.models.discrimination import auc, c_index, weighted_auc


def _brute_c(t: np.ndarray, s: np.ndarray, e: np.ndarray, entry: np.ndarray | None,
             strata: np.ndarray | None) -> float:
    """Harrell's C over every pair, written out: i an event, j in i's stratum, at risk at t_i
    (entry_j < t_i) and outliving i (t_j > t_i, or t_j = t_i censored); ties in score 1/2."""
    num = den = 0.0
    for i in np.flatnonzero(e):
        for j in range(t.size):
            if j == i or (strata is not None and strata[j] != strata[i]):
                continue
            if entry is not None and entry[j] >= t[i]:
                continue
            if t[j] > t[i] or (t[j] == t[i] and not e[j]):
                den += 1
                num += 1.0 if s[i] > s[j] else 0.5 if s[i] == s[j] else 0.0
    return num / den if den else float("nan")


def _sample(rng: np.random.Generator, n: int) -> tuple[np.ndarray, ...]:
    t = rng.integers(1, 8, n).astype(float)  # heavy ties in time
    e = rng.random(n) < 0.6
    s = rng.integers(0, 5, n).astype(float)  # heavy ties in score
    w = rng.integers(1, 5, n)
    return t, e, s, w


def test_weighted_harrell_c_is_lifelines_on_expanded_rows() -> None:
    # source: lifelines.utils.concordance_index(time, -score, event) on np.repeat(rows, w)
    rng = np.random.default_rng(11)
    for _ in range(60):
        t, e, s, w = _sample(rng, int(rng.integers(2, 30)))
        rep = np.repeat(np.arange(t.size), w)
        got = weighted_concordance(t, s, e, w)
        if np.isnan(concordance(t[rep], s[rep], e[rep])):  # no comparable pair
            assert np.isnan(got)
            continue
        ref = concordance_index(t[rep], -s[rep], e[rep])
        assert got == pytest.approx(ref, abs=1e-12)
        # and exactly the unweighted engine's value on the repeated rows
        assert got == concordance(t[rep], s[rep], e[rep])


def test_weighted_harrell_c_with_strata_and_entry_is_the_pair_count() -> None:
    # source: brute-force pair count (above) on the repeated rows
    rng = np.random.default_rng(12)
    for k in range(60):
        t, e, s, w = _sample(rng, int(rng.integers(2, 25)))
        entry = t - rng.integers(1, 5, t.size) * 0.9 if k % 2 else None
        strata = rng.integers(0, 3, t.size) if k % 3 else None
        rep = np.repeat(np.arange(t.size), w)
        got = weighted_concordance(t, s, e, w, entry=entry, strata=strata)
        ref = _brute_c(t[rep], s[rep], e[rep], None if entry is None else entry[rep],
                       None if strata is None else strata[rep])
        assert (np.isnan(got) and np.isnan(ref)) or got == pytest.approx(ref, abs=1e-12)


def test_unit_weights_give_the_unweighted_c() -> None:
    # source: the unweighted engine, itself checked against lifelines in test_cox.py
    rng = np.random.default_rng(13)
    t, e, s, _ = _sample(rng, 500)
    entry = t - rng.integers(1, 5, t.size) * 0.9
    strata = rng.integers(0, 3, t.size)
    one = np.ones(t.size)
    assert weighted_concordance(t, s, e, one, entry=entry, strata=strata) == concordance(
        t, s, e, entry=entry, strata=strata)
    y = rng.random(300) < 0.3
    assert weighted_auc(y, s[:300], one[:300]) == pytest.approx(auc(y, s[:300]), abs=1e-14)


def test_weighted_auc_is_mann_whitney_on_expanded_rows() -> None:
    # source: scipy.stats.mannwhitneyu(cases, controls).statistic / (n1 n0), ties one half
    rng = np.random.default_rng(14)
    for _ in range(40):
        n = int(rng.integers(4, 40))
        y = rng.random(n) < 0.4
        y[:2] = [True, False]
        s = rng.integers(0, 6, n).astype(float)
        w = rng.integers(1, 5, n)
        rep = np.repeat(np.arange(n), w)
        yr, sr = y[rep], s[rep]
        u = stats.mannwhitneyu(sr[yr], sr[~yr]).statistic
        assert weighted_auc(y, s, w) == pytest.approx(u / (yr.sum() * (~yr).sum()), abs=1e-12)


def test_weighted_matched_auc_counts_pairs_within_sets() -> None:
    # source: brute-force (case, control) pairs of the same set on the repeated rows
    rng = np.random.default_rng(15)
    n = 60
    y = rng.random(n) < 0.3
    s = rng.integers(0, 4, n).astype(float)
    sets = rng.integers(0, 8, n)
    w = rng.integers(1, 4, n)
    rep = np.repeat(np.arange(n), w)
    yr, sr, gr = y[rep], s[rep], sets[rep]
    case, ctrl = np.flatnonzero(yr), np.flatnonzero(~yr)
    same = gr[case][:, None] == gr[ctrl][None, :]
    score = (sr[case][:, None] > sr[ctrl][None, :]) + 0.5 * (sr[case][:, None] == sr[ctrl][None, :])
    assert weighted_auc(y, s, w, sets) == pytest.approx(score[same].sum() / same.sum(), abs=1e-12)


def test_c_index_of_a_weighted_outcome_is_the_expanded_rows() -> None:
    # source: lifelines.utils.concordance_index / scipy.stats.mannwhitneyu on the repeated rows
    rng = np.random.default_rng(16)
    t, e, s, w = _sample(rng, 200)
    rep = np.repeat(np.arange(t.size), w)
    surv = Outcome("survival", e.astype(float), time=t, weights=w.astype(float))
    assert c_index(surv, s) == pytest.approx(concordance_index(t[rep], -s[rep], e[rep]),
                                             abs=1e-12)
    binary = Outcome("binary", e.astype(float), weights=w.astype(float))
    yr, sr = e[rep], s[rep]
    u = stats.mannwhitneyu(sr[yr], sr[~yr]).statistic
    assert c_index(binary, s) == pytest.approx(u / (yr.sum() * (~yr).sum()), abs=1e-12)


def test_weights_must_be_positive() -> None:
    t, e, s = np.array([1.0, 2, 3]), np.array([True, False, True]), np.array([0.1, 0.2, 0.3])
    with pytest.raises(ValueError, match="weights must be positive"):
        weighted_concordance(t, s, e, np.array([1.0, 0.0, 2.0]))


def test_sampling_weights_estimate_the_population_c() -> None:
    """A population of 20,000 with a known C (computed on all of it); samples drawn with
    inclusion probabilities that depend on the score and the outcome (controls with a low
    score are under-sampled). Over 200 samples the inverse-probability-weighted C's mean is
    within 4 Monte-Carlo SEs of the population's, and the unweighted one's is not
    (seeded simulation; the truth is the population itself)."""
    rng = np.random.default_rng(17)
    N = 20_000
    x = rng.normal(size=N)
    y = rng.random(N) < special.expit(-1.5 + 1.0 * x)
    T = rng.exponential(1 / np.exp(0.7 * x))
    C = rng.exponential(2.0, N)
    time, event = np.minimum(T, C), T <= C
    true_auc, true_c = auc(y, x), concordance(time, x, event)
    p_bin = np.where(y, 0.3, 0.02 + 0.2 * special.expit(2 * x))
    p_surv = 0.02 + 0.2 * special.expit(2 * x)
    rows = []
    for _ in range(200):
        sb = rng.random(N) < p_bin
        ss = rng.random(N) < p_surv
        rows.append((weighted_auc(y[sb], x[sb], 1 / p_bin[sb]), auc(y[sb], x[sb]),
                     weighted_concordance(time[ss], x[ss], event[ss], 1 / p_surv[ss]),
                     concordance(time[ss], x[ss], event[ss])))
    r = np.array(rows)
    mean, se = r.mean(axis=0), r.std(axis=0, ddof=1) / np.sqrt(len(r))
    assert abs(mean[0] - true_auc) < 4 * se[0]
    assert abs(mean[1] - true_auc) > 4 * se[1]
    assert abs(mean[2] - true_c) < 4 * se[2]
    assert abs(mean[3] - true_c) > 4 * se[3]


def test_pair_sums_renumber_groups_when_the_combined_key_would_overflow() -> None:
    # source: brute-force sum over all (query, target) pairs written here; group numbers near
    # 2^40 with keys up to 2^23 make group x key overflow int64, so the groups are renumbered
    from unbin.models.cox.concordance import _sum_above

    rng = np.random.default_rng(18)
    qg, tg = rng.integers(0, 3, 40) * 2**40, rng.integers(0, 3, 50) * 2**40
    qk, tk = rng.integers(0, 2**23, 40), rng.integers(0, 2**23, 50)
    tk[:10] = qk[:10]  # equal keys do not count
    qw, tw = rng.integers(1, 4, 40).astype(float), rng.integers(1, 4, 50).astype(float)
    ref = sum(qw[i] * tw[j] for i in range(40) for j in range(50)
              if qg[i] == tg[j] and tk[j] > qk[i])
    assert _sum_above(qg, qk, qw, tg, tk, tw, 2**41 + 1) == ref
