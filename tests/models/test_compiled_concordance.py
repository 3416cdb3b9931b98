"""Harrell's C by the compiled sweep (unbin.models.compiled.concordance, the Fenwick tree over
score runs) against the numpy passes it stands in for, both forced with UNBIN_COMPILED, and
against outside references.

References: a brute-force pair count written in the tests (helpers.brute_pair_c: every pair
(i, j) counted c_i c_j, i an event, j in i's stratum, at risk at t_i and outliving it; and
``_pair_counts`` below, the same definition returning the integer counts), and
lifelines.utils.concordance_index (no delayed entry, one stratum; lifelines has neither) on
the rows repeated as counted."""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest
from lifelines.utils import concordance_index

from helpers import brute_pair_c, tied_survival_design
from unbin.models.cox import concordance, concordance_order
from unbin.models.cox.concordance import (
    CONCORDANCE_FROM_ROWS,
    TimeOrder,
    scores_concordances,
)


def _both(monkeypatch: pytest.MonkeyPatch, order: TimeOrder, scores: list[np.ndarray],
          counts: list[np.ndarray | None]) -> tuple[list[list[float]], list[list[float]]]:
    """scores_concordances by the numpy passes and by the compiled sweep."""
    monkeypatch.setenv("UNBIN_COMPILED", "never")
    plain = scores_concordances(order, scores, counts)
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    compiled = scores_concordances(order, scores, counts)
    return plain, compiled


def _same(a: list[list[float]], b: list[list[float]]) -> None:
    """Bit for bit (both divide the same integer counts), NaN where both have no pair."""
    assert np.array_equal(np.array(a), np.array(b), equal_nan=True)


def _pair_counts(t: np.ndarray, s: np.ndarray, e: np.ndarray, c: np.ndarray,
                 entry: np.ndarray, strata: np.ndarray) -> tuple[int, int, int]:
    """(higher, equal, pairs) in integers by visiting every pair (the definition of
    helpers.brute_pair_c, counts kept whole)."""
    higher = equal = pairs = 0
    for i in np.flatnonzero(e):
        for j in range(t.size):
            if j == i or strata[j] != strata[i] or not entry[j] < t[i]:
                continue
            if t[j] > t[i] or (t[j] == t[i] and not e[j]):
                w = int(c[i]) * int(c[j])
                pairs += w
                higher += w * bool(s[i] > s[j])
                equal += w * bool(s[i] == s[j])
    return higher, equal, pairs


def test_sweep_equals_the_numpy_passes_on_tied_designs(monkeypatch: pytest.MonkeyPatch) -> None:
    # source: the numpy passes (forced), themselves checked against a brute-force pair count
    # (tests/models/test_concordances.py); ties in time, score, between event and entry
    # times; counts with zeros and above 15; with and without entry and strata
    rng = np.random.default_rng(20261205)
    for it in range(250):
        n = int(rng.integers(1, 400))
        t, s, e, entry, strata = tied_survival_design(
            rng, n, int(rng.integers(1, 30)), int(rng.integers(1, 12)), int(rng.integers(1, 6)))
        use_entry = entry if it % 3 else None
        use_strata = strata if it % 2 else None
        if it % 5 == 0 and n > 3:  # a stratum of one row
            use_strata = strata.copy() if use_strata is None else use_strata.copy()
            use_strata[0] = 99
        if it % 11 == 0:  # no events at all
            e = np.zeros(n, dtype=bool)
        order = concordance_order(t, e, use_entry, use_strata)
        counts = [rng.multinomial(n, np.full(n, 1 / n)), None,
                  rng.integers(0, 40, n) * (rng.random(n) < 0.3)]
        scores = [s, s + rng.normal(size=n).round(1), rng.normal(size=n)]
        plain, compiled = _both(monkeypatch, order, scores, counts)
        _same(plain, compiled)


def test_sweep_equals_the_numpy_passes_on_a_registry_like_sample(
        monkeypatch: pytest.MonkeyPatch) -> None:
    # source: the numpy passes (forced) on 30,000 rows: whole-day follow-up, 8 strata, delayed
    # entry for every row, one grouped and one continuous score rounded as the C index rounds
    from unbin.models.discrimination import compared_score

    rng = np.random.default_rng(11)
    n = 30_000
    lp = rng.normal(0, 0.5, n)
    time_ = np.ceil(np.minimum(rng.exponential(3650 * np.exp(-lp)), rng.uniform(365, 3650, n)))
    event = rng.random(n) < 0.3
    entry = np.floor(time_ * rng.uniform(0, 0.9, n)) - 1
    strata = rng.integers(0, 8, n)
    order = concordance_order(time_, event, entry, strata)
    scores = [compared_score(np.round(lp, 2)), compared_score(lp + rng.normal(0, 0.01, n))]
    counts = [rng.multinomial(n, np.full(n, 1 / n)), None]
    plain, compiled = _both(monkeypatch, order, scores, counts)
    _same(plain, compiled)


