"""Tests of decisions on predicted risk (unbin.refit.risk, unbin.questions.thresholds and
net_benefit): implied exposure thresholds
plugged back into models refitted with reference libraries (statsmodels with patsy splines,
lifelines), the interaction LR test, net benefit against Vickers & Elkin's worked values and
lifelines' Kaplan-Meier estimates, and the demo's per-level thresholds against its truth."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import patsy
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from lifelines import CoxPHFitter, KaplanMeierFitter
from scipy import optimize, special, stats

from helpers import keep_analyses
from unbin.data import analysis_sample
from unbin.errors import SpecError
from unbin.questions.decisions import CAUTION
from unbin.questions.net_benefit import NB_GRID, km_survival, net_benefit_counts, net_benefit_table
from unbin.questions.thresholds import crossings, thresholds_table
from unbin.refit.analysis import Refit, refit_analysis
from unbin.spec import Spec, parse_spec

TIGHT = {"precision": 1e-14, "r_precision": 1e-16}  # lifelines convergence, as in test_cox
X_KNOTS = [35.0, 45.0, 55.0, 65.0]
Z_QUANTILES = [0.05, 0.35, 0.65, 0.95]  # default 4 adjustment knots (common practice)


def _raw(outcome: dict[str, Any], horizon: float | None = None, **analysis: Any) -> dict[str, Any]:
    """One analysis of exposure x (legacy cut at 60), linear and spline forms (fixed knots);
    ``analysis`` adds keys to the analysis (adjust, by, strata, risk_thresholds)."""
    return {
        "study": "sim",
        "cohorts": [{"name": "sim", "path": "sim.parquet"}],
        "groupings": {"x": {"cuts": [60]}},
        "analyses": [{"name": "a", "outcome": outcome, "exposure": "x",
                      "continuous": {"forms": ["linear", "spline"],
                                     "spline_knots": {"values": X_KNOTS}},
                      **analysis}],
        "risk_thresholds": [0.1, 0.25],
        **({"horizon": horizon} if horizon is not None else {}),
    }


def _refit(frame: pd.DataFrame, raw: dict[str, Any], tmp: Path) -> tuple[Spec, Refit]:
    spec = parse_spec(raw, base=tmp)
    a = spec.analyses[0]
    return spec, refit_analysis(analysis_sample(frame, a, spec), a, spec, "sim")


def _cr(var: str, knots: list[float] | np.ndarray) -> str:
    """patsy's natural cubic spline with the given knots, centred: the same function space as
    the restricted cubic spline without its constant (patsy's cr() as the reference library)."""
    k = list(knots)
    return (f"cr({var}, knots={k[1:-1]}, lower_bound={k[0]}, upper_bound={k[-1]}, "
            "constraints='center')")


def _binary_frame(n: int = 3000, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.normal(50, 10, n)
    g = rng.choice(["a", "b", "c"], n, p=[0.5, 0.3, 0.2])
    z = rng.normal(0, 1, n)
    lo = (-1.6 + 0.04 * (x - 50) + 0.004 * (x - 50) ** 2 * (1 + (g == "b")) + 0.3 * z
          + 0.4 * (g == "c"))
    return pd.DataFrame({"x": x, "g": g, "z": z, "y": (rng.random(n) < special.expit(lo))
                         .astype(int)})


@pytest.fixture(scope="module")
def binary_case(tmp_path_factory: pytest.TempPathFactory) -> tuple[pd.DataFrame, Spec, Refit]:
    frame = _binary_frame()
    spec, r = _refit(frame, _raw({"type": "binary", "event": "y"}, adjust=["z"], by="g"),
                     tmp_path_factory.mktemp("bin"))
    return frame, spec, r


# --------------------------------------------------------------------------- crossings


def test_crossings_of_a_parabola() -> None:
    # Algebra (common practice): (x - 1)^2 = 0.25 at x = 0.5 (falling) and 1.5 (rising).
    found, position = crossings(lambda v: (v - 1.0) ** 2, -2.0, 4.0, 0.25)
    assert position == "crossing"
    np.testing.assert_allclose([x for x, _ in found], [0.5, 1.5], atol=1e-12)
    assert [d for _, d in found] == ["falling", "rising"]
    assert crossings(lambda v: (v - 1.0) ** 2, -2.0, 4.0, -1.0) == ([], "always above")
    assert crossings(lambda v: (v - 1.0) ** 2, -2.0, 4.0, 100.0) == ([], "always below")
    # a root outside the searched range is not reported
    assert crossings(lambda v: (v - 1.0) ** 2, 1.0, 1.4, 0.25) == ([], "always below")


# --------------------------------------------------------------------------- binary


def test_binary_implied_thresholds_plug_back_into_statsmodels(
        binary_case: tuple[pd.DataFrame, Spec, Refit]) -> None:
    """Each implied threshold, with the rest of the linear predictor at its quantile among the
    level's rows, gives the threshold risk. Reference: statsmodels GLM (binomial) with patsy's
    natural cubic splines on the same knots: the log-odds of every row of the level at x = x*
    (a shift of every row's log-odds by the same amount), at the same quantile, is logit(t)."""
    frame, spec, r = binary_case
    tab = thresholds_table(r, spec)
    assert (tab["caution"] == CAUTION).all()
    z_knots = np.quantile(frame["z"], Z_QUANTILES)
    formulas = {
        "linear": f"y ~ x + C(g) + {_cr('z', z_knots)}",
        "spline": f"y ~ {_cr('x', X_KNOTS)} + C(g) + {_cr('z', z_knots)}",
        # the interaction model uses the test spline: 4 knots at the default quantiles
        "spline x g": f"y ~ {_cr('x', np.quantile(frame['x'], Z_QUANTILES))} * C(g) + "
                      f"{_cr('z', z_knots)}",
    }
    ref = {m: smf.glm(f, frame, family=sm.families.Binomial()).fit(tol=1e-12)
           for m, f in formulas.items()}
    ok = tab[(tab["status"] == "ok") & (tab["position"] == "crossing")]
    assert set(ok["model"]) == set(formulas)
    assert len(ok) > 20
    for _, row in ok.iterrows():
        level = frame[frame["g"] == row["level"]].assign(x=row["exposure_value"])
        log_odds = np.asarray(ref[row["model"]].predict(level, which="linear"))
        risk = special.expit(np.quantile(log_odds, row["profile_quantile"]))
        assert abs(risk - row["threshold"]) < 1e-6, row.to_dict()
        assert abs(row["risk_at_value"] - row["threshold"]) < 1e-9
    # U shape: two crossings, falling then rising, at the 50th percentile profile
    mid = ok[(ok["model"] == "spline x g") & (ok["level"] == "a") & (ok["threshold"] == 0.25)
             & (ok["profile_quantile"] == 0.5)]
    assert list(mid["direction"]) == ["falling", "rising"]
    assert (mid["nearest_cut"] == 60).all()
    np.testing.assert_allclose(mid["shift_from_cut"], mid["exposure_value"] - 60)


def test_interaction_lr_matches_statsmodels(binary_case: tuple[pd.DataFrame, Spec, Refit]) -> None:
    """LR test of spline x level: twice the log-likelihood difference between the patsy-formula
    fits with and without the interaction (statsmodels), on (levels - 1) x (knots - 1) df."""
    frame, spec, r = binary_case
    tab = thresholds_table(r, spec)
    z_knots = np.quantile(frame["z"], Z_QUANTILES)
    x_knots = np.quantile(frame["x"], Z_QUANTILES)  # the test spline: 4 knots, default quantiles
    main = smf.glm(f"y ~ {_cr('x', x_knots)} + C(g) + {_cr('z', z_knots)}", frame,
                   family=sm.families.Binomial()).fit(tol=1e-12)
    full = smf.glm(f"y ~ {_cr('x', x_knots)} * C(g) + {_cr('z', z_knots)}", frame,
                   family=sm.families.Binomial()).fit(tol=1e-12)
    lr = 2 * (full.llf - main.llf)
    assert tab["df_interaction"].dropna().unique().tolist() == [2 * 3]
    np.testing.assert_allclose(tab["lr_interaction"].unique(), [lr], rtol=1e-6)
    np.testing.assert_allclose(tab["p_interaction"].unique(), [stats.chi2.sf(lr, 6)], rtol=1e-5)
    assert tab["p_interaction"].iloc[0] < 0.01  # the simulated curvature differs in level b


def test_binary_net_benefit_by_the_formula(binary_case: tuple[pd.DataFrame, Spec, Refit]) -> None:
    """Vickers & Elkin 2006: NB = TP/n - FP/n * p_t/(1-p_t), counted directly here for the legacy
    rule (x >= 60, away from the reference group '<60') and the spline's risk rule (statsmodels
    fitted probabilities >= p_t)."""
    frame, spec, r = binary_case
    nb = net_benefit_table(r, spec)
    assert (nb["caution"] == CAUTION).all()
    y, n = frame["y"].to_numpy(), len(frame)
    w = NB_GRID / (1 - NB_GRID)
    legacy = nb[nb["rule"] == "legacy: x >= 60"]
    pos = frame["x"].to_numpy() >= 60
    np.testing.assert_allclose(legacy["net_benefit"],
                               (y[pos].sum() - (1 - y[pos]).sum() * w) / n, atol=1e-12)
    z_knots = np.quantile(frame["z"], Z_QUANTILES)
    p = smf.glm(f"y ~ {_cr('x', X_KNOTS)} + C(g) + {_cr('z', z_knots)}", frame,
                family=sm.families.Binomial()).fit(tol=1e-12).predict(frame).to_numpy()
    expected = [((p >= t) & (y == 1)).sum() / n - ((p >= t) & (y == 0)).sum() / n * t / (1 - t)
                for t in NB_GRID]
    got = nb.loc[nb["rule"] == "risk: spline", "net_benefit"].to_numpy()
    # a fitted risk within rounding of a grid value may fall on either side: allow one patient
    assert np.max(np.abs(got - expected)) <= 1.0 / n + 1e-12
    assert np.mean(np.abs(got - expected) < 1e-12) > 0.95
    assert set(nb["rule"]) >= {"treat all", "treat none", "risk: legacy", "risk: linear",
                               "risk: spline x g"}
    assert (nb.loc[nb["rule"] == "treat none", "net_benefit"] == 0).all()


def test_treat_all_reproduces_vickers_elkin() -> None:
    # Vickers & Elkin 2006 (Med Decis Making 26:565): prevalence 0.30, treat-all NB at p_t = 0.05 ... 0.50.
    y = np.r_[np.ones(300), np.zeros(700)]
    grid = np.array([0.05, 0.10, 0.20, 0.30, 0.50])
    value, tp, fp = net_benefit_counts(y, np.ones(1000, dtype=bool), grid)
    np.testing.assert_allclose(value, [0.263, 0.222, 0.125, 0.000, -0.400], atol=5e-4)
    np.testing.assert_allclose(value, 0.3 - 0.7 * grid / (1 - grid), atol=1e-12)
    assert np.allclose(tp, 0.3) and np.allclose(fp, 0.7)
    # a rule treating 200 with 150 events: NB = 150/1000 - 50/1000 * 0.25 at p_t = 0.2
    pos = np.r_[np.ones(150), np.zeros(150), np.ones(50), np.zeros(650)].astype(bool)
    value, _, _ = net_benefit_counts(y, pos, np.array([0.2]))
    assert value[0] == pytest.approx(0.15 - 0.05 * 0.25, abs=1e-12)


def test_one_rule_at_every_threshold_counts_as_the_rule_per_threshold() -> None:
    # One mask for all thresholds (the legacy rules) is counted once; the numbers must be
    # those of the same mask given per threshold, and of a count by hand (Vickers & Elkin
    # 2006: NB = TP/n - FP/n p_t / (1 - p_t)).
    rng = np.random.default_rng(21)
    y = (rng.random(5000) < 0.2).astype(float)
    mask = rng.random(5000) < 0.35
    grid = NB_GRID
    one = net_benefit_counts(y, mask, grid)
    each = net_benefit_counts(y, np.tile(mask, (grid.size, 1)), grid)
    for a, b in zip(one, each, strict=True):
        np.testing.assert_array_equal(a, b)
    tp, fp = np.sum(mask & (y == 1)) / 5000, np.sum(mask & (y == 0)) / 5000
    np.testing.assert_allclose(one[0], tp - fp * grid / (1 - grid), rtol=0, atol=1e-15)


def test_treat_all_in_the_table_at_prevalence_030(tmp_path: Path) -> None:
    # Vickers & Elkin 2006 worked values through the whole table.
    rng = np.random.default_rng(5)
    x = rng.normal(50, 10, 1000)
    y = np.zeros(1000, dtype=int)
    y[np.argsort(x + rng.normal(0, 15, 1000))[-300:]] = 1  # prevalence exactly 0.30
    spec, r = _refit(pd.DataFrame({"x": x, "y": y}), _raw({"type": "binary", "event": "y"}),
                     tmp_path)
    nb = net_benefit_table(r, spec)
    all_ = nb[nb["rule"] == "treat all"].set_index("threshold")["net_benefit"]
    np.testing.assert_allclose(all_.loc[[0.05, 0.10, 0.20, 0.30, 0.50]],
                               [0.263, 0.222, 0.125, 0.000, -0.400], atol=5e-4)


# --------------------------------------------------------------------------- survival


def _survival_frame(n: int = 1500, seed: int = 9) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.uniform(25, 80, n)
    z = rng.normal(0, 1, n)
    s = rng.integers(0, 2, n)
    hazard = 0.08 * np.exp(0.05 * np.clip(60 - x, 0, None) + 0.4 * z + 0.3 * s)
    t = rng.exponential(1.0, n) / hazard
    c = rng.uniform(1, 8, n)
    entry = np.round(rng.uniform(0, 0.8, n), 2)
    time = np.round(np.minimum(t, c), 2) + 0.01
    return pd.DataFrame({"x": x, "z": z, "s": s, "time": time, "died": (t <= c).astype(int),
                         "entry": np.minimum(entry, time - 0.005)})


def _horizon(frame: pd.DataFrame) -> float:
    events = np.sort(frame.loc[frame["died"] == 1, "time"].unique())
    return float(events[len(events) // 2])  # an observed event time: lifelines steps there


def test_survival_thresholds_plug_back_into_lifelines(tmp_path: Path) -> None:
    """Risk by the horizon from the Cox model (Breslow baseline): reference lifelines
    CoxPHFitter (Efron ties) on patsy's spline columns; every row of the sample at x = x*, its
    cloglog risk at the profile's quantile, is the threshold."""
    frame = _survival_frame()
    h = _horizon(frame)
    raw = _raw({"type": "survival", "time": "time", "event": "died", "horizon": h},
               adjust=["z"], risk_thresholds=[0.2, 0.3])
    spec, r = _refit(frame, raw, tmp_path)
    tab = thresholds_table(r, spec)
    z_knots = np.quantile(frame["z"], Z_QUANTILES)
    rhs = f"{_cr('x', X_KNOTS)} + {_cr('z', z_knots)} - 1"
    info = patsy.dmatrix(rhs, frame).design_info
    X = pd.DataFrame(np.asarray(patsy.dmatrix(rhs, frame)))
    X.columns = [f"c{j}" for j in range(X.shape[1])]
    cph = CoxPHFitter().fit(X.assign(time=frame["time"], died=frame["died"]), "time", "died",
                            fit_options=TIGHT)
    ok = tab[(tab["model"] == "spline") & (tab["position"] == "crossing")]
    assert len(ok) >= 3 and (ok["status"] == "ok").all()
    assert (tab["risk_scale"] == f"probability of died by time = {h:g}").all()
    for _, row in ok.iterrows():
        new = pd.DataFrame(np.asarray(patsy.build_design_matrices(
            [info], frame.assign(x=row["exposure_value"]))[0]), columns=X.columns)
        surv = cph.predict_survival_function(new, times=[h]).to_numpy().ravel()
        cloglog = np.quantile(np.log(-np.log(surv)), row["profile_quantile"])
        assert abs(-np.expm1(-np.exp(cloglog)) - row["threshold"]) < 1e-6, row.to_dict()


def test_kaplan_meier_with_delayed_entry_matches_lifelines() -> None:
    # Reference: lifelines KaplanMeierFitter(entry=...) (left truncation).
    frame = _survival_frame(700, seed=2)
    kmf = KaplanMeierFitter().fit(frame["time"], frame["died"], entry=frame["entry"])
    for h in (0.5, _horizon(frame), 3.3):
        ref = float(kmf.survival_function_at_times(h).iloc[0])
        assert km_survival(frame["time"].to_numpy(), frame["died"].to_numpy(), h,
                           frame["entry"].to_numpy()) == pytest.approx(ref, rel=1e-10)


def test_survival_net_benefit_by_kaplan_meier(tmp_path: Path) -> None:
    """Vickers, Cronin, Elkin & Gonen 2008: NB = (1 - S(h|+)) P(+) - S(h|+) P(+) p_t/(1-p_t),
    S from lifelines' Kaplan-Meier (delayed entry) in the rows the rule treats."""
    frame = _survival_frame()
    h = _horizon(frame)
    raw = _raw({"type": "survival", "time": "time", "event": "died", "entry": "entry",
                "horizon": h}, adjust=["z"])
    spec, r = _refit(frame, raw, tmp_path)
    nb = net_benefit_table(r, spec)
    w = NB_GRID / (1 - NB_GRID)
    for rule, pos in (("treat all", np.ones(len(frame), dtype=bool)),
                      ("legacy: x >= 60", frame["x"].to_numpy() >= 60)):
        sub = frame[pos]
        s = float(KaplanMeierFitter().fit(sub["time"], sub["died"], entry=sub["entry"])
                  .survival_function_at_times(h).iloc[0])
        share = pos.mean()
        got = nb.loc[nb["rule"] == rule, "net_benefit"].to_numpy()
        np.testing.assert_allclose(got, (1 - s) * share - s * share * w, atol=1e-12)
    assert (nb["method"].str.startswith("Kaplan-Meier")).all()


def test_survival_without_horizon_is_skipped(tmp_path: Path) -> None:
    frame = _survival_frame(300)
    spec, r = _refit(frame, _raw({"type": "survival", "time": "time", "event": "died"}),
                     tmp_path)
    for tab in (thresholds_table(r, spec), net_benefit_table(r, spec)):
        assert list(tab["status"]) == ["skipped"]
        assert "horizon" in tab["reason"].iloc[0]
    # the study-level horizon applies when the outcome gives none
    spec, r = _refit(frame, _raw({"type": "survival", "time": "time", "event": "died"},
                                 horizon=2.0), tmp_path)
    assert (thresholds_table(r, spec)["horizon"] == 2.0).all()


# --------------------------------------------------------------------------- count, continuous


def test_count_thresholds_on_the_rate_scale(tmp_path: Path) -> None:
    """Expected events per unit of person-time: reference statsmodels GLM (Poisson, log
    person-time offset) predicting at offset 0, i.e. per 1 unit."""
    rng = np.random.default_rng(12)
    n = 2000
    x = rng.uniform(20, 80, n)
    pt = rng.uniform(0.5, 3, n)
    k = rng.poisson(pt * np.exp(-1.0 + 0.03 * (x - 50)))
    frame = pd.DataFrame({"x": x, "pt": pt, "k": k})
    raw = _raw({"type": "count", "count": "k", "persontime": "pt"}, risk_thresholds=[0.3, 0.6])
    spec, r = _refit(frame, raw, tmp_path)
    tab = thresholds_table(r, spec)
    ref = smf.glm("k ~ x", frame, family=sm.families.Poisson(), offset=np.log(pt)).fit(tol=1e-12)
    row = tab[(tab["model"] == "linear") & (tab["threshold"] == 0.3)].iloc[0]
    rate = ref.predict(pd.DataFrame({"x": [row["exposure_value"]]}), offset=np.zeros(1))
    assert abs(float(rate.iloc[0]) - 0.3) < 1e-6
    assert row["risk_scale"] == "expected k per 1 unit of pt"
    nb = net_benefit_table(r, spec)
    assert list(nb["status"]) == ["skipped"] and "count outcome" in nb["reason"].iloc[0]
    # without thresholds of its own a count analysis has none (the study's are probabilities)
    raw["analyses"][0].pop("risk_thresholds")
    spec, r = _refit(frame, raw, tmp_path)
    assert list(thresholds_table(r, spec)["status"]) == ["skipped"]


def test_continuous_threshold_on_the_mean(tmp_path: Path) -> None:
    # Reference: statsmodels OLS prediction of the mean at the implied value.
    rng = np.random.default_rng(13)
    x = rng.uniform(3, 10, 1200)
    frame = pd.DataFrame({"x": x, "v": 120 + 2.0 * x + rng.normal(0, 5, 1200)})
    spec, r = _refit(frame, _raw({"type": "continuous", "value": "v"}, risk_thresholds=[133.0]),
                     tmp_path)
    tab = thresholds_table(r, spec)
    row = tab[tab["model"] == "linear"].iloc[0]
    ols = smf.ols("v ~ x", frame).fit()
    pred = float(ols.predict(pd.DataFrame({"x": [row["exposure_value"]]})).iloc[0])
    assert abs(pred - 133.0) < 1e-6
    assert row["direction"] == "rising" and row["position"] == "crossing"


def test_per_analysis_thresholds_are_checked_against_the_family(tmp_path: Path) -> None:
    raw = _raw({"type": "binary", "event": "y"}, risk_thresholds=[1.5])
    with pytest.raises(SpecError, match="risk_thresholds"):
        parse_spec(raw, base=tmp_path)


# --------------------------------------------------------------------------- the demo


def test_demo_thresholds_differ_by_diabetes_as_the_truth_says(tmp_path: Path) -> None:
    """The demo's readmission analysis (by: diabetes). Its simulated truth (unbin.demo
    simulate_registry): log-odds = -2.3 + true_logodds_sodium(sodium) + 0.02 (age - 63)
    + 0.5 diabetes — diabetes shifts the risk at every sodium, so a risk threshold is crossed
    closer to the optimum (or never) with diabetes. The spline's implied thresholds at the 10th
    and 50th percentile profiles must sit where the truth puts them (same quantile of the true
    rest of the linear predictor within the level), and on the same side of the optimum."""
    from unbin.demo import SODIUM_OPTIMUM, demo_spec, simulate_registry, true_logodds_sodium

    raw = demo_spec()
    keep_analyses(raw, "readmission_sodium")
    raw["continuous"] = {**raw.get("continuous", {}), "forms": ["spline"]}
    spec = parse_spec(raw, base=tmp_path)
    a = spec.analyses[0]
    r = refit_analysis(analysis_sample(simulate_registry(), a, spec), a, spec, "lindenfeld")
    tab = thresholds_table(r, spec)
    df = r.sample.frame
    true_rest = -2.3 + 0.02 * (df["age"] - 63) + 0.5 * df["diabetes"]
    windows: dict[tuple[float, float, str], tuple[float, float]] = {}
    for t in (0.1, 0.2):
        for q in (0.1, 0.5):
            for level in ("0", "1"):
                rest = float(np.quantile(true_rest[df["diabetes"] == int(level)], q))
                c = float(special.logit(t)) - rest
                rows = tab[(tab["model"] == "spline") & (tab["threshold"] == t)
                           & (tab["profile_quantile"] == q) & (tab["level"] == level)]
                if c <= 0:  # the truth is above the threshold at every sodium
                    assert list(rows["position"]) == ["always above"], (t, q, level)
                    continue
                lo, hi = (optimize.brentq(lambda v, c=c: true_logodds_sodium(v) - c, a_, b_)
                          for a_, b_ in ((100.0, SODIUM_OPTIMUM), (SODIUM_OPTIMUM, 180.0)))
                est = rows["exposure_value"].dropna().to_numpy()
                assert len(est) >= 2, (t, q, level)
                windows[(t, q, level)] = (est[0], est[-1])
                if t == 0.2:  # a steep part of the U: the crossing is well determined
                    assert abs(est[0] - lo) < 1.5 and abs(est[-1] - hi) < 1.5, (q, level, est)
    for q in (0.1, 0.5):  # with diabetes, the low-risk window is narrower
        low0, high0 = windows[(0.2, q, "0")]
        low1, high1 = windows[(0.2, q, "1")]
        assert low0 < low1 and high1 < high0
    assert {"spline x diabetes"} <= set(tab["model"])
    assert tab["df_interaction"].dropna().nunique() == 1


def test_risk_rules_from_sorted_risks_equal_the_row_by_row_counts() -> None:
    """``net_benefit_risk`` (counts from sorted risks) equals ``net_benefit_counts`` on the
    explicit (thresholds x n) treatment matrix, including risks tied with a threshold
    (Vickers & Elkin 2006 definition: treat when risk >= p_t; common practice)."""
    from unbin.questions.net_benefit import net_benefit_risk

    rng = np.random.default_rng(9)
    n = 5000
    risk = np.round(rng.beta(2, 6, n), 2)  # many ties, some exactly on the grid
    y = (rng.random(n) < risk).astype(float)
    grid = np.array([0.05, 0.1, 0.2, 0.25, 0.3, 0.5])
    want = net_benefit_counts(y, risk[None, :] >= grid[:, None], grid)
    got = net_benefit_risk(y, risk, grid)
    for a, b in zip(got, want, strict=True):
        np.testing.assert_allclose(a, b, rtol=0, atol=1e-15)
