"""Harrell's C's sort by score as whole numbers (``concordance._grid_key``/``_by_key``: scores on
the 1e-10 grid the C index compares sorted by three 16-bit radix passes).

References: numpy's ``lexsort`` of (position, score, stratum) for the order itself (ties by
position), and the brute-force pair count (``helpers.brute_pair_c``, every pair by hand) for
the C of rounded scores with ties, draw counts, strata and delayed entry.
"""

from __future__ import annotations

import numpy as np
import pytest

from helpers import brute_pair_c
from unbin.models.cox.concordance import (
    _by_key,
    _grid_key,
    concordance_order,
    concordances,
)


def _reference(score: np.ndarray, stratum: np.ndarray | None) -> np.ndarray:
    pos = np.arange(score.size)
    keys = (pos, score) if stratum is None else (pos, score, stratum)
    return np.lexsort(keys)


@pytest.mark.parametrize("path", ["never", "always"])  # numpy's radix passes; compiled
@pytest.mark.parametrize("strata", [None, 3, 80])  # none, few (apart), many (one sort)
def test_grid_order_is_the_score_order(monkeypatch: pytest.MonkeyPatch, strata: int | None,
                                       path: str) -> None:
    monkeypatch.setenv("UNBIN_COMPILED", path)
    rng = np.random.default_rng(4)
    n = 20000
    score = np.round(rng.normal(-1.0, 2.0, n), 10)
    score[: n // 4] = np.round(score[: n // 4], 2)  # many exact ties
    stratum = None if strata is None else np.sort(rng.integers(0, strata, n))
    assert _grid_key(score) is not None
    got = _by_key(score, stratum, np.int64)
    assert np.array_equal(got, _reference(score, stratum))


@pytest.mark.parametrize("path", ["never", "always"])
def test_scores_sharing_a_grid_number_are_sorted_as_they_are(monkeypatch: pytest.MonkeyPatch,
                                                             path: str) -> None:
    # two different scores closer than 1e-10 would share a whole number: the check declines
    # and the scores are sorted by their own values
    monkeypatch.setenv("UNBIN_COMPILED", path)
    rng = np.random.default_rng(5)
    score = np.round(rng.normal(size=5000), 10)
    score[10], score[20] = 0.5 + 1e-12, 0.5  # the later one lower, by less than the grid
    score[30] = 0.5 + 1e-12
    got = _by_key(score, None, np.int64)
    assert np.array_equal(got, _reference(score, None))
    assert list(got).index(20) < list(got).index(10)
    # too large for the grid: not used, and the order still right
    big = score * 1e6
    assert _grid_key(big) is None
    assert np.array_equal(_by_key(big, None, np.int64), _reference(big, None))


def test_c_of_rounded_scores_equals_the_pair_count() -> None:
    # source: Harrell's C by counting every pair (helpers.brute_pair_c)
    rng = np.random.default_rng(6)
    n = 1500
    t = np.ceil(rng.exponential(200, n))
    e = rng.uniform(size=n) < 0.4
    entry = np.floor(rng.uniform(0, 0.5, n) * t)
    strata = rng.integers(0, 3, n)
    score = np.round(rng.normal(size=n), 1)  # heavy ties in score too
    counts = rng.multinomial(n, np.full(n, 1 / n))
    T = concordance_order(t, e, entry, strata)
    drawn, full = concordances(T, score, [counts, None])
    assert full == pytest.approx(brute_pair_c(t, score, e, None, entry, strata), abs=1e-12)
    assert drawn == pytest.approx(brute_pair_c(t, score, e, counts, entry, strata), abs=1e-12)
