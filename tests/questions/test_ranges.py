"""Tests of range dependence (unbin.questions.ranges): with a linear truth the legacy high-vs-low estimate
follows the truncated-normal means of the trimmed groups, while the continuous contrast between
fixed values stays within its interval."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from lifelines import CoxPHFitter
from scipy import stats

from helpers import bare_refit as _refit
from unbin.questions.ranges import ranges_table, trims


def _raw(outcome: dict[str, Any], cuts: list[float], adjust: list[str],
         **extra: Any) -> dict[str, Any]:
    return {"study": "sim", "cohorts": [{"name": "c", "path": "unused.csv"}],
            "groupings": {"x": {"cuts": cuts}},
            "analyses": [{"name": "a", "outcome": outcome, "exposure": "x", "adjust": adjust,
                          **extra}]}


def test_legacy_estimate_moves_while_the_continuous_contrast_stays() -> None:
    """x ~ N(0, 1) cut at its population tertiles, y = x + 0.5 age + e.

    Legacy (top vs bottom third): its expectation in a sample trimmed to [l, u] is
    E[x | c2 <= x < u] - E[x | l <= x < c1], the means of truncated normals (scipy truncnorm);
    the estimate must be within 4 SE of it, and it moves away from the untrimmed estimate by
    many SEs. Linear and spline contrasts between the fixed values: each trimmed 95% interval
    contains both the untrimmed estimate and the truth (common practice: the trimmed estimate
    is noisier but unbiased; the nested samples make the difference smaller than its SE)."""
    rng = np.random.default_rng(7)
    n = 20_000
    x = rng.normal(size=n)
    age = rng.normal(size=n)
    y = x + 0.5 * age + rng.normal(size=n)
    c1, c2 = stats.norm.ppf(1 / 3), stats.norm.ppf(2 / 3)
    df = pd.DataFrame({"x": x, "y": y, "age": age})
    r, spec = _refit(df, _raw({"type": "continuous", "value": "y"}, [c1, c2], ["age"]))
    tab = ranges_table(r, spec)
    assert len(tab) == 3 * len(trims())
    assert (tab["status"] == "ok").all()
    full = tab[(tab["form"] == "legacy") & (tab["trim"] == "none")].iloc[0]
    for row in tab[tab["form"] == "legacy"].itertuples():
        lo = stats.norm.ppf(row.share_lower) if row.share_lower > 0 else -np.inf
        hi = stats.norm.ppf(1 - row.share_upper) if row.share_upper > 0 else np.inf
        expected = (stats.truncnorm.mean(c2, hi) - stats.truncnorm.mean(lo, c1))
        assert row.estimate == pytest.approx(expected, abs=4 * row.se)
        if row.trim != "none" and max(row.share_lower, row.share_upper) >= 0.10:
            assert abs(row.estimate - full["estimate"]) > 5 * row.se
            assert not row.covers_untrimmed
    assert (tab["form"] == "legacy").sum() == len(trims())
    both20 = tab[(tab["form"] == "legacy") & (tab["trim"] == "both")
                 & (tab["share_lower"] == 0.2)].iloc[0]
    assert both20["estimate"] < 0.65 * full["estimate"]  # the grouped effect shrinks by a third
    for form in ("linear", "spline"):
        rows = tab[tab["form"] == form]
        truth = rows["x_value"].iloc[0] - rows["x_reference"].iloc[0]  # slope 1 between them
        assert (rows["x_value"] == rows["x_value"].iloc[0]).all()  # the values stay fixed
        assert rows["covers_untrimmed"].all()
        assert ((rows["lower"] <= truth) & (truth <= rows["upper"])).all()


def test_trims_that_empty_a_group_are_skipped_with_a_reason() -> None:
    rng = np.random.default_rng(3)
    n = 3000
    x = rng.normal(size=n)
    y = (rng.random(n) < 1 / (1 + np.exp(-(-1 + 0.5 * x)))).astype(float)
    df = pd.DataFrame({"x": x, "y": y})
    cut = float(np.quantile(x, 0.03))  # lowest group: 3% of the sample
    r, spec = _refit(df, _raw({"type": "binary", "event": "y"}, [cut, 0.0], []))
    tab = ranges_table(r, spec)
    leg = tab[tab["form"] == "legacy"]
    skipped = leg[leg["status"] == "skipped"]
    # every trim that cuts at least 5% from below removes the whole lowest group
    assert set(zip(skipped["trim"], skipped["share_lower"], strict=True)) == {
        (t, s) for t, s, _ in trims() if s >= 0.05}
    assert skipped["reason"].str.contains("after trimming").all()
    assert skipped["estimate"].isna().all()
    # the continuous contrasts are still estimated there, flagged as extrapolated
    lin = tab[(tab["form"] == "linear") & (tab["share_lower"] >= 0.05)]
    assert (lin["status"] == "ok").all() and lin["extrapolated"].all()


def test_survival_trim_refits_the_legacy_model_on_the_trimmed_rows() -> None:
    """The legacy log hazard ratio after trimming the upper 10% equals lifelines' CoxPHFitter
    (Efron ties, strata) fitted to the trimmed rows with the same group indicators."""
    rng = np.random.default_rng(11)
    n = 1500
    x = rng.uniform(20, 80, n).round(0)
    centre = rng.integers(1, 4, n)
    t = rng.exponential(1 / (0.1 * np.exp(0.02 * (x - 50))))
    cens = rng.uniform(1, 10, n)
    df = pd.DataFrame({"x": x, "centre": centre, "time": np.minimum(t, cens).round(2) + 0.01,
                       "died": (t <= cens).astype(int)})
    raw = _raw({"type": "survival", "time": "time", "event": "died"}, [40.0, 60.0], [],
               strata=["centre"])
    r, spec = _refit(df, raw)
    tab = ranges_table(r, spec)
    row = tab[(tab["form"] == "legacy") & (tab["trim"] == "upper")
              & (tab["share_upper"] == 0.10)].iloc[0]
    bound = np.quantile(x, 0.90)
    sub = df[df["x"] <= bound].copy()
    assert row["n"] == len(sub)
    sub["g1"] = ((sub["x"] >= 40) & (sub["x"] < 60)).astype(float)
    sub["g2"] = (sub["x"] >= 60).astype(float)
    ref = CoxPHFitter().fit(sub[["time", "died", "centre", "g1", "g2"]], "time", "died",
                            strata=["centre"])
    assert row["estimate"] == pytest.approx(ref.params_["g2"], abs=1e-5)
    assert row["se"] == pytest.approx(ref.standard_errors_["g2"], rel=1e-4)


@pytest.mark.parametrize(("reference", "comparison"), [(">=c2", "<c1"), ("<c1", ">=c2"),
                                                       ("mid", ">=c2")])
def test_contrasts_read_group_vs_reference(reference: str, comparison: str) -> None:
    """One direction everywhere: "comparison vs reference" (the legacy paper's "group vs
    reference"). y = x + e with cuts at the population tertiles: whatever group is the
    reference, the legacy estimate must match the difference of the truncated-normal means
    E[x | comparison group] - E[x | reference group] (scipy truncnorm) within 4 SE, so a
    reference at the top gives a negative estimate (lowest vs highest group), and the linear
    contrast must be x_value - x_reference (slope 1) within 4 SE. The middle group as the
    reference ties: the highest group is compared."""
    rng = np.random.default_rng(2031)
    n = 20_000
    x = rng.normal(size=n)
    df = pd.DataFrame({"x": x, "y": x + rng.normal(size=n)})
    c1, c2 = stats.norm.ppf(1 / 3), stats.norm.ppf(2 / 3)
    labels = ["<c1", "mid", ">=c2"]
    raw = _raw({"type": "continuous", "value": "y"}, [c1, c2], [])
    raw["groupings"]["x"].update(labels=labels, reference=reference)
    r, spec = _refit(df, raw)
    tab = ranges_table(r, spec)
    full = tab[tab["trim"] == "none"].set_index("form")
    assert full.loc["legacy", "contrast"] == f"{comparison} vs {reference}"
    bounds = {"<c1": (-np.inf, c1), "mid": (c1, c2), ">=c2": (c2, np.inf)}
    expected = (stats.truncnorm.mean(*bounds[comparison])
                - stats.truncnorm.mean(*bounds[reference]))
    leg = full.loc["legacy"]
    assert leg["estimate"] == pytest.approx(expected, abs=4 * leg["se"])
    assert np.sign(leg["estimate"]) == np.sign(expected)
    lin = full.loc["linear"]
    assert lin["x_value"] == pytest.approx(np.median(x[r.legacy.codes(x) == labels.index(
        comparison)]))
    assert lin["x_reference"] == pytest.approx(np.median(x[r.legacy.codes(x) == labels.index(
        reference)]))
    assert lin["estimate"] == pytest.approx(lin["x_value"] - lin["x_reference"],
                                            abs=4 * lin["se"])


def test_untrimmed_rows_reuse_the_refits_fits(monkeypatch: pytest.MonkeyPatch) -> None:
    """With the analysis' own fits at hand, the untrimmed rows reuse them (the same design on
    the same rows): every row equals the table built from a Refit without fits, which refits
    each model, and the untrimmed legacy and linear contrasts equal statsmodels' logistic GLM
    of the same indicators and covariate (statsmodels as the reference library)."""
    import statsmodels.api as sm

    from unbin.questions import ranges
    from unbin.refit.analysis import refit_analysis

    rng = np.random.default_rng(5)
    n = 4000
    x = rng.normal(50, 10, n).round(1)
    age = rng.normal(60, 8, n).round(0)
    y = (rng.random(n) < 1 / (1 + np.exp(-(-1 + 0.03 * (x - 50) + 0.02 * (age - 60))))
         ).astype(float)
    df = pd.DataFrame({"x": x, "y": y, "age": age})
    raw = _raw({"type": "binary", "event": "y"}, [45.0, 55.0], ["age"])
    bare, spec = _refit(df, raw)
    full = refit_analysis(bare.sample, bare.analysis, spec, "sim")
    calls = []
    fit = ranges.fit
    monkeypatch.setattr(ranges, "fit", lambda *args: calls.append(1) or fit(*args))
    with_fits = ranges_table(full, spec)
    assert len(calls) == 3 * len(trims()) - 3  # the three untrimmed models are reused
    without = ranges_table(bare, spec)
    assert len(calls) == 2 * 3 * len(trims()) - 3
    pd.testing.assert_frame_equal(with_fits, without, check_exact=True)
    untrimmed = with_fits[with_fits["trim"] == "none"].set_index("form")
    # the reference group is the first (<45); the comparison is the highest group
    g_high = (x >= 55).astype(float)
    X = sm.add_constant(np.column_stack([((x >= 45) & (x < 55)).astype(float), g_high, age]))
    ref = sm.GLM(y, X, family=sm.families.Binomial()).fit()
    assert untrimmed.loc["legacy", "estimate"] == pytest.approx(ref.params[2], rel=1e-7)
    assert untrimmed.loc["legacy", "se"] == pytest.approx(ref.bse[2], rel=1e-6)
    lin = sm.GLM(y, sm.add_constant(np.column_stack([x, age])),
                 family=sm.families.Binomial()).fit()
    step = untrimmed.loc["linear", "x_value"] - untrimmed.loc["linear", "x_reference"]
    assert untrimmed.loc["linear", "estimate"] == pytest.approx(lin.params[1] * step, rel=1e-7)
