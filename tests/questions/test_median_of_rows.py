"""The median risk profile's median over a replicate's drawn rows without repeating them
(``decision_resampling._median_of_rows``; from MIDDLE_FROM_ROWS rows by
unbin.models.compiled.weighted_median) against numpy's ``np.median`` of the rows repeated as
drawn (the reference), bit for bit, both paths forced with UNBIN_COMPILED."""

from __future__ import annotations

import numpy as np
import pytest

from unbin.questions.decision_resampling import _median_of_rows


class _Rows:
    """The part of a ``_Sample`` the median reads: the drawn rows and their counts."""

    def __init__(self, idx: np.ndarray):
        self.idx = idx

    def row_counts(self, n: int) -> np.ndarray:
        return np.bincount(self.idx, minlength=n)


@pytest.mark.parametrize("mode", ["never", "always"])
def test_median_of_rows_is_numpys_median_of_the_repeated_rows(
        monkeypatch: pytest.MonkeyPatch, mode: str) -> None:
    # source: np.median of the repeated values; ties, a far outlier (most rows in one
    # bucket), a constant, odd and even totals, rows never drawn
    monkeypatch.setenv("UNBIN_COMPILED", mode)
    rng = np.random.default_rng(20261205)
    for it in range(400):
        n = int(rng.integers(1, 2500))
        v = rng.normal(size=n)
        if it % 4 == 1:
            v = np.round(v, 1)
        if it % 4 == 2:
            v[0] = 1e9
        if it % 29 == 0:
            v[:] = 3.25
        size = n + int(rng.integers(0, 2))
        idx = np.sort(rng.integers(0, n, size))
        got = _median_of_rows(v, _Rows(idx), n)  # type: ignore[arg-type]
        assert got == np.median(v[idx]), it


def test_median_of_rows_nan_and_infinite(monkeypatch: pytest.MonkeyPatch) -> None:
    # source: np.median (NaN when a drawn value is NaN; infinite values as numpy orders them)
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    v = np.array([0.5, np.nan, 2.0, -1.0, np.inf, 7.0])
    for idx in (np.array([0, 1, 2]), np.array([0, 2, 3, 4, 4]), np.array([0, 2, 3, 5])):
        want = np.median(v[idx])
        got = _median_of_rows(v, _Rows(idx), v.size)  # type: ignore[arg-type]
        assert got == want or (np.isnan(got) and np.isnan(want))
