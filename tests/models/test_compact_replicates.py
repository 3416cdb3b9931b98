"""The compact bootstrap weights (``unbin.models.weighted.Replicates``: draw counts as small
unsigned integers, the rows' weights multiplying them per block) and the one-sort AUC of the
decision bootstrap against outside references.

- refits on the compact counts equal statsmodels' GLM with ``freq_weights`` on the same
  replicates (Binomial, Poisson with a log person-time offset, Gaussian), on both solver
  paths; with sampling weights that are not whole numbers the refit weight is count x weight
  and statsmodels' fit on those weights is matched (a compact form that dropped or rounded
  the weights would fail here);
- the compact draws are numpy's draws: ``Generator.integers`` counted per row, and
  ``Generator.multinomial`` of every replicate at once (the counts widened past 255);
- ``count_aucs`` (one sort of the scores, ties as runs of equal scores) equals a weighted
  (event, non-event) pair count written out here (Hanley & McNeil 1982: the AUC is the share
  of such pairs in which the event scores higher, ties one half) with draw counts as
  frequency weights, and scipy's Mann-Whitney U / (n1 n0) without weights; the sort it uses
  (``ascending_order``) sorts as numpy's ``np.sort``.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from unbin.models import weighted
from unbin.models.base import Outcome
from unbin.models.discrimination import _RADIX_ROWS, ascending_order, count_aucs
from unbin.models.weighted import (
    Replicates,
    WeightedGLM,
    design_resample_replicates,
    design_resample_weights,
)


def _family_data(family: str, n: int, seed: int
                 ) -> tuple[np.ndarray, Outcome, sm.families.Family, np.ndarray | None]:
    rng = np.random.default_rng(seed)
    X = np.column_stack([np.round(rng.normal(size=n), 1), rng.uniform(size=n) < 0.4,
                         rng.integers(0, 3, n) == 2]).astype(float)
    eta = -0.8 + 0.4 * X[:, 0] - 0.5 * X[:, 1] + 0.3 * X[:, 2]
    if family == "binary":
        y = (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(float)
        return X, Outcome("binary", y), sm.families.Binomial(), None
    if family == "count":
        t = rng.uniform(0.5, 2.0, n)
        y = rng.poisson(t * np.exp(eta)).astype(float)
        return X, Outcome("count", y, offset=np.log(t)), sm.families.Poisson(), np.log(t)
    y = eta + rng.normal(size=n)
    return X, Outcome("continuous", y), sm.families.Gaussian(), None


def _statsmodels(X: np.ndarray, o: Outcome, fam: sm.families.Family, off: np.ndarray | None,
                 w: np.ndarray) -> np.ndarray:
    return np.asarray(sm.GLM(o.y, sm.add_constant(X), family=fam, offset=off,
                             freq_weights=w).fit(tol=1e-13).params)


@pytest.mark.parametrize("whole", [False, True])
@pytest.mark.parametrize("family", ["binary", "count", "continuous"])
def test_refits_on_compact_counts_equal_statsmodels_frequency_weights(
        family: str, whole: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    """Each replicate's coefficients from the uint8 draw counts are statsmodels' GLM on those
    counts as frequency weights (source: statsmodels GLM ``freq_weights``), on the
    small-sample solver and on the all-replicates one (forced by size), and bit for bit the
    refits on the same weights in float64."""
    if whole:
        monkeypatch.setattr(weighted, "_WHOLE_ROWS", 0)
    n = 2500
    X, o, fam, off = _family_data(family, n, {"binary": 1, "count": 2, "continuous": 3}[family])
    start = _statsmodels(X, o, fam, off, np.ones(n))
    R = design_resample_replicates(np.random.default_rng(21), o, 4)
    assert isinstance(R, Replicates) and R.counts.dtype == np.uint8 and R.scale is None
    model = WeightedGLM(family, X, o, start)
    assert model.whole == whole
    got = model.coef(R)
    assert np.array_equal(got, model.coef(R.dense()))  # the float64 weights: the same bits
    for b in range(len(R)):
        want = _statsmodels(X, o, fam, off, R.counts[b].astype(float))
        np.testing.assert_allclose(got[b], want, rtol=1e-8, atol=1e-10, err_msg=family)


@pytest.mark.parametrize("whole", [False, True])
@pytest.mark.parametrize("family", ["binary", "count", "continuous"])
def test_compact_counts_keep_sampling_weights_that_are_not_whole_numbers(
        family: str, whole: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    """With sampling weights (not whole numbers) a row's refit weight is its draw count x its
    weight: the refits equal statsmodels' GLM with those products as weights (the weighted
    pseudo-likelihood; source: statsmodels GLM ``freq_weights``, which accepts any positive
    weights), and the dense weights are the products. Dropping or rounding the weights in the
    compact form fails here."""
    if whole:
        monkeypatch.setattr(weighted, "_WHOLE_ROWS", 0)
    n = 2000
    X, o, fam, off = _family_data(family, n, {"binary": 4, "count": 5, "continuous": 6}[family])
    w = np.random.default_rng(7).uniform(0.3, 3.7, n)
    o = Outcome(o.family, o.y, offset=o.offset, weights=w, weight_kind="sampling")
    R = design_resample_replicates(np.random.default_rng(22), o, 3)
    assert R.counts.dtype == np.uint8 and R.scale is not None
    dense = design_resample_weights(np.random.default_rng(22), o, 3)
    assert np.array_equal(R.dense(), dense)
    np.testing.assert_array_equal(dense, R.counts * w)
    assert not np.allclose(dense, np.rint(dense))  # the weights are not whole numbers
    start = _statsmodels(X, o, fam, off, w)
    got = WeightedGLM(family, X, o, start).coef(R)
    for b in range(len(R)):
        want = _statsmodels(X, o, fam, off, R.counts[b] * w)
        np.testing.assert_allclose(got[b], want, rtol=1e-8, atol=1e-10, err_msg=family)
        unweighted = _statsmodels(X, o, fam, off, R.counts[b].astype(float))
        assert not np.allclose(got[b], unweighted, rtol=1e-6)  # the weights matter


def test_compact_draws_are_numpy_draws() -> None:
    """Rows: the counts of ``Generator.integers(0, n, size=(B, n))`` per row (source: numpy);
    frequency weights without a cluster: ``Generator.multinomial(N, w / N, size=B)`` drawn
    at once, here with counts past 255 (the compact type widens), and the generator ends in
    the same state."""
    n, B = 3000, 5
    o = Outcome("binary", np.zeros(n))
    ref = np.random.default_rng(3)
    idx = ref.integers(0, n, size=(B, n))
    R = design_resample_replicates(np.random.default_rng(3), o, B)
    np.testing.assert_array_equal(R.counts, [np.bincount(i, minlength=n) for i in idx])
    w = np.r_[900.0, 1.0, 2.0, np.full(40, 3.0)]
    of = Outcome("binary", np.zeros(w.size), weights=w, weight_kind="frequency")
    rng, ref = np.random.default_rng(4), np.random.default_rng(4)
    R = design_resample_replicates(rng, of, 6)
    want = ref.multinomial(int(w.sum()), w / w.sum(), size=6)
    assert R.counts.dtype == np.uint16 and R.counts.max() > 255
    np.testing.assert_array_equal(R.counts, want)
    assert rng.integers(0, 2**31, 4).tolist() == ref.integers(0, 2**31, 4).tolist()
    np.testing.assert_array_equal(weighted.replicate_copies(of, R), (want > 0).astype(float))


def _pair_count_auc(y: np.ndarray, s: np.ndarray, c: np.ndarray) -> float:
    """Every (event, non-event) pair of copies counted c_i c_j: the event higher 1, tied 1/2."""
    ev, no = y, ~y
    si, sj = s[ev][:, None], s[no][None, :]
    cij = c[ev][:, None] * c[no][None, :]
    return float(((si > sj) * cij + 0.5 * (si == sj) * cij).sum() / cij.sum())


@pytest.mark.parametrize("decimals", [10, 2, 0])
def test_count_aucs_equal_a_weighted_pair_count(decimals: int) -> None:
    """Above the radix sort's threshold, with scores tied within and across the groups
    (rounded to ``decimals``) and draw counts as frequency weights: the weighted pair count
    (Hanley & McNeil 1982), and without counts the same count with every weight 1."""
    rng = np.random.default_rng(decimals)
    n = _RADIX_ROWS + 1500
    y = rng.uniform(size=n) < 0.2
    s = np.round(rng.normal(size=n) + 0.7 * y, decimals)
    counts = np.bincount(rng.integers(0, n, n), minlength=n).astype(np.uint8)
    got = count_aucs(y, s, [counts, None])
    assert got is not None
    assert got[0] == pytest.approx(_pair_count_auc(y, s, counts.astype(float)), abs=1e-12)
    assert got[1] == pytest.approx(_pair_count_auc(y, s, np.ones(n)), abs=1e-12)


def test_count_aucs_without_counts_equal_mann_whitney_u() -> None:
    """The AUC of every row once is U / (n1 n0), U scipy's Mann-Whitney statistic of the
    events' scores against the others' (ties counted one half; source: scipy.stats)."""
    rng = np.random.default_rng(31)
    for n, decimals in ((20_000, 10), (9_000, 1), (300, 1)):
        y = rng.uniform(size=n) < 0.15
        s = np.round(rng.normal(size=n) + 0.5 * y, decimals)
        got = count_aucs(y, s, [None])
        u = stats.mannwhitneyu(s[y], s[~y], alternative="two-sided").statistic
        assert got is not None
        assert got[0] == pytest.approx(u / (y.sum() * (~y).sum()), abs=1e-12)


@pytest.mark.parametrize("case", ["normal", "ties", "range", "heavy", "constant", "short"])
def test_ascending_order_sorts_as_numpy(case: str) -> None:
    """The radix order puts the scores in numpy's sorted order (source: ``np.sort``): ten
    decimals, heavy ties, a huge range (many scores in one 32-bit bucket), heavy tails, all
    equal, and a sample below the radix threshold."""
    rng = np.random.default_rng(len(case))
    n = 40 if case == "short" else 60_000
    s = {"normal": lambda: np.round(rng.normal(size=n), 10),
         "ties": lambda: np.round(rng.normal(size=n), 1),
         "range": lambda: np.r_[rng.normal(size=n - 2) * 1e-9, -1e12, 1e12],
         "heavy": lambda: np.round(rng.standard_cauchy(size=n), 10),
         "constant": lambda: np.full(n, 0.3),
         "short": lambda: rng.normal(size=n)}[case]()
    order = ascending_order(s)
    assert np.array_equal(np.sort(order), np.arange(n))
    assert np.array_equal(s[order], np.sort(s))
