"""The Fine–Gray fit's compiled risk-set sums and row weights (``models/compiled/fine_gray_sums.py``)
against the numpy path (both forced with ``UNBIN_COMPILED``: the same numbers bit for bit) and,
compiled, a whole fit against an outside reference: lifelines' ``CoxPHFitter`` (Efron ties,
case weights, delayed entry, strata) on the counting-process expansion's rows (Geskus 2011),
which is the Fine–Gray model's weighted Cox likelihood."""

from __future__ import annotations

import numpy as np
import pytest

from helpers import assert_same_fields, lifelines_on_expansion
from unbin.models import fine_gray
from unbin.models.base import Outcome
from unbin.models.competing import fine_gray_layout, fit_fine_gray


def _sample(seed: int, n: int, strata: bool) -> tuple[np.ndarray, Outcome]:
    """An invented cohort: times on a grid of 1/12 (tied event times), delayed entry for about
    half the rows (some entering at an event time), case weights, causes 0, 1 and 2."""
    rng = np.random.default_rng(seed)
    X = np.column_stack([rng.normal(size=n), rng.binomial(1, 0.4, n)])
    hazard = np.exp(0.5 * X[:, 0] - 0.3 * X[:, 1])
    t = np.ceil(rng.exponential(1.0 / hazard) * 12) / 12 + 1 / 12
    cause = rng.choice([0.0, 1.0, 2.0], n, p=[0.35, 0.35, 0.3])
    late = rng.random(n) < 0.5
    entry = np.where(late, np.floor(t * rng.random(n) * 12) / 12, 0.0)
    entry = np.minimum(entry, t - 1 / 12)
    o = Outcome("survival", (cause == 1).astype(float), time=t, entry=entry,
                weights=rng.uniform(0.5, 2.0, n), weight_kind="sampling",
                strata=rng.integers(0, 3, n) if strata else None, cause=cause,
                event_of_interest=1)
    return X, o


