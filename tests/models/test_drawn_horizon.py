"""The Breslow baseline at a horizon of a bootstrap draw given as draw counts on the sample's
rows (unbin.models.cox.baseline.DrawnHorizon) and the standardised survival built on it
(unbin.refit.standardise.drawn_cox_risks), against outside references on the repeated rows.

References: lifelines (CoxPHFitter.baseline_cumulative_hazard_ with strata, Breslow, at the
column means; CoxTimeVaryingFitter.baseline_cumulative_hazard_ with (entry, time] intervals;
CoxPHFitter.predict_survival_function), and the numpy path it stands in for
(baseline_steps of the repeated rows, read at the horizon by refit.risk.cumhaz_at).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from lifelines import CoxPHFitter, CoxTimeVaryingFitter

from unbin.models.cox import prepare_layout
from unbin.models.cox.baseline import DrawnHorizon, baseline_steps
from unbin.refit.risk import cumhaz_at
from unbin.refit.standardise import cox_risks, drawn_cox_risks

TIGHT = {"precision": 1e-14, "r_precision": 1e-16}
COLS = ["x1", "x2"]


@pytest.fixture(scope="module")
def cohort() -> pd.DataFrame:
    """Tied whole-number times (as days), 3 strata, late entry for half the rows."""
    rng = np.random.default_rng(40417)
    n = 600
    x = np.column_stack([rng.normal(size=n), rng.binomial(1, 0.4, n)])
    stratum = rng.integers(0, 3, n)
    latent = rng.exponential(1 / np.exp(x @ np.array([0.5, -0.4]) - 1.5 + 0.3 * stratum))
    censor = rng.exponential(2.0, n)
    time = np.ceil(np.minimum(latent, censor) * 4)
    late = rng.uniform(size=n) < 0.5
    entry = np.floor(rng.uniform(0, 0.8, n) * time * late)
    return pd.DataFrame(x, columns=COLS).assign(T=time, E=(latent <= censor).astype(float),
                                                S=stratum, entry=entry)


def _draw(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    counts = np.random.default_rng(seed).multinomial(n, np.full(n, 1.0 / n))
    return counts, np.repeat(np.arange(n), counts)


def _stratified_fit(cohort: pd.DataFrame, seed: int
                    ) -> tuple[np.ndarray, np.ndarray, pd.DataFrame, CoxPHFitter]:
    """A draw of the cohort's rows (counts, repeated row indices), the repeated rows and
    lifelines' stratified Cox model fitted on them."""
    counts, rows = _draw(len(cohort), seed)
    rep = cohort.iloc[rows].reset_index(drop=True)
    cph = CoxPHFitter().fit(rep[COLS + ["T", "E", "S"]], "T", "E", strata=["S"],
                            fit_options=TIGHT)
    return counts, rows, rep, cph


