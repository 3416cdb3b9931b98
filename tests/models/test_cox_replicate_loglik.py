"""Checks of the replicate refits that report only the log partial likelihood at the maximum
(``unbin.models.cox.replicate_loglik.refit_replicate_loglik``, the information bootstrap's).

References: lifelines' ``CoxPHFitter`` (Efron ties, strata, delayed entry through
``entry_col``; Davidson-Pilon C (2019), lifelines: survival analysis in Python, JOSS 4:1317)
run to a tight tolerance on each replicate's drawn data set written out (a row drawn k times
as k rows), on lifelines' shipped Rossi recidivism data with invented delayed entry; and the
engine's own Newton fit (``fit_cox``, checked against lifelines and statsmodels in
``test_cox.py``) to tol 1e-13 on the same rows. The refits stop once the next step's
predicted gain is at most LOGLIK_GAIN (1e-6); the value reported (the quadratic model's) is
off by a fraction of that gain (the secant inverse's relative error), held here to a tenth
of it.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from lifelines import CoxPHFitter
from lifelines.datasets import load_rossi

from unbin.models.cox import fit as cox_fit
from unbin.models.cox import fit_cox, near_start, prepare_layout, refit_replicate, replicate_loglik
from unbin.models.cox.replicate_loglik import LOGLIK_GAIN, refit_replicate_loglik

TIGHT = {"precision": 1e-14, "r_precision": 1e-16}
COLS = ["fin", "age", "prio", "mar", "paro"]


@pytest.fixture(scope="module")
def rossi() -> pd.DataFrame:
    """Rossi with invented delayed entry (seeded: 30% of the rows enter at a week before
    their exit week)."""
    df = load_rossi()
    rng = np.random.default_rng(4242)
    late = rng.uniform(size=len(df)) < 0.3
    df["entry"] = np.floor(rng.uniform(0, 0.6, len(df)) * df["week"] * late)
    return df


def _drawn(df: pd.DataFrame, replicates: int, seed: int) -> list[np.ndarray]:
    """Each replicate's drawn rows, a row drawn k times repeated k times, in row order."""
    rng = np.random.default_rng(seed)
    n = len(df)
    return [np.repeat(np.arange(n), np.bincount(rng.integers(0, n, n), minlength=n))
            for _ in range(replicates)]


def _start(df: pd.DataFrame):  # type: ignore[no-untyped-def]
    X = df[COLS].to_numpy(float)
    time, event = df["week"].to_numpy(float), df["arrest"].to_numpy(float)
    entry, strata = df["entry"].to_numpy(float), df["race"].to_numpy()
    full = fit_cox(X, time, event, entry=entry, strata=strata)
    layout = prepare_layout(time, event, entry=entry, strata=strata)
    start = near_start(X, full.coef, layout)
    assert start is not None
    return X, time, event, entry, strata, start


@pytest.mark.parametrize("mode", ["never", "always"])
def test_loglik_matches_lifelines_and_newton(rossi: pd.DataFrame, mode: str,
                                             monkeypatch: pytest.MonkeyPatch) -> None:
    # references: lifelines' log partial likelihood at its maximum and fit_cox's to tol
    # 1e-13 on each drawn data set; both paths (numpy and compiled: the compiled one copies
    # the replicate's design from the full sample's sorted design)
    monkeypatch.setenv("UNBIN_COMPILED", mode)
    X, time, event, entry, strata, start = _start(rossi)
    for m in _drawn(rossi, 6, 17):
        layout = prepare_layout(time[m], event[m], entry=entry[m], strata=strata[m])
        got = refit_replicate_loglik(start, X, m, layout)
        assert got is not None
        ref = fit_cox(X[m], time[m], event[m], entry=entry[m], strata=strata[m], tol=1e-13)
        assert ref.converged
        assert got == pytest.approx(ref.loglik, abs=0.1 * LOGLIK_GAIN)
        drawn = rossi.iloc[m][COLS + ["week", "arrest", "entry", "race"]]
        cph = CoxPHFitter().fit(drawn.reset_index(drop=True), "week", "arrest",
                                entry_col="entry", strata=["race"], fit_options=TIGHT)
        assert got == pytest.approx(cph.log_likelihood_, abs=0.1 * LOGLIK_GAIN)


def test_fewer_evaluations_than_the_coefficient_refit(rossi: pd.DataFrame,
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    # the same steps as refit_replicate until the predicted gain is below LOGLIK_GAIN: never
    # more evaluations, fewer in total, and where both stop at the same point the same value
    X, time, event, entry, strata, start = _start(rossi)
    calls = {"loglik": 0, "coef": 0}
    real = cox_fit._evaluate

    def counted(key: str):  # type: ignore[no-untyped-def]
        def evaluate(*a, **k):  # type: ignore[no-untyped-def]
            calls[key] += 1
            return real(*a, **k)
        return evaluate

    fewer = 0
    for m in _drawn(rossi, 8, 29):
        layout = prepare_layout(time[m], event[m], entry=entry[m], strata=strata[m])
        calls.update(loglik=0, coef=0)
        monkeypatch.setattr(replicate_loglik, "_evaluate", counted("loglik"))
        got = refit_replicate_loglik(start, X, m, layout)
        monkeypatch.setattr(cox_fit, "_evaluate", counted("coef"))
        old = refit_replicate(start, X, m, layout, with_loglik=True)
        monkeypatch.setattr(cox_fit, "_evaluate", real)
        assert got is not None and old is not None
        assert calls["loglik"] <= calls["coef"]
        if calls["loglik"] == calls["coef"]:
            assert got == old[1]
        fewer += calls["loglik"] < calls["coef"]
        assert got == pytest.approx(old[1], abs=0.1 * LOGLIK_GAIN)
    assert fewer > 0


def test_declines_where_refit_replicate_does(rossi: pd.DataFrame) -> None:
    # a replicate whose drawn rows are all unmarried ('mar' constant among them): declined,
    # as refit_replicate declines it (fit_cox then reports the constant column)
    X, time, event, entry, strata, start = _start(rossi)
    single = np.flatnonzero(rossi["mar"].to_numpy() == 0)
    m = np.sort(np.random.default_rng(2).choice(single, len(rossi)))
    layout = prepare_layout(time[m], event[m], entry=entry[m], strata=strata[m])
    assert refit_replicate(start, X, m, layout) is None
    assert refit_replicate_loglik(start, X, m, layout) is None
