"""Checks of the Cox refits of many bootstrap replicates at once
(``unbin.models.cox.refit_replicates``) against outside references.

References: lifelines' ``CoxPHFitter`` (Efron ties, strata, delayed entry through
``entry_col``, case weights through ``weights_col``; Davidson-Pilon C (2019), lifelines:
survival analysis in Python, JOSS 4:1317) on each replicate's drawn data set written out
(a row drawn k times as k rows), on lifelines' shipped Rossi recidivism data; and the engine's
own Newton fit (``fit_cox``, itself checked against lifelines and statsmodels in
``test_cox.py``) run to tol 1e-13 on the same drawn rows. The replicate refits stop once the
next step would change no row's linear predictor by more than 30 x tol (tol 1e-9), so their
linear predictors are held to that bound from the Newton fit's.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from lifelines import CoxPHFitter
from lifelines.datasets import load_rossi

import unbin.models.weighted as weighted
from unbin.models.base import Outcome
from unbin.models.cox import (
    Layout,
    NearStart,
    fit_cox,
    near_start,
    prepare_layout,
    refit_replicate,
    refit_replicates,
)

TIGHT = {"precision": 1e-14, "r_precision": 1e-16}
COLS = ["fin", "age", "prio", "mar", "paro"]
TOL = 1e-9
BOUND = 30 * TOL  # the replicate refits' stop: no linear predictor moves more than this


@pytest.fixture(scope="module")
def rossi() -> pd.DataFrame:
    """Rossi with invented delayed entry (seeded: 30% of the rows enter at a week before
    their exit week) and invented sampling weights in [0.5, 2]."""
    df = load_rossi()
    rng = np.random.default_rng(4242)
    late = rng.uniform(size=len(df)) < 0.3
    df["entry"] = np.floor(rng.uniform(0, 0.6, len(df)) * df["week"] * late)
    df["w"] = rng.uniform(0.5, 2.0, len(df))
    return df


def _copies(n: int, replicates: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return np.stack([np.bincount(rng.integers(0, n, n), minlength=n)
                     for _ in range(replicates)]).astype(float)


def _sample(df: pd.DataFrame, rows: np.ndarray | None = None, strata: bool = True,
            entry: bool = True) -> dict[str, object]:
    d = df if rows is None else df.iloc[rows]
    return {"time": d["week"].to_numpy(float), "event": d["arrest"].to_numpy(float),
            "entry": d["entry"].to_numpy(float) if entry else None,
            "strata": d["race"].to_numpy() if strata else None}


def _lp_apart(X: np.ndarray, a: np.ndarray, b: np.ndarray) -> float:
    return float(np.abs(X @ (a - b)).max())


def _prepared(df: pd.DataFrame, ties: str = "efron", strata: bool = True, entry: bool = True,
              weights: np.ndarray | None = None
              ) -> tuple[np.ndarray, dict[str, object], np.ndarray, Layout, NearStart]:
    """The design, the sample, the full-sample estimate, its layout and the refits' start."""
    X = df[COLS].to_numpy(float)
    s = _sample(df, strata=strata, entry=entry)
    kw = {"entry": s["entry"], "strata": s["strata"], "weights": weights}
    full = fit_cox(X, s["time"], s["event"], ties=ties, **kw)
    layout = prepare_layout(s["time"], s["event"], **kw)
    start = near_start(X, full.coef, layout, ties=ties)
    assert start is not None
    return X, s, full.coef, layout, start


@pytest.mark.parametrize("ties", ["efron", "breslow"])
@pytest.mark.parametrize("strata,entry", [(True, True), (False, False)])
def test_replicates_match_newton_and_one_at_a_time(
    rossi: pd.DataFrame, ties: str, strata: bool, entry: bool
) -> None:
    # reference: the engine's Newton fit to tol 1e-13 on each drawn data set (rows repeated
    # as drawn); and the one-at-a-time secant refit (refit_replicate), within the same bound
    X, s, _, layout, start = _prepared(rossi, ties, strata, entry)
    C = _copies(len(rossi), 10, 7)
    got = refit_replicates(start, X, layout, C, C, tol=TOL, with_loglik=True)
    assert got.done.all()
    for b in range(len(C)):
        m = np.repeat(np.arange(len(rossi)), C[b].astype(int))
        sb = _sample(rossi, m, strata, entry)
        ref = fit_cox(X[m], sb["time"], sb["event"], entry=sb["entry"], strata=sb["strata"],
                      ties=ties, tol=1e-13)
        assert ref.converged
        assert _lp_apart(X[m], got.coef[b], ref.coef) <= BOUND
        assert got.loglik[b] == pytest.approx(ref.loglik, abs=1e-8)
        lay = prepare_layout(sb["time"], sb["event"], entry=sb["entry"], strata=sb["strata"])
        one = refit_replicate(start, X, m, lay, tol=TOL)
        assert one is not None
        assert _lp_apart(X[m], got.coef[b], one[0]) <= BOUND