def test_strata_match_lifelines_on_the_repeated_rows(cohort: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter(strata=...) fitted on the drawn rows repeated; its
    # baseline is at the drawn rows' column means, ours at the linear predictor centred on
    # the draw (the same point); the horizon is an event time, so no interpolation
    counts, _, _, cph = _stratified_fit(cohort, 3)
    b = cph.params_.to_numpy()
    X = cohort[COLS].to_numpy()
    eta = X @ b
    eta -= float(counts @ eta) / counts.sum()
    horizon = 6.0
    layout = prepare_layout(cohort["T"], cohort["E"], strata=cohort["S"])
    got = DrawnHorizon(layout, horizon, cohort["S"].to_numpy()).cumhaz(eta, counts)
    for s in range(3):
        ref = cph.baseline_cumulative_hazard_[s]
        want = float(ref[ref.index <= horizon].iloc[-1])
        assert got[s] == pytest.approx(want, rel=1e-6)


def test_delayed_entry_matches_lifelines_start_stop(cohort: pd.DataFrame) -> None:
    # source: lifelines CoxTimeVaryingFitter (entry, time] on the repeated rows (one
    # stratum); its baseline is at the drawn rows' column means, as ours here
    counts, rows = _draw(len(cohort), 11)
    rep = cohort.iloc[rows].reset_index(drop=True)
    ctv = CoxTimeVaryingFitter().fit(rep[COLS + ["T", "E", "entry"]].assign(id=np.arange(len(rep))),
                                     id_col="id", event_col="E", start_col="entry",
                                     stop_col="T")
    b = ctv.params_.to_numpy()
    X = cohort[COLS].to_numpy()
    eta = X @ b
    eta -= float(counts @ eta) / counts.sum()
    layout = prepare_layout(cohort["T"], cohort["E"], entry=cohort["entry"])
    ref = ctv.baseline_cumulative_hazard_.iloc[:, 0]
    for horizon in (3.0, 6.0, 9.0):
        got = DrawnHorizon(layout, horizon).cumhaz(eta, counts)
        want = float(ref[ref.index <= horizon].iloc[-1])
        assert got[0] == pytest.approx(want, rel=1e-6)


@pytest.mark.parametrize("offset", [0.0, 600.0])
def test_equals_the_baseline_steps_of_the_repeated_rows(cohort: pd.DataFrame,
                                                        offset: float) -> None:
    # reference: baseline_steps on the repeated rows' own layout (sorted, risk sets), read at
    # the horizon by cumhaz_at (the numpy path the draw counts stand in for), with strata and
    # late entry; offset 600 puts the linear predictor past the unshifted exp's safe range
    # (the baseline at 0 on its scale then near 1e-260);
    # one stratum has no drawn event by the horizon (0) and the horizon 30 is past the
    # strata's last event times (held)
    df = cohort.copy()
    df.loc[(df["S"] == 2) & (df["T"] <= 4), "E"] = 0.0
    n = len(df)
    counts, rows = _draw(n, 5)
    X = df[COLS].to_numpy()
    eta = X @ np.array([0.4, -0.3])
    eta += offset - float(counts @ eta) / counts.sum()
    layout = prepare_layout(df["T"], df["E"], entry=df["entry"], strata=df["S"])
    for horizon in (4.0, 7.0, 30.0):
        got = DrawnHorizon(layout, horizon, df["S"].to_numpy()).cumhaz(eta, counts)
        steps = baseline_steps(eta[rows][:, None], df["T"].to_numpy()[rows],
                               df["E"].to_numpy()[rows], [1.0],
                               entry=df["entry"].to_numpy()[rows],
                               strata=df["S"].to_numpy()[rows])
        want, _, _ = cumhaz_at(steps, np.arange(3), 3, horizon)
        np.testing.assert_allclose(got, want, rtol=1e-10, atol=0)
        if horizon == 4.0:
            assert got[2] == 0.0  # no drawn event of stratum 2 by the horizon


def test_standardised_survival_matches_lifelines(cohort: pd.DataFrame) -> None:
    # source: lifelines CoxPHFitter(strata=...).predict_survival_function on the repeated rows
    # with the exposure x1 set to each value (g-computation: 1 - the mean survival)
    counts, rows, rep, cph = _stratified_fit(cohort, 8)
    b = cph.params_.to_numpy()
    horizon = 6.0
    layout = prepare_layout(cohort["T"], cohort["E"], strata=cohort["S"])
    at_h = DrawnHorizon(layout, horizon, cohort["S"].to_numpy())
    at = [np.array([1.0]), np.array([-0.5])]
    got = drawn_cox_risks(at_h, cohort[COLS].to_numpy(), 1, b, at, counts.astype(float))
    for j, a in enumerate(at):
        surv = cph.predict_survival_function(rep[COLS + ["S"]].assign(x1=a[0]),
                                             times=[horizon]).to_numpy().ravel()
        assert got[j] == pytest.approx(1.0 - surv.mean(), rel=1e-6)
    # and cox_risks of the repeated rows (the path it stands in for), to rounding
    want, _ = cox_risks(cohort[COLS].to_numpy()[rows], 1, b, at, rep["T"].to_numpy(),
                        rep["E"].to_numpy(), horizon, strata=rep["S"].to_numpy())
    np.testing.assert_allclose(got, want, rtol=1e-12)


def test_refuses_a_weighted_layout_and_missing_strata(cohort: pd.DataFrame) -> None:
    weighted = prepare_layout(cohort["T"], cohort["E"], weights=np.full(len(cohort), 2.0))
    with pytest.raises(ValueError, match="unweighted"):
        DrawnHorizon(weighted, 5.0)
    stratified = prepare_layout(cohort["T"], cohort["E"], strata=cohort["S"])
    with pytest.raises(ValueError, match="give strata"):
        DrawnHorizon(stratified, 5.0)
