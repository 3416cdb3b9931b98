"""The published-style grouped table under frequency weights: a row counts as the persons it
stands for."""

from __future__ import annotations

import numpy as np
import pytest

from unbin.questions.as_published import _median


@pytest.mark.parametrize("seed", range(20))
def test_weighted_median_is_the_median_of_the_repeated_rows(seed: int) -> None:
    """Against numpy's median of the rows repeated by their integer weights (odd and even
    totals, ties in x)."""
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 12))
    x = np.round(rng.normal(size=n), 1)
    w = rng.integers(1, 5, n).astype(float)
    assert _median(x, w) == pytest.approx(float(np.median(np.repeat(x, w.astype(int)))),
                                          abs=1e-12)
    assert _median(x, np.ones(n)) == pytest.approx(float(np.median(x)), abs=1e-12)
