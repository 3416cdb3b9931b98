"""Small-cell suppression (unbin.questions.disclosure) against brute-force statements of its
two rules: what a reader can recover from a table's shown counts and its published total."""

from __future__ import annotations

import numpy as np
import pandas as pd

from unbin.questions.disclosure import (
    complementary,
    is_small,
    primary,
    primary_value,
    too_small_to_describe,
)


def test_primary_withholds_exactly_the_counts_from_one_to_below_the_threshold() -> None:
    counts = [0, 1, 9, 10, 11, None, 250]
    assert primary(counts, 10) == [0, None, None, 10, 11, None, 250]
    assert is_small(np.array(counts[:5] + [250]), 10).tolist() == [False, True, True, False,
                                                                     False, False]
    assert primary_value(9, 10) is pd.NA and primary_value(10, 10) == 10
    assert primary_value(None, 10) is pd.NA and primary_value(0, 10) == 0
    assert too_small_to_describe(9, 10) and not too_small_to_describe(10, 10)


def test_complementary_leaves_no_withheld_count_recoverable_from_the_total() -> None:
    """Brute force over 5,000 random partitions (seeded; the rules stated in the module, no
    outside source): after suppression every shown count is 0 or at least min_cell, every count
    from 1 to min_cell - 1 is withheld, and the withheld positive counts are never exactly one.
    One extra count is withheld, and only when primary suppression withheld exactly one."""
    rng = np.random.default_rng(20261203)
    for _ in range(5000):
        k = int(rng.integers(2, 7))
        min_cell = int(rng.integers(2, 15))
        counts = [int(c) for c in rng.integers(0, 3 * min_cell, size=k)]
        out = complementary(counts, min_cell)
        shown = [c for c in out if c is not None]
        assert all(c == 0 or c >= min_cell for c in shown)
        assert all(out[i] is None for i, c in enumerate(counts) if 0 < c < min_cell)
        withheld_positive = [counts[i] for i, c in enumerate(out) if c is None and counts[i] > 0]
        positive = [c for c in counts if c > 0]
        # one withheld count alone is the total minus the shown ones; that is left only when it
        # is the set's only positive count (the total itself is then that small count)
        assert len(withheld_positive) != 1 or len(positive) == 1
        first = primary(counts, min_cell)
        extra = sum(1 for a, b in zip(first, out, strict=True) if a is not None and b is None)
        assert extra == (1 if sum(c is None for c in first) == 1
                         and any(c is not None and c > 0 for c in first) else 0)


def test_complementary_picks_the_smallest_other_positive_count() -> None:
    assert complementary([3, 40, 12, 0], 10) == [None, 40, None, 0]
    assert complementary([3, 4, 40], 10) == [None, None, 40]   # two withheld: nothing more
    assert complementary([3, 0, 0], 10) == [None, 0, 0]        # nothing else to withhold