def test_sweep_counts_match_a_brute_force_pair_count(monkeypatch: pytest.MonkeyPatch) -> None:
    # source: brute-force pair counts in integers (_pair_counts, the definition pair by pair)
    # with delayed entry, strata, tied times and scores, counts 0..20
    from unbin.models.compiled.concordance import sweep_pairs

    rng = np.random.default_rng(3)
    for _ in range(60):
        n = int(rng.integers(2, 60))
        t, s, e, entry, strata = tied_survival_design(rng, n, 6, 4, 3)
        c = rng.integers(0, 21, n)
        order = concordance_order(t, e, entry, strata)
        monkeypatch.setenv("UNBIN_COMPILED", "always")
        got = scores_concordances(order, [s], [c])[0][0]
        higher, equal, pairs = _pair_counts(t, s, e, c, entry, strata)
        if pairs == 0:
            assert np.isnan(got)
        else:
            assert got == (higher + 0.5 * equal) / pairs
        assert sweep_pairs is not None  # (the module imported: the compiled path ran)


def test_sweep_matches_the_brute_force_c_with_bootstrap_counts(
        monkeypatch: pytest.MonkeyPatch) -> None:
    # source: helpers.brute_pair_c (every pair counted c_i c_j) on 1,500 rows, bootstrap draw
    # counts and the full sample
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    rng = np.random.default_rng(8)
    n = 1500
    t, s, e, entry, strata = tied_survival_design(rng, n, 40, 25, 3)
    draw = rng.multinomial(n, np.full(n, 1 / n))
    order = concordance_order(t, e, entry, strata)
    got_drawn, got_full = scores_concordances(order, [s], [draw, None])[0]
    assert got_drawn == pytest.approx(brute_pair_c(t, s, e, draw, entry, strata), abs=1e-13)
    assert got_full == pytest.approx(brute_pair_c(t, s, e, None, entry, strata), abs=1e-13)


def test_sweep_equals_lifelines_without_entry_and_strata(monkeypatch: pytest.MonkeyPatch) -> None:
    # source: lifelines.utils.concordance_index(time, -score, event) (higher score, earlier
    # event), on the rows repeated as counted
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    rng = np.random.default_rng(5)
    for _ in range(20):
        n = int(rng.integers(20, 300))
        t = rng.integers(1, 25, n).astype(float)
        e = rng.random(n) < 0.4
        s = rng.integers(0, 10, n).astype(float)
        c = rng.poisson(1.2, n)
        got_counted, got_once = scores_concordances(concordance_order(t, e), [s], [c, None])[0]
        rep = np.repeat(np.arange(n), c)
        assert got_counted == pytest.approx(concordance_index(t[rep], -s[rep], e[rep]), abs=1e-12)
        assert got_once == pytest.approx(concordance_index(t, -s, e), abs=1e-12)
        assert concordance(t, s, e) == got_once


def test_sweep_with_counts_beyond_32_bits(monkeypatch: pytest.MonkeyPatch) -> None:
    # source: brute-force integer pair counts; the counts' total above 2^31 takes the sweep's
    # 64-bit table (else 32 bits)
    rng = np.random.default_rng(9)
    n = 40
    t, s, e, entry, strata = tied_survival_design(rng, n, 8, 5, 2)
    c = rng.integers(0, 2**27, n)
    assert c.sum() >= 2**31
    order = concordance_order(t, e, entry, strata)
    plain, compiled = _both(monkeypatch, order, [s], [c])
    _same(plain, compiled)
    higher, equal, pairs = _pair_counts(t, s, e, c, entry, strata)
    assert compiled[0][0] == (higher + 0.5 * equal) / pairs


def test_no_events_and_bad_scores(monkeypatch: pytest.MonkeyPatch) -> None:
    # source: the definition (no event: no comparable pair, NaN) and the numpy path's checks
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    order = concordance_order(np.arange(1.0, 6.0), np.zeros(5, dtype=bool))
    assert np.isnan(scores_concordances(order, [np.arange(5.0)], [None])[0][0])
    order = concordance_order(np.arange(1.0, 6.0), np.ones(5, dtype=bool))
    with pytest.raises(ValueError, match="risk_score must be one-dimensional with 5 values"):
        scores_concordances(order, [np.arange(4.0)], [None])
    with pytest.raises(ValueError, match="risk_score"):
        scores_concordances(order, [np.array([1.0, np.nan, 2.0, 3.0, 4.0])], [None])


def test_small_samples_do_not_import_numba() -> None:
    # source: the convention of unbin.models.compiled (kernels imported only from a size
    # threshold on, so small jobs never load numba)
    code = (
        "import sys, numpy as np\n"
        "from unbin.models.cox import concordance\n"
        "n = 500\n"
        "rng = np.random.default_rng(0)\n"
        "concordance(rng.integers(1, 9, n).astype(float), rng.normal(size=n), rng.random(n) < .5)\n"
        "assert 'numba' not in sys.modules, 'numba imported'\n"
        f"assert n < {CONCORDANCE_FROM_ROWS}\n"
    )
    env = {**os.environ, "UNBIN_COMPILED": "auto"}
    subprocess.run([sys.executable, "-c", code], check=True, env=env)