def test_a_looser_stop_fails_the_bound(rossi: pd.DataFrame) -> None:
    # the comparison above can fail: stopped at tol 1e-5 (a bound of 3e-4 on the linear
    # predictor), some replicate ends farther than 30 x 1e-9 from Newton's maximum
    X, _, _, layout, start = _prepared(rossi)
    C = _copies(len(rossi), 6, 11)
    loose = refit_replicates(start, X, layout, C, C, tol=1e-5)
    apart = []
    for b in range(len(C)):
        m = np.repeat(np.arange(len(rossi)), C[b].astype(int))
        sb = _sample(rossi, m)
        ref = fit_cox(X[m], sb["time"], sb["event"], entry=sb["entry"], strata=sb["strata"],
                      tol=1e-13)
        apart.append(_lp_apart(X[m], loose.coef[b], ref.coef))
    assert max(apart) > BOUND


@pytest.mark.parametrize("weighted_rows", [False, True])
def test_replicates_match_lifelines(rossi: pd.DataFrame, weighted_rows: bool) -> None:
    # reference: lifelines CoxPHFitter (Efron ties; strata, entry_col and, with case
    # weights, weights_col) on each drawn data set written out, a row drawn k times as k
    # rows each with its own weight (Efron's d counts the copies, the tied terms take
    # their mean weight, as lifelines' weighted Efron does)
    w = rossi["w"].to_numpy(float) if weighted_rows else None
    X, _, _, layout, start = _prepared(rossi, weights=w)
    C = _copies(len(rossi), 3, 23)
    got = refit_replicates(start, X, layout, C, C if w is None else C * w, tol=TOL)
    assert got.done.all()
    for b in range(len(C)):
        m = np.repeat(np.arange(len(rossi)), C[b].astype(int))
        drawn = rossi.iloc[m][COLS + ["week", "arrest", "entry", "race", "w"]]
        drawn = drawn.reset_index(drop=True)
        if not weighted_rows:
            drawn = drawn.drop(columns="w")
        cph = CoxPHFitter().fit(drawn, "week", "arrest", entry_col="entry", strata=["race"],
                                weights_col="w" if weighted_rows else None,
                                robust=weighted_rows, fit_options=TIGHT)
        np.testing.assert_allclose(got.coef[b], cph.params_[COLS].to_numpy(), rtol=1e-6)


