"""The subdistribution table's variance choice (``outcome.subdistribution_variance``)."""

from __future__ import annotations

import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from lifelines import CoxTimeVaryingFitter

from helpers import load_check
from unbin.data import analysis_sample
from unbin.questions.subdistribution import PURPOSE, subdistribution_table
from unbin.refit.analysis import Refit, refit_analysis
from unbin.spec import Spec, parse_spec

COMPETING = {"type": "survival", "event": "ev", "time": "t", "horizon": 1.0,
             "event_of_interest": 1, "competing": [2]}


def _frame(n: int, seed: int, beta: float = 0.5, delayed: bool = False) -> pd.DataFrame:
    """Fine & Gray's (1999, sec. 5) design, drawn by the check's own simulator
    (``benchmarks/checks/fine_gray.py``): log subdistribution hazard ratio ``beta`` per unit
    of x, optionally with heavy delayed entry (column L)."""
    a = load_check("fine_gray").draw(n, beta, np.random.default_rng(seed), delayed=delayed)
    return pd.DataFrame({"x": a[:, 0], "t": a[:, 1], "ev": a[:, 2].astype(int), "L": a[:, 3]})


def _refit(df: pd.DataFrame, variance: str | None, bootstrap: int,
           delayed: bool = False) -> tuple[Spec, Refit]:
    outcome: dict[str, Any] = dict(COMPETING, **({"entry": "L"} if delayed else {}))
    if variance is not None:
        outcome["subdistribution_variance"] = variance
    raw = {"study": "sim", "cohorts": [{"name": "sim", "path": "sim.parquet"}],
           "groupings": {"x": {"cuts": [0.0]}},
           "analyses": [{"name": "a", "outcome": outcome, "exposure": "x",
                         "continuous": {"forms": ["linear"]}}],
           "resampling": {"bootstrap": bootstrap}, "seed": 7}
    spec = parse_spec(raw, base=Path("."))
    a = spec.analyses[0]
    return spec, refit_analysis(analysis_sample(df, a, spec), a, spec, "sim")


def _censoring_km_before(t: np.ndarray, ev: np.ndarray, s: float) -> float:
    """The Kaplan–Meier of the censoring time just before s, by a plain loop over the
    censoring times (an event tied with a censoring counts first; common practice, Fine &
    Gray 1999)."""
    g = 1.0
    for u in np.unique(t[ev == 0]):
        if u >= s:
            break
        g *= 1.0 - np.sum((t == u) & (ev == 0)) / np.sum(t >= u)
    return g