@pytest.mark.parametrize("strata", [False, True])
def test_compiled_sums_equal_the_numpy_path_bit_for_bit(strata: bool,
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    X, o = _sample(3, 3000, strata)
    assert o.cause is not None
    L = fine_gray_layout(o, o.cause, 1)
    assert L.late.size and L.comp.size and L.tied
    rng = np.random.default_rng(4)
    r = np.asarray(o.weights) * np.exp(rng.normal(size=o.n))
    cols = np.column_stack([np.ones(o.n), X])
    c = rng.uniform(size=L.K)
    got = {}
    for mode in ("never", "always"):
        monkeypatch.setenv("UNBIN_COMPILED", mode)
        got[mode] = (fine_gray.risk_sum0(L, r), fine_gray.risk_sums(L, r, cols),
                     fine_gray.row_weights(L, r, c))
    for numpy_path, compiled_path in zip(got["never"], got["always"], strict=True):
        assert np.array_equal(numpy_path, compiled_path)
    # the first column of the sums is S0 itself
    assert np.array_equal(got["always"][1][:, 0], got["always"][0])


@pytest.mark.parametrize("strata", [False, True])
def test_compiled_fit_equals_the_numpy_fit_and_lifelines_on_the_expansion(
        strata: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    """Coefficients, covariance (sandwich with the weights' estimation terms), log partial
    likelihood and baseline the same bit for bit on both paths; lifelines on the expanded rows
    (its Newton run to its tightest tolerances): coefficients to 1e-7, log partial likelihood
    to 1e-9 relative."""
    X, o = _sample(8, 400, strata)
    assert o.cause is not None
    fits = {}
    for mode in ("never", "always"):
        monkeypatch.setenv("UNBIN_COMPILED", mode)
        fits[mode] = fit_fine_gray(X, o, o.cause, 1, ("x", "z"))
        o.cache.clear()
    a, b = fits["never"], fits["always"]
    assert a.ok and b.ok
    assert np.array_equal(a.coef, b.coef) and np.array_equal(a.cov, b.cov)
    assert a.loglik == b.loglik
    assert np.array_equal(a.extra["baseline"]["cumhaz"], b.extra["baseline"]["cumhaz"])
    cph = lifelines_on_expansion(X, o, o.cause, ("x", "z"))
    np.testing.assert_allclose(b.coef, cph.params_[["x", "z"]].to_numpy(float), atol=1e-7)
    assert b.loglik == pytest.approx(float(cph.log_likelihood_), rel=1e-9)


def test_compiled_replicate_refit_equals_the_numpy_path_and_lifelines(
        monkeypatch: pytest.MonkeyPatch) -> None:
    """A bootstrap replicate's refit from the full sample's start (``fine_gray_replicate``, the
    drawn rows repeated as drawn; its design gathered and standardised by the compiled pass)
    the same bit for bit on both paths, and against lifelines' CoxPHFitter on the replicate's
    own counting-process expansion (the weights re-estimated on it): coefficients to 1e-7."""
    from unbin.models.competing import fine_gray_replicate

    X, o = _sample(12, 400, True)
    assert o.cause is not None
    m = np.sort(np.random.default_rng(6).integers(0, o.n, o.n))
    got = {}
    for mode in ("never", "always"):
        monkeypatch.setenv("UNBIN_COMPILED", mode)
        o.cache.clear()
        start = fit_fine_gray(X, o, o.cause, 1, ("x", "z")).coef
        rep = o.subset(m)
        got[mode] = fine_gray_replicate(X, m, rep, o, start)
    (a, base_a), (b, base_b) = got["never"], got["always"]
    assert a is not None and b is not None and base_a is not None and base_b is not None
    assert np.array_equal(a, b)
    assert np.array_equal(base_a["cumhaz"], base_b["cumhaz"])
    rep = o.subset(m)
    assert rep.cause is not None
    cph = lifelines_on_expansion(X[m], rep, rep.cause, ("x", "z"))
    np.testing.assert_allclose(b, cph.params_[["x", "z"]].to_numpy(float), atol=1e-7)


def test_compiled_gather_keeps_numpys_nan_bounds() -> None:
    """The compiled gather's column ranges follow numpy's maximum and minimum, NaN included
    (numpy: a NaN among the values makes both NaN)."""
    from unbin.models.compiled import fine_gray_sums

    rng = np.random.default_rng(2)
    X = rng.normal(size=(50, 3))
    X[7, 1] = np.nan
    rows = rng.integers(0, 50, 60)
    used = np.flatnonzero(rng.random(60) < 0.7)
    rows[used[0]] = 7  # the NaN is among the rows used
    mean = np.array([X[:, 0].mean(), 0.0, X[:, 2].mean()])
    inv = np.array([1.5, 2.0, 0.5])
    Xs, bounds = fine_gray_sums.gather_standardised(X, rows.astype(np.int64), mean, inv, used)
    ref = (X[rows] - mean) * inv
    assert np.array_equal(Xs, ref, equal_nan=True)
    assert np.array_equal(bounds[0], ref[used].max(axis=0), equal_nan=True)
    assert np.array_equal(bounds[1], ref[used].min(axis=0), equal_nan=True)


@pytest.mark.parametrize("strata", [False, True])
def test_a_samples_layout_from_its_grids_is_the_searched_one(strata: bool) -> None:
    """``fine_gray_layout`` (from the sample's cached sorted times and each row's place in
    them) field by field the layout ``fine_gray.prepare`` makes searching the times itself,
    with ``G`` and ``H`` from ``censoring_survival_before`` and ``entry_distribution`` (bit
    for bit). A structural check; the layout's fit is checked against lifelines above."""
    from unbin.models.competing import censoring_survival_before, entry_distribution

    X, o = _sample(21, 2500, strata)
    assert o.time is not None and o.cause is not None and o.entry is not None
    t, c, e, w = o.time, o.cause, o.entry, np.asarray(o.weights)

    def Q_at(at: np.ndarray) -> np.ndarray:
        return censoring_survival_before(t, c, e, w, at) * entry_distribution(t, e, w, at)

    ref = fine_gray.prepare(t, c, 1, entry=e, weights=w, strata=o.strata, Q_at=Q_at)
    assert_same_fields(fine_gray_layout(o, o.cause, 1), ref)