def test_failing_replicates_go_one_at_a_time(rossi: pd.DataFrame) -> None:
    # a replicate without events and one whose drawn rows are all unmarried (the 'mar'
    # column constant among them) are not done here; the one-at-a-time path declines them
    # too and fit_cox reports why (its messages: common practice, checked in test_cox.py)
    X, s, coef, layout, start = _prepared(rossi)
    n = len(rossi)
    C = _copies(n, 4, 31)
    censored = np.flatnonzero(rossi["arrest"].to_numpy() == 0)
    C[1] = np.bincount(np.random.default_rng(1).choice(censored, n), minlength=n)
    single = np.flatnonzero(rossi["mar"].to_numpy() == 0)
    C[2] = np.bincount(np.random.default_rng(2).choice(single, n), minlength=n)
    got = refit_replicates(start, X, layout, C, C)
    assert got.done.tolist() == [True, False, False, True]
    assert np.isnan(got.coef[[1, 2]]).all()
    # without events: fit_cox says so (on the drawn rows without strata, whose layout the
    # engine lays out; with the strata laying out such rows raises, and the resampling
    # tables skip the replicate)
    m = np.repeat(np.arange(n), C[1].astype(int))
    sb = _sample(rossi, m, strata=False)
    f = fit_cox(X[m], sb["time"], sb["event"], entry=sb["entry"])
    assert not f.converged and "no events" in f.message
    m = np.repeat(np.arange(n), C[2].astype(int))
    sb = _sample(rossi, m)
    lay = prepare_layout(sb["time"], sb["event"], entry=sb["entry"], strata=sb["strata"])
    assert refit_replicate(start, X, m, lay) is None
    f = fit_cox(X[m], sb["time"], sb["event"], entry=sb["entry"], strata=sb["strata"],
                layout=lay)
    assert not f.converged
    assert "column(s) [3] are constant" in f.message

    # through weighted_cox_designs: the same NaN rows and estimates as the one-at-a-time path
    o = Outcome("survival", s["event"], time=s["time"], entry=s["entry"], strata=s["strata"])
    batched = weighted.weighted_cox_designs([(X, coef)], o, C)[0]
    o_single = Outcome("survival", s["event"], time=s["time"], entry=s["entry"],
                       strata=s["strata"])
    old = weighted._BATCH_MIN
    weighted._BATCH_MIN = 10**9
    try:
        one = weighted.weighted_cox_designs([(X, coef)], o_single, C)[0]
    finally:
        weighted._BATCH_MIN = old
    assert np.array_equal(np.isnan(batched), np.isnan(one))
    assert np.isnan(batched[[1, 2]]).all()
    for b in (0, 3):
        m = np.repeat(np.arange(n), C[b].astype(int))
        assert _lp_apart(X[m], batched[b], one[b]) <= BOUND


def test_many_strata_and_blocks() -> None:
    # reference: the engine's Newton fit to tol 1e-13; 80 strata (the extended-precision
    # sums restarted per stratum) and blocks of one replicate (min_width 1, tiny blocks)
    rng = np.random.default_rng(515)
    n = 1600
    X = np.column_stack([rng.normal(size=n), rng.binomial(1, 0.4, n)])
    stratum = rng.integers(0, 80, n)
    latent = rng.exponential(1 / np.exp(X @ np.array([0.5, -0.4]) - 1.0))
    censor = rng.exponential(2.0, n)
    time = np.ceil(np.minimum(latent, censor) * 10)
    event = (latent <= censor).astype(float)
    entry = np.floor(rng.uniform(0, 0.5, n) * time * (rng.uniform(size=n) < 0.3))
    full = fit_cox(X, time, event, entry=entry, strata=stratum)
    layout = prepare_layout(time, event, entry=entry, strata=stratum)
    start = near_start(X, full.coef, layout)
    assert start is not None
    C = _copies(n, 5, 3)
    wide = refit_replicates(start, X, layout, C, C)
    narrow = refit_replicates(start, X, layout, C, C, block_cells=1, min_width=1)
    assert wide.done.all() and narrow.done.all()
    np.testing.assert_allclose(narrow.coef, wide.coef, rtol=0, atol=1e-12)
    for b in range(len(C)):
        m = np.repeat(np.arange(n), C[b].astype(int))
        ref = fit_cox(X[m], time[m], event[m], entry=entry[m], strata=stratum[m], tol=1e-13)
        assert _lp_apart(X[m], wide.coef[b], ref.coef) <= BOUND


def test_null_model_loglik(rossi: pd.DataFrame) -> None:
    # reference: fit_cox's log partial likelihood of a design without columns on each drawn
    # data set (the engine's, checked against lifelines and statsmodels in test_cox.py)
    X, s, coef, _, _ = _prepared(rossi)
    o = Outcome("survival", s["event"], time=s["time"], entry=s["entry"], strata=s["strata"])
    null = np.zeros((len(rossi), 0))
    starts = weighted.cox_near_starts(o, [null, X], [np.zeros(0), coef])
    assert starts[0] is None and starts[1] is not None
    C = _copies(len(rossi), 5, 41)
    got = weighted.cox_replicate_refits(o, [null, X], starts, C, with_loglik=True)
    assert got[0] is not None and got[0].done.all()
    for b in range(len(C)):
        m = np.repeat(np.arange(len(rossi)), C[b].astype(int))
        sb = _sample(rossi, m)
        ref = fit_cox(null[m], sb["time"], sb["event"], entry=sb["entry"], strata=sb["strata"])
        assert got[0].loglik[b] == pytest.approx(ref.loglik, rel=1e-12)
