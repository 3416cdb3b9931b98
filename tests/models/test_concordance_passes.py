"""Harrell's C at the sizes where the passes of unbin.models.cox.concordance change shape: the
pairs within blocks of 64 positions (64-bit masks; below 64 rows the only pass) and the
partition levels above them, with partial last blocks (63/64/65, 127/128/129 rows and so on),
the 16- and 32-row sizes of the earlier block layout, a few thousand rows, and counts with
several bits (one bit plane each), zeros and sums beyond 32 bits.

References: a brute-force pair count written in the tests (helpers.brute_pair_c: every pair
(i, j) counted c_i c_j, i an event, j in i's stratum, at risk at t_i and outliving it), and
lifelines.utils.concordance_index on the rows repeated as counted where there is neither
delayed entry nor strata (lifelines has neither)."""

from __future__ import annotations

import numpy as np
import pytest
from lifelines.utils import concordance_index

from helpers import brute_pair_c, tied_survival_design
from unbin.models.cox import concordance, concordance_order
from unbin.models.cox.concordance import _popcount_swar, concordances

SIZES = [15, 16, 17, 31, 32, 33, 63, 64, 65, 127, 128, 129, 255, 256, 257, 1000, 2500]


def _counts(rng: np.random.Generator, n: int, kind: int) -> np.ndarray:
    """Bootstrap draws (about a third zero), sparse large counts (several bit planes) or
    counts with many zeros."""
    if kind == 0:
        return rng.multinomial(n, np.full(n, 1 / n))
    if kind == 1:
        return rng.integers(0, 40, n) * (rng.random(n) < 0.3)
    return rng.poisson(0.4, n)


def _check(got: float, ref: float) -> None:
    if np.isnan(ref):
        assert np.isnan(got)
    else:
        assert got == pytest.approx(ref, abs=1e-13)


@pytest.mark.parametrize("n", SIZES)
def test_block_boundaries_match_a_brute_force_pair_count(n: int) -> None:
    # source: brute-force weighted pair count (helpers.brute_pair_c); ties in time, score and
    # between entry and event times; one stratum, a few, and more strata than rows in a block
    rng = np.random.default_rng(1000 + n)
    for it in range(6 if n < 1000 else 2):
        n_times = int(rng.integers(2, max(3, n // 3)))
        n_scores = int(rng.integers(2, max(3, n // 2)))
        n_strata = [1, 3, 80][it % 3]
        t, s, e, entry, strata = tied_survival_design(rng, n, n_times, n_scores, n_strata)
        use_entry = entry if it % 2 == 0 else None
        order = concordance_order(t, e, use_entry, strata)
        counts = [_counts(rng, n, k) for k in range(3)]
        got = concordances(order, s, [counts[0], None, counts[1], counts[2]])
        refs = [brute_pair_c(t, s, e, c, use_entry, strata)
                for c in (counts[0], np.ones(n, dtype=int), counts[1], counts[2])]
        for g, ref in zip(got, refs, strict=True):
            _check(g, ref)
        # the time order's reused work arrays give the same values on a second score
        s2 = s[::-1].copy()
        got2 = concordances(order, s2, [counts[2], None])
        _check(got2[0], brute_pair_c(t, s2, e, counts[2], use_entry, strata))
        _check(got2[1], brute_pair_c(t, s2, e, None, use_entry, strata))


@pytest.mark.parametrize("n", [63, 64, 65, 129, 2000])
def test_block_boundaries_match_lifelines_on_the_repeated_rows(n: int) -> None:
    # source: lifelines.utils.concordance_index(time, -score, event) on the rows repeated as
    # counted (no delayed entry, one stratum; tied scores one half)
    rng = np.random.default_rng(n)
    t = rng.integers(1, 40, n).astype(float)
    e = rng.random(n) < 0.5
    s = rng.normal(size=n).round(1)
    counts = rng.multinomial(n, np.full(n, 1 / n))
    m = np.repeat(np.arange(n), counts)
    drawn, full = concordances(concordance_order(t, e), s, [counts, None])
    assert drawn == pytest.approx(concordance_index(t[m], -s[m], e[m]), abs=1e-12)
    assert full == pytest.approx(concordance_index(t, -s, e), abs=1e-12)
    assert concordance(t, s, e) == full


def test_counts_summing_beyond_32_bits_match_a_brute_force_pair_count() -> None:
    # source: brute-force weighted pair count; counts of about 2.5e7 per row (their sum above
    # 2^31: the 64-bit running sums), the pair count below 2^63
    rng = np.random.default_rng(3)
    n = 100
    t, s, e, entry, strata = tied_survival_design(rng, n, 20, 10, 2)
    counts = rng.integers(2 * 10**7, 3 * 10**7, n)
    assert counts.sum() >= 2**31
    got = concordances(concordance_order(t, e, entry, strata), s, [counts])[0]
    assert got == pytest.approx(brute_pair_c(t, s, e, counts, entry, strata), rel=1e-12)


def test_fallback_bit_count_matches_python() -> None:
    # source: Python's int.bit_count (the fallback for numpy < 2, which lacks bitwise_count)
    rng = np.random.default_rng(5)
    x = rng.integers(0, 2**63, 500, dtype=np.uint64) * np.uint64(2) + rng.integers(
        0, 2, 500, dtype=np.uint64)
    x[:3] = [0, 2**64 - 1, 2**63]
    got = _popcount_swar(x)
    assert [int(v) for v in got] == [int(v).bit_count() for v in x]


def test_score_bits_sort_as_the_scores() -> None:
    # source: numpy's stable argsort of the doubles themselves; the 64-bit keys must give the
    # same permutation, with -0.0 and 0.0 tied, infinities, subnormals and many ties
    from unbin.models.cox.concordance import _ordered_bits

    rng = np.random.default_rng(9)
    for x in (rng.normal(size=5000), np.round(rng.normal(size=5000), 1),
              rng.choice([-0.0, 0.0, 5e-324, -5e-324, np.inf, -np.inf, 1.0, -1.0], 3000)):
        k = _ordered_bits(x)
        assert np.array_equal(np.argsort(k, kind="stable"), np.argsort(x, kind="stable"))
        assert np.array_equal(k[1:] == k[:-1], x[1:] == x[:-1])
