"""A linear predictor's AUC in drawn rows and in the full sample from one compiled call
(unbin.models.compiled.score_auc, ``drawn_aucs``) against ``count_aucs`` of the compared
scores, the numpy path it stands in for (both forced with UNBIN_COMPILED), and against
scipy.stats.mannwhitneyu (U / (n1 n0), ties one half; Mann & Whitney 1947) on the rows
repeated as drawn, the scores rounded to 10 decimals by numpy."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from unbin.models.discrimination import compared_score, count_aucs, drawn_aucs


def _cases(rng: np.random.Generator, n: int) -> list[np.ndarray]:
    x = rng.normal(size=n)
    return [
        0.7 * x - 2 + 0.1 * rng.normal(size=n),  # distinct scores, buckets shared by a few
        np.round(x, 1) - 1.5,  # heavy ties
        1e-6 * x,  # a narrow range: every k its own bucket
        # scores that differ by less than the 10 decimals compared: tied after rounding
        np.where(x > 0, 0.3, -0.3) + 1e-12 * rng.integers(0, 3, n),
        # a wide range with most rows in a few buckets (long runs of a shared bucket)
        np.where(rng.random(n) < 0.01, 9000.0, 0.0) + 1e-7 * rng.integers(0, 200, n),
        np.full(n, 2.5),  # one group
    ]


def test_drawn_aucs_equal_count_aucs_of_the_compared_scores(
        monkeypatch: pytest.MonkeyPatch) -> None:
    # source: count_aucs (numpy path forced), itself checked against a brute-force pair count
    # (tests/models/test_weighted_large.py); counts with zeros and large draws, one class
    # absent, small and large samples
    rng = np.random.default_rng(20261205)
    for n in (1, 7, 300, 5000, 60000):
        for it, lp in enumerate(_cases(rng, n)):
            y = rng.random(n) < (0.0 if it == 3 and n == 300 else 0.3)
            counts = rng.multinomial(n, np.full(n, 1 / n)) * (1 + 20 * (it == 1))
            monkeypatch.setenv("UNBIN_COMPILED", "never")
            want = count_aucs(y, compared_score(lp), [counts, None])
            plain = drawn_aucs(y, lp, counts)
            monkeypatch.setenv("UNBIN_COMPILED", "always")
            got = drawn_aucs(y, lp, counts)
            assert want is not None and plain is not None and got is not None
            assert np.array_equal(np.array(want), np.array(plain), equal_nan=True)
            assert np.array_equal(np.array(want), np.array(got), equal_nan=True), (n, it)


def test_drawn_aucs_are_mann_whitney_on_the_repeated_rows(
        monkeypatch: pytest.MonkeyPatch) -> None:
    # source: scipy.stats.mannwhitneyu(events, non-events).statistic / (n1 n0) of the rows
    # repeated as drawn, scores rounded by np.round(lp, 10)
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    rng = np.random.default_rng(7)
    for _ in range(10):
        n = int(rng.integers(50, 3000))
        x = rng.normal(size=n)
        y = rng.random(n) < 1 / (1 + np.exp(-x))
        lp = np.round(x + rng.normal(size=n), 2) + 1e-13 * rng.normal(size=n)
        c = rng.multinomial(n, np.full(n, 1 / n))
        got = drawn_aucs(y, lp, c)
        assert got is not None
        rep = np.repeat(np.arange(n), c)
        s = np.round(lp, 10)
        for value, yy, ss in ((got[0], y[rep], s[rep]), (got[1], y, s)):
            u = stats.mannwhitneyu(ss[yy], ss[~yy]).statistic
            assert value == pytest.approx(u / (yy.sum() * (~yy).sum()), abs=1e-13)


def test_drawn_aucs_decline_and_nan(monkeypatch: pytest.MonkeyPatch) -> None:
    # source: count_aucs (numpy path): predictors beyond the kernel's range and counts of
    # 2^15 and more take it; a NaN predictor gives None as there
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    rng = np.random.default_rng(3)
    n = 400
    y = rng.random(n) < 0.4
    lp = rng.normal(size=n)
    counts = rng.multinomial(n, np.full(n, 1 / n))
    for x, c in ((lp * 1e5, counts), (lp, counts + 40000), (np.r_[np.inf, lp[1:]], counts)):
        want = count_aucs(y, compared_score(x), [c, None])
        assert want is not None
        assert drawn_aucs(y, x, c) == (want[0], want[1])
    assert drawn_aucs(y, np.r_[np.nan, lp[1:]], counts) is None
