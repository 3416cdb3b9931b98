"""Tests of absolute risk from fitted models (unbin.refit.risk) against reference libraries:
statsmodels predictions (logistic, Poisson per unit person-time, linear) and lifelines' Cox
survival predictions at a horizon (strata), plus the links and the horizon notes."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from lifelines import CoxPHFitter
from scipy import special

from unbin.data import analysis_sample
from unbin.refit.analysis import Refit, refit_analysis
from unbin.refit.risk import absolute_risk, inverse_link, link, risk_fit, risk_scale
from unbin.spec import Spec, parse_spec

TIGHT = {"precision": 1e-14, "r_precision": 1e-16}  # lifelines convergence, as in test_cox


def _refit(frame: pd.DataFrame, outcome: dict[str, Any], tmp: Path, **analysis: Any,
           ) -> tuple[Spec, Refit]:
    raw = {"study": "sim", "cohorts": [{"name": "sim", "path": "sim.parquet"}],
           "groupings": {"x": {"cuts": [50]}},
           "variables": {"pt": {"unit": "years"}},
           "analyses": [{"name": "a", "outcome": outcome, "exposure": "x", "adjust": ["z"],
                         "continuous": {"forms": ["linear"]}, **analysis}]}
    spec = parse_spec(raw, base=tmp)
    a = spec.analyses[0]
    return spec, refit_analysis(analysis_sample(frame, a, spec), a, spec, "sim")


def _frame(n: int = 800, seed: int = 1) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.normal(50, 10, n)
    z = rng.normal(0, 1, n)
    pt = rng.uniform(0.5, 4, n)
    return pd.DataFrame({
        "x": x, "z": z, "pt": pt,
        "y": (rng.random(n) < special.expit(-1 + 0.04 * (x - 50) + 0.5 * z)).astype(int),
        "k": rng.poisson(pt * np.exp(-0.5 + 0.02 * (x - 50) + 0.2 * z)),
        "v": 100 + 0.8 * x + 3 * z + rng.normal(0, 4, n),
    })


@pytest.mark.parametrize("family", ["binary", "survival", "count", "continuous"])
def test_link_inverts_inverse_link(family: str) -> None:
    # common practice: logit, complementary log-log (risk 1 - exp(-e^z)), log, identity
    z = np.linspace(-4, 2, 13)
    np.testing.assert_allclose(link(family, inverse_link(family, z)), z, atol=1e-12)
    if family == "survival":
        np.testing.assert_allclose(inverse_link(family, z), 1 - np.exp(-np.exp(z)), rtol=1e-14)


def test_binary_risk_is_the_statsmodels_probability(tmp_path: Path) -> None:
    # Reference: statsmodels GLM (binomial) fitted probabilities.
    frame = _frame()
    spec, r = _refit(frame, {"type": "binary", "event": "y"}, tmp_path)
    f = r.get("linear", "legacy")
    assert f is not None
    ref = smf.glm("y ~ x + z", frame, family=sm.families.Binomial()).fit(tol=1e-12)
    np.testing.assert_allclose(absolute_risk(r, f, spec), ref.predict(frame), rtol=1e-7)
    assert risk_scale(r.analysis, spec).label == "probability of y"


def test_count_risk_is_the_rate_per_unit_person_time(tmp_path: Path) -> None:
    # Reference: statsmodels GLM (Poisson, log person-time offset) predicted at offset 0.
    frame = _frame()
    spec, r = _refit(frame, {"type": "count", "count": "k", "persontime": "pt"}, tmp_path)
    f = r.get("linear", "legacy")
    assert f is not None
    ref = smf.glm("k ~ x + z", frame, family=sm.families.Poisson(),
                  offset=np.log(frame["pt"])).fit(tol=1e-12)
    per_unit = ref.predict(frame, offset=np.zeros(len(frame)))
    np.testing.assert_allclose(absolute_risk(r, f, spec), per_unit, rtol=1e-7)
    assert risk_scale(r.analysis, spec).label == "expected k per 1 unit of pt (years)"


def test_continuous_risk_is_the_predicted_mean(tmp_path: Path) -> None:
    # Reference: statsmodels OLS fitted values.
    frame = _frame()
    spec, r = _refit(frame, {"type": "continuous", "value": "v"}, tmp_path)
    f = r.get("linear", "legacy")
    assert f is not None
    ref = smf.ols("v ~ x + z", frame).fit()
    np.testing.assert_allclose(absolute_risk(r, f, spec), ref.fittedvalues, rtol=1e-10)


def _survival(n: int = 900, seed: int = 4) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.uniform(25, 80, n)
    z = rng.normal(0, 1, n)
    s = rng.integers(0, 3, n)
    t = rng.exponential(1.0, n) / (0.1 * np.exp(0.03 * (60 - x) + 0.4 * z + 0.3 * s))
    c = rng.uniform(1, 8, n)
    return pd.DataFrame({"x": x, "z": z, "s": s, "time": np.round(np.minimum(t, c), 2) + 0.01,
                         "died": (t <= c).astype(int)})


def test_survival_risk_with_strata_matches_lifelines(tmp_path: Path) -> None:
    """Risk by the horizon, 1 - S(h | x), with a baseline per stratum. Reference: lifelines
    CoxPHFitter(strata=...).predict_survival_function at an observed event time (where its step
    function is not interpolated). The exposure sits far from 0 (x around 50), so the baseline
    must be read at the centred predictor and moved back."""
    frame = _survival()
    events = np.sort(frame.loc[frame["died"] == 1, "time"].unique())
    h = float(events[len(events) // 2])
    spec, r = _refit(frame, {"type": "survival", "time": "time", "event": "died", "horizon": h},
                     tmp_path, strata=["s"])
    f = r.get("linear", "legacy")
    assert f is not None
    rf = risk_fit(r, f, risk_scale(r.analysis, spec))
    cph = CoxPHFitter().fit(frame[["x", "z", "s", "time", "died"]], "time", "died",
                            strata=["s"], fit_options=TIGHT)
    surv = cph.predict_survival_function(frame[["x", "z", "s"]], times=[h])
    np.testing.assert_allclose(rf.risk, 1 - surv[frame.index].to_numpy().ravel(), rtol=1e-6)
    assert rf.note == ""
    # the split: the exposure's part is b * x, the rest everything else (common practice)
    b = f.result.coef[list(f.result.names).index("x")]
    np.testing.assert_allclose(rf.exposure_rows, b * frame["x"].to_numpy(), rtol=1e-12)
    np.testing.assert_allclose(rf.risk_at(frame["x"].to_numpy()[:5], rf.rest[:5]), rf.risk[:5],
                               rtol=1e-12)


def test_survival_horizon_outside_follow_up_is_noted(tmp_path: Path) -> None:
    # common practice: the Breslow step function is 0 before the first event time and is not
    # extrapolated past the last one.
    frame = _survival(400, seed=8)
    late = float(frame["time"].max()) + 5
    spec, r = _refit(frame, {"type": "survival", "time": "time", "event": "died",
                             "horizon": late}, tmp_path)
    f = r.get("linear", "legacy")
    assert f is not None
    rf = risk_fit(r, f, risk_scale(r.analysis, spec))
    assert "past the last event time" in rf.note
    early = float(frame.loc[frame["died"] == 1, "time"].min()) / 2
    spec, r = _refit(frame, {"type": "survival", "time": "time", "event": "died",
                             "horizon": early}, tmp_path)
    f = r.get("linear", "legacy")
    assert f is not None
    rf = risk_fit(r, f, risk_scale(r.analysis, spec))
    assert "no event before the horizon" in rf.note
    assert np.all(rf.risk == 0)


def test_cumhaz_at_equals_a_per_stratum_step_lookup() -> None:
    """``cumhaz_at`` against the step function read stratum by stratum (brute force): 0
    before a stratum's first event time, held at its last value past its last one, 0 for a
    stratum without events; with the strata whose baseline is held or empty named."""
    from unbin.refit.risk import cumhaz_at

    rng = np.random.default_rng(8)
    base = pd.concat([
        pd.DataFrame({"stratum": s, "time": np.sort(rng.uniform(0, top, k)),
                      "cumhaz": np.cumsum(rng.uniform(0.01, 0.1, k))})
        for s, top, k in ((4, 10.0, 7), (1, 3.0, 5), (2, 8.0, 1), (7, 20.0, 4))])
    labels = rng.choice([1, 2, 3, 4, 7], 300)  # stratum 3 has no event time
    for horizon in (0.5, 2.0, 5.0, 9.0, 25.0):
        h0, held, empty = cumhaz_at(base, labels, labels.size, horizon)
        expect = np.zeros(labels.size)
        want_held = []
        for s in (1, 2, 4, 7):
            part = base[base["stratum"] == s]
            before = part[part["time"] <= horizon]
            if len(before):
                expect[labels == s] = before["cumhaz"].iloc[-1]
                if horizon > part["time"].max():
                    want_held.append(str(s))
        np.testing.assert_array_equal(h0, expect)
        assert held == want_held
        assert empty == [str(v) for v in np.unique(labels[expect == 0])]