def _fine_gray_by_hand(t: np.ndarray, ev: np.ndarray, x: np.ndarray) -> float:
    """Fine & Gray's (1999) estimate, written out: the counting-process expansion built by a
    loop (a competing-event person j stays at risk after T_j, one row per later event time
    t_k of cause 1, with weight G(t_k-) / G(T_j-); Geskus 2011), fitted by lifelines'
    CoxTimeVaryingFitter with those weights."""
    tk = np.unique(t[ev == 1])
    rows = [(0.0, ti, float(ei == 1), xi, 1.0) for ti, ei, xi in zip(t, ev, x, strict=True)]
    for j in np.flatnonzero(ev == 2):
        gj = _censoring_km_before(t, ev, t[j])
        start = t[j]
        for s in tk[tk > t[j]]:
            rows.append((start, s, 0.0, x[j], _censoring_km_before(t, ev, s) / gj))
            start = s
    data = pd.DataFrame(rows, columns=["start", "stop", "event", "x", "w"])
    data = data[data["w"] > 0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # lifelines' advice on non-integer weights
        fit = CoxTimeVaryingFitter().fit(data, event_col="event", start_col="start",
                                         stop_col="stop", weights_col="w")
    return float(fit.params_["x"])


def _row(tab: pd.DataFrame) -> pd.Series:
    return tab[(tab["form"] == "linear") & (tab["adjustment"] == "none")].iloc[0]


def test_bootstrap_variance_is_the_spread_of_refits_on_the_specs_draws() -> None:
    """``subdistribution_variance: bootstrap``: the linear row's SE is the SD of the Fine–Gray
    slope over ``resampling.bootstrap`` resamples of the persons drawn from the spec's
    generator for this analysis (``Spec.rng(analysis, PURPOSE)``, ``Generator.choice`` of n
    rows), each refitted in this test by lifelines' CoxTimeVaryingFitter on an expansion
    built here with the censoring weights re-estimated by a loop. Tolerance 1e-4 relative
    (both fitters converge to ~1e-8). The sandwich row of the same data keeps the robust SE
    (different), and each row names its variance."""
    df = _frame(120, 31)
    B = 12
    spec, r = _refit(df, "bootstrap", B)
    tab = subdistribution_table(r, spec)
    row = _row(tab)
    assert (tab["variance"] == "bootstrap").all() and (tab["bootstrap_ok"] == B).all()
    rng = spec.rng("a", PURPOSE)
    t, ev, x = (df[c].to_numpy() for c in ("t", "ev", "x"))
    slopes = []
    for _ in range(B):
        pick = rng.choice(np.arange(len(df)), size=len(df), replace=True)
        slopes.append(_fine_gray_by_hand(t[pick], ev[pick], x[pick]))
    dx = row["x_value"] - row["x_reference"]
    assert row["se"] == pytest.approx(abs(dx) * np.std(slopes, ddof=1), rel=1e-4)
    assert row["estimate"] == pytest.approx(dx * _fine_gray_by_hand(t, ev, x), rel=1e-5)
    spec_s, r_s = _refit(df, None, B)
    sandwich = subdistribution_table(r_s, spec_s)
    assert (sandwich["variance"] == "sandwich").all() and sandwich["bootstrap_ok"].isna().all()
    assert _row(sandwich)["estimate"] == pytest.approx(row["estimate"], rel=1e-12)
    assert abs(_row(sandwich)["se"] / row["se"] - 1) > 1e-3
    # the Wald limits use the bootstrap SE
    assert row["upper"] - row["lower"] == pytest.approx(2 * 1.959963984540054 * row["se"],
                                                        rel=1e-9)


def test_too_few_refitted_resamples_fail_the_row_with_a_message() -> None:
    """Every resample's refit fails (the Fine–Gray refit replaced by a failing one): the rows
    are recorded as failed with the reason and the count, not raised."""
    import unbin.models.competing as competing

    df = _frame(80, 5)
    spec, r = _refit(df, "bootstrap", 4)
    original = competing.fine_gray_layout

    def failing(outcome: Any, cause: np.ndarray, interest: int) -> Any:
        if outcome is not r.outcome:  # the full sample's layout works; the resamples' not
            raise ValueError("no rows")
        return original(outcome, cause, interest)

    mp = pytest.MonkeyPatch()
    mp.setattr(competing, "fine_gray_layout", failing)
    try:
        tab = subdistribution_table(r, spec)
    finally:
        mp.undo()
    assert (tab["status"] == "failed").all()
    assert tab["message"].str.contains("only 0 of 4 bootstrap resamples could be refitted").all()
    assert (tab["bootstrap_ok"] == 0).all() and tab["se"].isna().all()
    assert tab["estimate"].notna().all()


@pytest.mark.slow
def test_bootstrap_standard_error_matches_the_spread_over_replicate_datasets() -> None:
    """Operating characteristic, heavy delayed entry (``benchmarks/checks/fine_gray.py``'s
    design, entry uniform on 0–1.5, log SHR 0.5, n = 200): over 40 seeded datasets the mean
    bootstrap SE of the linear row (50 resamples each) is 0.75..1.3 times the empirical SD of
    its estimate across the datasets (the SD's relative MC SE is about 11%), and the
    estimates centre on the true contrast 0.5 (x_value - x_reference) within 3 MC SEs."""
    ses, errs = [], []
    for i in range(40):
        spec, r = _refit(_frame(200, 1000 + i, delayed=True), "bootstrap", 50, delayed=True)
        row = _row(subdistribution_table(r, spec))
        assert row["status"] == "ok" and row["bootstrap_ok"] >= 45
        dx = row["x_value"] - row["x_reference"]
        ses.append(row["se"] / abs(dx))
        errs.append(row["estimate"] / dx - 0.5)
    sd = float(np.std(errs, ddof=1))
    assert 0.75 <= float(np.mean(ses)) / sd <= 1.3
    assert abs(float(np.mean(errs))) < 3 * sd / np.sqrt(len(errs))
