"""The large-sample shortcuts of the GLM bootstrap against outside references.

- ``WeightedGLM`` from ``_WHOLE_ROWS`` rows (``_chord``: every replicate at once, in blocks of
  rows; first step with the full sample's information) equals statsmodels' GLM with
  ``freq_weights`` (logistic, Poisson with a person-time offset) and WLS (linear) replicate by
  replicate, at a sample that takes that path by its size and at small samples forced onto it
  (with tied covariate rows and a rare group);
- its estimability and separation checks mark the same replicates as the small-sample solver;
- ``count_aucs`` (the AUC of drawn rows as draw counts, one sort) equals a brute-force count
  over every (event, non-event) pair of copies (``tests/helpers.brute_pair_c``; Hanley &
  McNeil 1982 for the AUC as that pair count), and bit for bit ``pair_auc`` of the repeated
  rows, with tied scores;
- ``net_benefit_risk`` on draw counts equals the net benefit of the repeated rows written out
  from its definition (Vickers & Elkin 2006: TP/n - FP/n * p_t / (1 - p_t)), with risks tied
  at a threshold, and bit for bit the sorted-risk count of the repeated rows.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from helpers import brute_pair_c
from unbin.models import weighted
from unbin.models.base import Outcome
from unbin.models.discrimination import count_aucs
from unbin.models.weighted import WeightedGLM, resample_weights


def _data(rng: np.random.Generator, n: int, family: str) -> tuple[np.ndarray, Outcome, object]:
    """Covariates with ties (a three-level factor, a binary, a rounded continuous one and a
    rare group) and an outcome of ``family``; the statsmodels fit of one weight vector."""
    X = np.column_stack([
        np.round(rng.normal(size=n), 1),
        rng.integers(0, 3, n) == 1,
        rng.integers(0, 3, n) == 2,
        rng.uniform(size=n) < 0.4,
        rng.uniform(size=n) < 0.01,  # rare: about 1% of the rows
    ]).astype(float)
    eta = -1.0 + 0.4 * X[:, 0] - 0.5 * X[:, 1] + 0.3 * X[:, 2] + 0.2 * X[:, 3] + 0.6 * X[:, 4]
    design = sm.add_constant(X)
    if family == "binary":
        y = (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(float)

        def ref(w: np.ndarray) -> np.ndarray:
            return np.asarray(sm.GLM(y, design, family=sm.families.Binomial(),
                                     freq_weights=w).fit(tol=1e-13).params)
        return X, Outcome("binary", y), ref
    if family == "count":
        t = rng.uniform(0.5, 2.0, n)
        y = rng.poisson(t * np.exp(eta)).astype(float)

        def ref(w: np.ndarray) -> np.ndarray:
            return np.asarray(sm.GLM(y, design, family=sm.families.Poisson(), offset=np.log(t),
                                     freq_weights=w).fit(tol=1e-13).params)
        return X, Outcome("count", y, offset=np.log(t)), ref
    y = eta + rng.normal(size=n)

    def ref(w: np.ndarray) -> np.ndarray:
        return np.asarray(sm.WLS(y, design, weights=w).fit().params)
    return X, Outcome("continuous", y), ref


@pytest.mark.parametrize("family", ["binary", "count", "continuous"])
def test_whole_sample_refits_equal_statsmodels_frequency_weights(family: str) -> None:
    """At ``_WHOLE_ROWS`` rows the refits take the large-sample path by size; each replicate's
    coefficients are statsmodels' on that replicate's frequency weights."""
    rng = np.random.default_rng({"binary": 1, "count": 2, "continuous": 3}[family])
    n = weighted._WHOLE_ROWS
    X, o, ref = _data(rng, n, family)
    start = ref(np.ones(n))
    model = WeightedGLM(family, X, o, start)
    assert model.whole
    W = resample_weights(np.random.default_rng(7), n, 3)
    coef = model.coef(W)
    for b in range(len(W)):
        np.testing.assert_allclose(coef[b], ref(W[b]), rtol=1e-8, atol=1e-10, err_msg=family)


@pytest.mark.parametrize("family", ["binary", "count", "continuous"])
def test_forced_whole_path_equals_statsmodels_at_small_samples(
        family: str, monkeypatch: pytest.MonkeyPatch) -> None:
    """Small samples forced onto the large-sample path (bootstrap replicates far from the
    start, ~1/sqrt(n)): still statsmodels' coefficients on each replicate's weights."""
    monkeypatch.setattr(weighted, "_WHOLE_ROWS", 0)
    rng = np.random.default_rng({"binary": 4, "count": 5, "continuous": 6}[family])
    n = 3000
    X, o, _ = _data(rng, n, family)
    X = X[:, :4]  # no rare group: every replicate estimable at this size

    def ref4(w: np.ndarray) -> np.ndarray:
        fam = {"binary": sm.families.Binomial(), "count": sm.families.Poisson()}.get(family)
        d = sm.add_constant(X)
        if fam is None:
            return np.asarray(sm.WLS(o.y, d, weights=w).fit().params)
        return np.asarray(sm.GLM(o.y, d, family=fam, offset=o.offset,
                                 freq_weights=w).fit(tol=1e-13).params)

    model = WeightedGLM(family, X, o, ref4(np.ones(n)))
    assert model.whole
    W = resample_weights(np.random.default_rng(8), n, 6)
    coef = model.coef(W)
    for b in range(len(W)):
        np.testing.assert_allclose(coef[b], ref4(W[b]), rtol=1e-8, atol=1e-10, err_msg=family)


def test_forced_whole_path_marks_the_replicates_the_small_path_marks(
        monkeypatch: pytest.MonkeyPatch) -> None:
    """A replicate that drew none of a group's rows (its column does not vary) and one in
    which the group's rows are all events (quasi-separation: the fitted risks run to 1) are
    NaN on both paths; the others agree with statsmodels."""
    rng = np.random.default_rng(9)
    n = 400
    g = np.zeros(n)
    g[:6] = 1.0
    x = rng.normal(size=n)
    X = np.column_stack([x, g])
    y = (rng.random(n) < 1 / (1 + np.exp(-0.5 * x))).astype(float)
    y[:6] = [1, 1, 1, 0, 1, 0]
    o = Outcome("binary", y)
    W = np.ones((3, n))
    W[1, :6] = 0.0  # no row of the group
    W[2, [3, 5]] = 0.0  # the group's drawn rows are all events
    start = np.asarray(sm.GLM(y, sm.add_constant(X), family=sm.families.Binomial())
                       .fit().params)
    small = WeightedGLM("binary", X, o, start).coef(W)
    monkeypatch.setattr(weighted, "_WHOLE_ROWS", 0)
    large = WeightedGLM("binary", X, o, start).coef(W)
    assert np.array_equal(np.isnan(small), np.isnan(large))
    assert np.all(np.isfinite(large[0])) and np.all(np.isnan(large[1:]))
    expected = sm.GLM(y, sm.add_constant(X), family=sm.families.Binomial(),
                      freq_weights=W[0]).fit(tol=1e-13).params
    np.testing.assert_allclose(large[0], expected, rtol=1e-8, atol=1e-10)


@pytest.mark.parametrize("q", [1, 2, 5, 12])
def test_block_products_are_the_direct_products(q: int) -> None:
    """``_chord``'s work arrays hold the values of the direct numpy expressions they stand in
    for (the pairwise column products in ``np.triu_indices`` order, ``[z, z^2]``, ``z r``),
    element for element, on a full block and on a shorter last block (common practice:
    the expressions themselves are the definition)."""
    rng = np.random.default_rng(7)
    blocks = weighted._BlockProducts(q, 300)
    iu = np.triu_indices(q)
    for rows in (300, 41):
        Zb = rng.normal(size=(rows, q))
        r = rng.normal(size=rows)
        assert np.array_equal(blocks.pairs(Zb), Zb[:, iu[0]] * Zb[:, iu[1]])
        assert np.array_equal(blocks.moments(Zb), np.hstack([Zb, Zb * Zb]))
        assert np.array_equal(blocks.scaled(Zb, r), Zb * r[:, None])


def test_count_aucs_equal_the_pair_count_of_the_repeated_rows() -> None:
    from unbin.questions.decision_resampling import pair_auc

    rng = np.random.default_rng(12)
    for n in (9, 80, 700):
        y = rng.uniform(size=n) < 0.3
        y[:2] = [True, False]
        score = np.round(rng.normal(size=n) + y, 1)  # ties within and across the groups
        counts = np.bincount(rng.integers(0, n, n), minlength=n)  # a bootstrap draw
        got_drawn, got_full = count_aucs(y, score, [counts, None])
        # brute force: an event at time 0 pairs with every non-event (time 1)
        t = np.where(y, 0.0, 1.0)
        assert got_drawn == pytest.approx(brute_pair_c(t, score, y, counts), abs=1e-14)
        assert got_full == pytest.approx(brute_pair_c(t, score, y), abs=1e-14)
        rows = np.repeat(np.arange(n), counts)
        assert got_drawn == pair_auc(y[rows], score[rows])  # bit for bit
        assert got_full == pair_auc(y, score)
    none = count_aucs(np.zeros(4, bool), np.arange(4.0), [None, np.array([1, 0, 2, 1])])
    assert none is not None and all(np.isnan(v) for v in none)
    assert count_aucs(np.array([True, False]), np.array([np.nan, 1.0]), [None]) is None


@pytest.mark.parametrize("thresholds", [np.array([0.1, 0.2, 0.5]), np.arange(1, 100) / 100])
def test_net_benefit_on_draw_counts_equals_the_repeated_rows(thresholds: np.ndarray) -> None:
    from unbin.questions.net_benefit import net_benefit_risk

    rng = np.random.default_rng(13)
    n = 500
    y = (rng.uniform(size=n) < 0.25).astype(float)
    risk = np.round(rng.uniform(size=n), 2)  # hundredths: risks tied at the thresholds
    counts = np.bincount(rng.integers(0, n, n), minlength=n)
    rows = np.repeat(np.arange(n), counts)
    got = net_benefit_risk(y, risk, thresholds, counts)
    yr, rr = y[rows] > 0, risk[rows]
    treat = rr[None, :] >= thresholds[:, None]
    tp = (treat & yr).sum(axis=1) / rows.size
    fp = (treat & ~yr).sum(axis=1) / rows.size
    np.testing.assert_allclose(got[0], tp - fp * thresholds / (1 - thresholds), atol=1e-15)
    for a, b in zip(got, net_benefit_risk(y[rows], risk[rows], thresholds), strict=True):
        assert np.array_equal(a, b)  # bit for bit
