"""Harrell's C of one score on several multisets of one sample's rows
(unbin.models.cox.concordance.concordances: a bootstrap replicate's drawn rows as repeat
counts on the full sample's time order).

References: a brute-force pair count written in the tests (helpers.brute_pair_c) (every pair (i, j) counted c_i c_j: i an
event, j in i's stratum, at risk at t_i and outliving it), and lifelines.utils.concordance_index
on the rows repeated as counted (no delayed entry, one stratum)."""

from __future__ import annotations

import numpy as np
import pytest
from lifelines.utils import concordance_index

from helpers import brute_pair_c, tied_survival_design
from unbin.models.cox import concordance_order
from unbin.models.cox.concordance import concordances, scores_concordances


def _design(rng: np.random.Generator, n: int) -> tuple[np.ndarray, ...]:
    return tied_survival_design(rng, n, int(rng.integers(1, 12)), int(rng.integers(1, 8)),
                                int(rng.integers(1, 4)))


def _check(got: float, ref: float) -> None:
    """Equal to the reference pair count; NaN where it has no comparable pair."""
    if np.isnan(ref):
        assert np.isnan(got)
    else:
        assert got == pytest.approx(ref, abs=1e-13)


def test_counts_match_a_brute_force_pair_count() -> None:
    # source: brute-force weighted pair count (helpers.brute_pair_c); ties in time, score and
    # between event and entry times; with and without delayed entry and strata
    rng = np.random.default_rng(20261204)
    for it in range(300):
        n = int(rng.integers(2, 70))
        t, s, e, entry, strata = _design(rng, n)
        use_entry = entry if it % 3 else None
        use_strata = strata if it % 2 else None
        counts = rng.poisson(1.0, size=(2, n))
        order = concordance_order(t, e, use_entry, use_strata)
        got = concordances(order, s, [counts[0], None, counts[1]])
        refs = [brute_pair_c(t, s, e, c, use_entry, use_strata)
                for c in (counts[0], np.ones(n, dtype=int), counts[1])]
        for g, ref in zip(got, refs, strict=True):
            _check(g, ref)


def test_counts_on_a_large_sample_match_a_brute_force_pair_count() -> None:
    # source: brute-force weighted pair count on 3000 rows (every level of the bit recursion
    # in use), bootstrap-like counts (multinomial, about a third of the rows not drawn)
    rng = np.random.default_rng(7)
    n = 3000
    t, s, e, entry, strata = _design(rng, n)
    s = s + rng.normal(size=n).round(1)
    order = concordance_order(t, e, entry, strata)
    counts = rng.multinomial(n, np.full(n, 1 / n))
    got_drawn, got_full = concordances(order, s, [counts, None])
    assert got_drawn == pytest.approx(brute_pair_c(t, s, e, counts, entry, strata),
                                      abs=1e-13)
    assert got_full == pytest.approx(brute_pair_c(t, s, e, np.ones(n), entry, strata),
                                     abs=1e-13)


def test_counts_equal_lifelines_on_the_repeated_rows() -> None:
    # source: lifelines.utils.concordance_index(time, -score, event) on the rows repeated as
    # counted (lifelines has no delayed entry or strata; ties one half)
    rng = np.random.default_rng(11)
    for _ in range(20):
        n = int(rng.integers(20, 200))
        t = rng.integers(1, 30, n).astype(float)
        e = rng.random(n) < 0.6
        s = rng.normal(size=n).round(1)
        counts = rng.multinomial(n, np.full(n, 1 / n))
        m = np.repeat(np.arange(n), counts)
        got = concordances(concordance_order(t, e), s, [counts])[0]
        assert got == pytest.approx(concordance_index(t[m], -s[m], e[m]), abs=1e-12)


def test_counts_must_be_whole_non_negative_numbers() -> None:
    t = np.array([1.0, 2.0, 3.0, 4.0])
    e = np.array([1, 0, 1, 0])
    order = concordance_order(t, e)
    with pytest.raises(ValueError, match="non-negative whole numbers"):
        concordances(order, np.arange(4.0), [np.array([1.0, 0.5, 1.0, 1.0])])
    with pytest.raises(ValueError, match="one value per row"):
        concordances(order, np.arange(4.0), [np.ones(3)])


def test_several_scores_in_one_call_match_a_brute_force_pair_count() -> None:
    # source: brute-force weighted pair count (helpers.brute_pair_c) per score; one call holds
    # every score of a replicate (the counts' time order and pairs made once, the work arrays
    # shared by the scores and released at the end), so a later score must not see an earlier
    # score's leftovers: scores with few and many ties, all-zero and large counts, and
    # samples of different sizes one after the other (the work arrays sized per call)
    rng = np.random.default_rng(20261205)
    for n in (3000, 70, 1500, 2, 300):
        t, s, e, entry, strata = _design(rng, n)
        scores = [s, s + rng.normal(size=n).round(2), -s, np.zeros(n)]
        counts = [rng.multinomial(n, np.full(n, 1 / n)), None, np.zeros(n, dtype=int),
                  rng.integers(0, 2000, n) * (rng.random(n) < 0.2)]
        order = concordance_order(t, e, entry, strata)
        got = scores_concordances(order, iter(scores), counts)
        assert len(got) == len(scores)
        for score, values in zip(scores, got, strict=True):
            # one score per call: the same numbers
            np.testing.assert_array_equal(values, concordances(order, score, counts))
            for c, g in zip(counts, values, strict=True):
                _check(g, brute_pair_c(t, score, e, c, entry, strata))


def test_several_scores_equal_lifelines_on_the_repeated_rows() -> None:
    # source: lifelines.utils.concordance_index(time, -score, event) on the rows repeated as
    # counted, for every score of one call (no delayed entry or strata, which lifelines lacks)
    rng = np.random.default_rng(12)
    n = 400
    t = rng.integers(1, 30, n).astype(float)
    e = rng.random(n) < 0.6
    scores = [rng.normal(size=n).round(1) for _ in range(4)]
    counts = rng.multinomial(n, np.full(n, 1 / n))
    m = np.repeat(np.arange(n), counts)
    got = scores_concordances(concordance_order(t, e), scores, [counts, None])
    for s, (drawn, full) in zip(scores, got, strict=True):
        assert drawn == pytest.approx(concordance_index(t[m], -s[m], e[m]), abs=1e-12)
        assert full == pytest.approx(concordance_index(t, -s, e), abs=1e-12)
