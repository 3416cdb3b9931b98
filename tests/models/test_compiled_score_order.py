"""The scores' stable order by the compiled radix sort (unbin.models.compiled.score_order)
against numpy's stable argsort, and the AUC of draw counts with it (both paths forced with
UNBIN_COMPILED) against scipy.stats.mannwhitneyu on the rows repeated as counted."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from unbin.models.discrimination import _RADIX_ROWS, ascending_order, count_aucs


def test_radix_order_is_numpys_stable_argsort() -> None:
    # source: np.argsort(kind="stable") (numpy); keys with every digit used, many ties, the
    # extremes 0 and 2^32 - 1, one key, no key
    from unbin.models.compiled.score_order import stable_order32

    rng = np.random.default_rng(20261205)
    for it in range(40):
        n = int(rng.integers(0, 20000))
        top = [2**32, 2**11, 2**22, 50][it % 4]
        key = rng.integers(0, top, n, dtype=np.uint64).astype(np.uint32)
        if n > 2:
            key[:2] = [0, 2**32 - 1]
        assert np.array_equal(stable_order32(key), np.argsort(key, kind="stable"))


@pytest.mark.parametrize("path", ["never", "always"])
def test_auc_with_the_radix_order_is_mann_whitney(monkeypatch: pytest.MonkeyPatch,
                                                   path: str) -> None:
    # source: scipy.stats.mannwhitneyu(events, non-events).statistic / (n1 n0), ties one
    # half (Mann & Whitney 1947); samples above _RADIX_ROWS so that the radix order is used,
    # and the order sorts the scores as np.sort does
    monkeypatch.setenv("UNBIN_COMPILED", path)
    rng = np.random.default_rng(11)
    for it in range(4):
        n = _RADIX_ROWS + int(rng.integers(1, 6000))
        x = rng.normal(size=n)
        y = rng.random(n) < 1 / (1 + np.exp(-x))
        s = np.round(x + rng.normal(size=n), [1, 3, 10, 12][it])
        assert np.array_equal(s[ascending_order(s)], np.sort(s))
        c = rng.multinomial(n, np.full(n, 1 / n))
        pair = count_aucs(y, s, [c, None])
        assert pair is not None
        rep = np.repeat(np.arange(n), c)
        for got, yy, ss in ((pair[0], y[rep], s[rep]), (pair[1], y, s)):
            u = stats.mannwhitneyu(ss[yy], ss[~yy]).statistic
            assert got == pytest.approx(u / (yy.sum() * (~yy).sum()), abs=1e-13)


def test_radix_order48_is_numpys_stable_argsort() -> None:
    # source: np.argsort(kind="stable") (numpy); keys spanning a few values, 2^39 (three
    # passes and one more), the whole 2^48, with many ties, a smallest key above 0, one key,
    # no key
    from unbin.models.compiled.score_order import stable_order48

    rng = np.random.default_rng(20261206)
    for it in range(40):
        n = int(rng.integers(0, 20000))
        top = [2**48, 2**39, 2**40 + 7, 50][it % 4]
        key = rng.integers(0, top, n, dtype=np.int64) + (it % 3) * 1000
        if n > 2 and top == 2**48:
            key[:2] = [0, 2**48 - 1]
        order, in_order = stable_order48(key)
        assert np.array_equal(order, np.argsort(key, kind="stable"))
        assert np.array_equal(in_order, np.sort(key))
