"""Net benefit of the risk rules "treat when risk >= p_t" at many thresholds from one pass
(``threshold_counts``), by the numpy path and by the compiled pass
(unbin.models.compiled.threshold_counts), both forced with UNBIN_COMPILED, against the
definition of net benefit (Vickers & Elkin 2006, Med Decis Making 26:565:
NB = TP/n - FP/n * p_t / (1 - p_t)) computed directly, threshold by threshold, on the rows
repeated as counted, with risks tied exactly with the thresholds."""

from __future__ import annotations

import numpy as np
import pytest

from unbin.questions.net_benefit import NB_GRID, net_benefit_risk, threshold_counts


def _definition(y: np.ndarray, risk: np.ndarray, grid: np.ndarray,
                counts: np.ndarray | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Vickers & Elkin 2006, one threshold at a time on the repeated rows."""
    rows = np.arange(y.size) if counts is None else np.repeat(np.arange(y.size), counts)
    yy, rr = y[rows] > 0, risk[rows]
    n = rows.size
    tp = np.array([np.count_nonzero(yy & (rr >= t)) for t in grid]) / n
    fp = np.array([np.count_nonzero(~yy & (rr >= t)) for t in grid]) / n
    return tp - fp * grid / (1.0 - grid), tp, fp


@pytest.mark.parametrize("path", ["never", "always"])
def test_net_benefit_of_risk_rules_is_the_definition(monkeypatch: pytest.MonkeyPatch,
                                                     path: str) -> None:
    # source: Vickers & Elkin 2006 definition, counted directly per threshold (the TP and FP
    # counts are whole numbers, so the same to the bit); seeded risks rounded to 2 decimals
    # (many exactly on the grid p_t = 0.01..0.99), bootstrap draw counts, thresholds in any
    # order and repeated, risks of 0 and 1, a few thresholds and 99
    monkeypatch.setenv("UNBIN_COMPILED", path)
    rng = np.random.default_rng(20261205)
    for it in range(60):
        n = int(rng.integers(1, 400))
        risk = np.round(rng.beta(2, 5, n), 2)
        risk[rng.random(n) < 0.05] = 0.0
        risk[rng.random(n) < 0.05] = 1.0
        y = (rng.random(n) < risk).astype(float)
        counts = None if it % 3 == 0 else rng.multinomial(n, np.full(n, 1 / n))
        grid = (NB_GRID if it % 4 == 0 else
                np.round(rng.uniform(0.01, 0.99, int(rng.integers(1, 12))), 2))
        if it % 5 == 0:
            grid = np.r_[grid, grid[:2]][::-1]
        want = _definition(y, risk, grid, counts)
        got = net_benefit_risk(y, risk, grid, counts)
        for a, b in zip(got, want, strict=True):
            assert np.array_equal(a, b)


def test_the_compiled_pass_counts_as_the_numpy_path(monkeypatch: pytest.MonkeyPatch) -> None:
    # source: the numpy path (searchsorted + bincount, forced), itself checked against the
    # definition above; uneven and infinite thresholds, zero counts
    rng = np.random.default_rng(7)
    for it in range(100):
        n = int(rng.integers(1, 500))
        risk = rng.normal(size=n).round(1)
        y = rng.random(n) < 0.4
        grid = np.sort(rng.normal(size=int(rng.integers(1, 30))).round(1)) ** 3
        if it % 7 == 0:
            grid = np.r_[-np.inf, grid, np.inf]
        counts = None if it % 2 else rng.integers(0, 5, n)
        monkeypatch.setenv("UNBIN_COMPILED", "never")
        plain = threshold_counts(y, risk, grid, counts)
        monkeypatch.setenv("UNBIN_COMPILED", "always")
        compiled = threshold_counts(y, risk, grid, counts)
        for a, b in zip(plain, compiled, strict=True):
            assert np.array_equal(a, b)


@pytest.mark.parametrize("path", ["never", "always"])
def test_a_risk_that_is_not_a_number_leaves_the_rule_undefined(
        monkeypatch: pytest.MonkeyPatch, path: str) -> None:
    # common practice: a rule whose risk is undefined for some row cannot be counted (the row
    # is neither treated nor untreated), so its net benefit is NaN at every threshold, never
    # the row counted as treated; the same risks without the NaN give finite values
    monkeypatch.setenv("UNBIN_COMPILED", path)
    rng = np.random.default_rng(3)
    n = 60_000
    risk = rng.beta(2, 5, n)
    y = (rng.random(n) < risk).astype(float)
    finite = net_benefit_risk(y, risk, NB_GRID)
    assert all(np.isfinite(a).all() for a in finite)
    risk[17] = np.nan
    for a in net_benefit_risk(y, risk, NB_GRID, rng.integers(0, 3, n)):
        assert a.shape == NB_GRID.shape and np.isnan(a).all()
