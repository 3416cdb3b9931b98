"""The binary AUC of draw counts by the compiled pass (unbin.models.compiled.auc) against the
numpy reductions of ``count_aucs`` it stands in for, both forced with UNBIN_COMPILED, and
against scipy.stats.mannwhitneyu (U / (n1 n0), ties one half; Mann & Whitney 1947) on the
rows repeated as counted."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from unbin.models.discrimination import count_aucs


def _both(monkeypatch: pytest.MonkeyPatch, y: np.ndarray, s: np.ndarray,
          counts: list[np.ndarray | None]) -> tuple[list[float] | None, list[float] | None]:
    monkeypatch.setenv("UNBIN_COMPILED", "never")
    plain = count_aucs(y, s, counts)
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    return plain, count_aucs(y, s, counts)


def test_compiled_counts_equal_the_numpy_reductions(monkeypatch: pytest.MonkeyPatch) -> None:
    # source: the numpy reductions (forced), themselves checked against a brute-force pair
    # count (tests/models/test_weighted_large.py); tied scores, counts with zeros and above 15
    # (whole floats too), one class absent
    rng = np.random.default_rng(20261205)
    for it in range(200):
        n = int(rng.integers(1, 600))
        y = rng.random(n) < (0.0 if it % 17 == 0 else rng.uniform(0.05, 0.95))
        s = rng.integers(0, int(rng.integers(1, 40)), n).astype(float)
        if it % 2:
            s = s + rng.normal(size=n).round(2)
        counts = [rng.multinomial(n, np.full(n, 1 / n)), None,
                  (rng.integers(0, 40, n) * (rng.random(n) < 0.3)).astype(float)]
        plain, compiled = _both(monkeypatch, y, s, counts)
        assert np.array_equal(np.array(plain), np.array(compiled), equal_nan=True)


def test_compiled_auc_is_mann_whitney_on_the_repeated_rows(
        monkeypatch: pytest.MonkeyPatch) -> None:
    # source: scipy.stats.mannwhitneyu(events, non-events).statistic / (n1 n0)
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    rng = np.random.default_rng(4)
    for _ in range(20):
        n = int(rng.integers(30, 2000))
        x = rng.normal(size=n)
        y = rng.random(n) < 1 / (1 + np.exp(-x))
        s = np.round(x + rng.normal(size=n), 1)
        c = rng.multinomial(n, np.full(n, 1 / n))
        pair = count_aucs(y, s, [c, None])
        assert pair is not None
        got_drawn, got_full = pair
        rep = np.repeat(np.arange(n), c)
        for got, yy, ss in ((got_drawn, y[rep], s[rep]), (got_full, y, s)):
            u = stats.mannwhitneyu(ss[yy], ss[~yy]).statistic
            assert got == pytest.approx(u / (yy.sum() * (~yy).sum()), abs=1e-13)


def test_compiled_counts_must_be_whole(monkeypatch: pytest.MonkeyPatch) -> None:
    # source: the numpy path's check (the same message)
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    with pytest.raises(ValueError, match="counts must be whole numbers"):
        count_aucs(np.array([True, False, True]), np.arange(3.0), [np.array([1.0, 0.5, 2.0])])


def test_small_samples_do_not_import_numba() -> None:
    # source: the convention of unbin.models.compiled (kernels imported only from a size
    # threshold on, so small jobs never load numba)
    import os
    import subprocess
    import sys

    from unbin.models.discrimination import AUC_FROM_ROWS

    code = (
        "import sys, numpy as np\n"
        "from unbin.models.discrimination import count_aucs\n"
        "n = 5000\n"
        "rng = np.random.default_rng(0)\n"
        "count_aucs(rng.random(n) < .5, rng.normal(size=n), [rng.poisson(1, n), None])\n"
        "assert 'numba' not in sys.modules, 'numba imported'\n"
        f"assert n < {AUC_FROM_ROWS}\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True,
                   env={**os.environ, "UNBIN_COMPILED": "auto"})


@pytest.mark.parametrize("compiled", ["never", "always"])
def test_auc_is_the_rank_formula_bit_for_bit(monkeypatch: pytest.MonkeyPatch,
                                            compiled: str) -> None:
    """``auc`` (counted over the radix-sorted scores) against the Mann–Whitney rank formula
    with scipy.stats.rankdata's midranks (U = R1 - n1 (n1 + 1) / 2, over n1 n0): the same
    float, with tied scores, below and above the radix sort's and the compiled pass' row
    counts; NaN with a NaN score or one class absent (as the rank formula gives)."""
    from unbin.models.discrimination import _RADIX_ROWS, AUC_FROM_ROWS, auc

    monkeypatch.setenv("UNBIN_COMPILED", compiled)
    rng = np.random.default_rng(20261205)
    for n in (2, 9, 300, _RADIX_ROWS + 17, AUC_FROM_ROWS + 3_001):
        for ties in (False, True):
            y = rng.random(n) < 0.3
            y[:2] = [True, False]
            s = rng.normal(size=n) + 0.8 * y
            if ties:
                s = s.round(1)
            n1, n0 = int(y.sum()), int((~y).sum())
            want = (stats.rankdata(s)[y].sum() - n1 * (n1 + 1) / 2) / (n1 * n0)
            assert auc(y, s) == want, (n, ties)
            assert auc(y.astype(float), s) == want
    s[3] = np.nan
    assert np.isnan(auc(y, s))
    assert np.isnan(auc(np.ones(5, bool), np.arange(5.0)))
