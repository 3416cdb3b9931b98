"""The effects table against reference-library fits of the same designs (statsmodels GLM
binomial, GLM Poisson with a log person-time offset, OLS, PHReg; lifelines CoxPHFitter), with the
contrast points and the within-group spread computed by hand, and the coverage of its
intervals over seeded replicates with a known truth."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd
import pytest

from helpers import level_without_reference_rows
from reference.tablerefs import (
    MARKER_GROUPING,
    OUTCOMES,
    Z975,
    Reference,
    clinic_frame,
    group_index,
    lifelines_fit,
    reference_fit,
    selected_row,
)
from unbin.questions.effects import effects_table
from unbin.questions.fits import fits_table

RATIO = {"binary": True, "count": True, "continuous": False, "survival": True}
# Agreement with the reference libraries (relative, estimate and se): statsmodels is iterated to
# 1e-12 (PHReg tol 1e-12), so they stop far inside these tolerances.
TOL = {"binary": (1e-7, 1e-6), "count": (1e-7, 1e-6), "continuous": (1e-9, 1e-8),
       "survival": (1e-7, 1e-6)}


def _raw(one_analysis: Callable[..., dict[str, Any]], family: str, **extra: Any
         ) -> dict[str, Any]:
    raw = one_analysis(OUTCOMES[family], "marker", dict(MARKER_GROUPING), **extra)
    raw["analyses"][0]["adjust"] = ["age", "sex"]
    return raw


@pytest.mark.parametrize("family", ["binary", "count", "continuous", "survival"])
def test_effects_equal_reference_library_contrasts(refit_frame: Any, one_analysis: Any,
                                                   family: str) -> None:
    frame = clinic_frame(family, 1200, seed={"binary": 1, "count": 2, "continuous": 3,
                                             "survival": 4}[family])
    spec, r = refit_frame(frame, _raw(one_analysis, family))
    eff = effects_table(r, spec)
    fits = fits_table(r, spec)
    x = frame["marker"].to_numpy()
    # By hand: the groups (README cut semantics), their medians, the reference group's median.
    cuts = MARKER_GROUPING["cuts"]
    labels = ["<2.5", "2.5-<5", "5-<9", ">=9"]
    g = group_index(x, cuts, "left")
    ref_g = labels.index(MARKER_GROUPING["reference"])
    x_ref = float(np.median(x[g == ref_g]))
    q25, q75 = np.quantile(x, [0.25, 0.75])
    assert group_index(np.array([q25, q75]), cuts, "left").tolist() == [1, 2]
    rtol_est, rtol_se = TOL[family]
    tr = np.exp if RATIO[family] else (lambda v: v)
    checked = set()
    for (coding, form), rows in eff.groupby(["adjustment", "form"]):
        fit_row = selected_row(fits, str(form), str(coding))
        ref: Reference = reference_fit(fit_row, frame, family, "marker", OUTCOMES[family])
        scale = max(1.0, float(np.abs(ref.b).max()) if ref.b.size else 1.0)
        for _, row in rows.iterrows():
            kind = row["contrast_type"]
            if kind == "group":
                j = labels.index(row["group"])
                vals = x[g == j]
                assert row["x_value"] == pytest.approx(np.median(vals), rel=1e-12)
                assert row["x_reference"] == pytest.approx(x_ref, rel=1e-12)
                est, se = ref.contrast(np.median(vals), x_ref)
                if form == "legacy":
                    assert np.isnan(row["within_p10"]) and np.isnan(row["within_p90"])
                else:
                    # "flat within a group" checked by hand: the form's effect at the group's
                    # 10th and 90th percentile relative to the reference group's median.
                    spread, _ = ref.contrast(np.quantile(vals, [0.10, 0.90]), x_ref)
                    np.testing.assert_allclose([row["within_p10"], row["within_p90"]],
                                               tr(spread), rtol=rtol_est * 10, atol=1e-9)
            elif kind == "iqr":
                assert (row["x_reference"], row["x_value"]) == pytest.approx((q25, q75))
                est, se = ref.contrast(q75, q25)
            elif kind == "per_unit":
                # The slope per unit of the exposure, whatever the reference point.
                assert form == "linear"
                assert row["x_value"] - row["x_reference"] == pytest.approx(1.0, abs=1e-9)
                est, se = ref.b[:1], np.sqrt(ref.V[:1, 0])
            else:
                raise AssertionError(f"unexpected contrast type {kind!r}")
            assert row["estimate"] == pytest.approx(est[0], rel=rtol_est, abs=rtol_est * scale)
            assert row["se"] == pytest.approx(se[0], rel=rtol_se, abs=1e-12)
            # Wald interval and the reported scale, from the row's own estimate and se.
            assert row["lower"] == pytest.approx(row["estimate"] - Z975 * row["se"], abs=1e-9)
            assert row["upper"] == pytest.approx(row["estimate"] + Z975 * row["se"], abs=1e-9)
            np.testing.assert_allclose(
                [row["effect"], row["effect_lower"], row["effect_upper"]],
                tr(np.array([row["estimate"], row["lower"], row["upper"]])), rtol=1e-12)
            checked.add((coding, form, kind))
    # Every form under every adjustment coding has its group and IQR rows (no crude FP search);
    # the linear form its slope.
    for coding in ("legacy", "continuous", "none"):
        for form in ("legacy", "linear", "spline", *(("fp",) if coding != "none" else ())):
            assert {(coding, form, "group"), (coding, form, "iqr")} <= checked, (coding, form)
        assert (coding, "linear", "per_unit") in checked
    # One group row per legacy group (the reference's own row is the null contrast).
    legacy = eff[(eff["form"] == "legacy") & (eff["adjustment"] == "legacy")
                 & (eff["contrast_type"] == "group")]
    assert sorted(legacy["group"]) == sorted(labels)
    own = legacy[legacy["group"] == MARKER_GROUPING["reference"]].iloc[0]
    assert own["estimate"] == 0.0 and own["se"] == 0.0


def test_cox_effects_equal_lifelines(refit_frame: Any, one_analysis: Any) -> None:
    # Reference library: lifelines CoxPHFitter (Efron ties) on the rebuilt designs of the
    # legacy, linear and 3-knot spline forms (both adjustment codings).
    frame = clinic_frame("survival", 900, seed=12)
    spec, r = refit_frame(frame, _raw(one_analysis, "survival",
                                      continuous={"spline_knots": [3], "forms": ["linear",
                                                                                "spline"]}))
    eff = effects_table(r, spec)
    fits = fits_table(r, spec)
    x = frame["marker"].to_numpy()
    q25, q75 = np.quantile(x, [0.25, 0.75])
    n_checked = 0
    for coding in ("legacy", "continuous"):
        for form in ("legacy", "linear", "spline"):
            ref = lifelines_fit(selected_row(fits, form, coding), frame, OUTCOMES["survival"])
            rows = eff[(eff["adjustment"] == coding) & (eff["form"] == form)]
            for _, row in rows.iterrows():
                if row["contrast_type"] == "per_unit":
                    est, se = ref.b[:1], np.sqrt(ref.V[:1, 0])
                elif row["contrast_type"] == "iqr":
                    est, se = ref.contrast(q75, q25)
                else:
                    est, se = ref.contrast(row["x_value"], row["x_reference"])
                assert row["estimate"] == pytest.approx(est[0], rel=1e-6, abs=1e-8)
                assert row["se"] == pytest.approx(se[0], rel=1e-5, abs=1e-10)
                n_checked += 1
    assert n_checked == 2 * (5 + 5 + 5 + 1)


def test_legacy_group_contrast_is_the_indicator_coefficient_of_statsmodels(
        refit_frame: Any, one_analysis: Any) -> None:
    # Reference library: statsmodels GLM binomial with pandas-built indicators (pd.cut with
    # right=False: [a, b) groups, README "closed: left"), age linear and sex as a factor, as the
    # README's legacy adjustment coding says. Independent of the recorded bases.
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    frame = clinic_frame("binary", 1500, seed=11)
    spec, r = refit_frame(frame, _raw(one_analysis, "binary"))
    eff = effects_table(r, spec)
    grp = pd.cut(frame["marker"], [-np.inf, 2.5, 5.0, 9.0, np.inf], right=False,
                 labels=["a", "b", "ref", "d"])
    d = frame.assign(grp=pd.Categorical(grp, categories=["ref", "a", "b", "d"]))
    ref = smf.glm("flare ~ C(grp) + age + C(sex)", d,
                  family=sm.families.Binomial()).fit(tol=1e-12)
    rows = eff[(eff["form"] == "legacy") & (eff["adjustment"] == "legacy")
               & (eff["contrast_type"] == "group")].set_index("group")
    for label, level in (("<2.5", "a"), ("2.5-<5", "b"), (">=9", "d")):
        name = f"C(grp)[T.{level}]"
        assert rows.loc[label, "estimate"] == pytest.approx(ref.params[name], rel=1e-7)
        assert rows.loc[label, "se"] == pytest.approx(ref.bse[name], rel=1e-6)
        assert rows.loc[label, "contrast"] == f"{label} vs 5-<9"


@pytest.mark.slow
def test_per_unit_and_iqr_intervals_cover_the_truth(refit_frame: Any, one_analysis: Any) -> None:
    """Seeded simulation with a known truth: logistic, n = 400, linear true log odds 0.08 per
    unit of the marker. Over 300 replicates the 95% Wald intervals of the linear form's per-unit
    contrast and of the 3-knot spline's IQR contrast (the linear truth lies in the spline's
    space) cover the truth at rates inside the two-sided Monte-Carlo band
    0.95 +/- 3 sqrt(0.95 x 0.05 / 300) = [0.912, 0.988]; too wide fails as well as too narrow.
    (The linear form's IQR interval is the same event as its per-unit one, so it is not
    counted twice.)"""
    reps, slope = 300, 0.08
    band = 3 * np.sqrt(0.95 * 0.05 / reps)
    rng = np.random.default_rng(20261203)
    hits = {("linear", "per_unit"): 0, ("spline", "iqr"): 0}
    raw = one_analysis(OUTCOMES["binary"], "marker", dict(MARKER_GROUPING),
                       continuous={"forms": ["linear", "spline"], "spline_knots": [3]})
    for _ in range(reps):
        n = 400
        x = rng.gamma(2.0, 3.0, n)
        y = (rng.random(n) < 1 / (1 + np.exp(-(-1.0 + slope * x)))).astype(float)
        spec, r = refit_frame(pd.DataFrame({"marker": x, "flare": y}), raw)
        eff = effects_table(r, spec)
        eff = eff[eff["adjustment"] == "none"]
        for key in hits:
            (i,) = np.flatnonzero((eff["form"] == key[0]) & (eff["contrast_type"] == key[1]))
            row = eff.iloc[i]
            truth = slope * (row["x_value"] - row["x_reference"])
            hits[key] += int(row["lower"] <= truth <= row["upper"])
    for key, h in hits.items():
        assert abs(h / reps - 0.95) <= band, (key, h / reps)


def test_estimable_rows_say_ok_and_carry_the_scale(refit_frame: Any, one_analysis: Any) -> None:
    # Every estimable row is "ok" with no message, names its scale (the README's effect scales)
    # and has no level; the reference group's own row is the null contrast.
    frame = clinic_frame("count", 800, seed=21)
    spec, r = refit_frame(frame, _raw(one_analysis, "count"))
    eff = effects_table(r, spec)
    assert (eff["status"] == "ok").all() and (eff["message"] == "").all()
    assert (eff["scale"] == "rate ratio").all() and (eff["by_level"] == "").all()
    own = eff[eff["contrast"] == "5-<9 (reference)"]
    assert len(own) == 11 and (own["effect"] == 1.0).all()  # 4 forms x 2 codings + 3 crude
    labels = eff.groupby("contrast_type")["contrast"].agg(set)
    assert labels["per_unit"] == {"per unit"}
    assert labels["iqr"] == {"75th vs 25th percentile"}
    assert (eff.loc[eff["contrast_type"] != "group", "group"] == "").all()


def _linear_slope(frame: pd.DataFrame) -> float:
    """Reference library: statsmodels OLS of the score on the marker alone."""
    import statsmodels.api as sm

    return float(sm.OLS(frame["score"], sm.add_constant(frame["marker"])).fit().params["marker"])


def test_an_empty_legacy_group_gives_not_estimable_rows_and_the_others_go_on(
        refit_frame: Any, one_analysis: Any) -> None:
    # A middle legacy group with no rows: its contrast in every form is "not_estimable" with a
    # message naming it; the groups after it are still estimated (linear form, no adjustment:
    # the OLS slope times the distance between the group medians, numpy and statsmodels by
    # hand). Forms without a spline: the FP rows still follow the missing spline's place.
    frame = clinic_frame("continuous", 900, seed=22)
    frame = frame[(frame["marker"] < 5.0) | (frame["marker"] >= 6.0)].reset_index(drop=True)
    grouping = {"cuts": [2.5, 5.0, 6.0, 9.0], "reference": "6-<9"}
    raw = one_analysis(OUTCOMES["continuous"], "marker", grouping,
                       continuous={"forms": ["linear", "fp"]})
    spec, r = refit_frame(frame, raw)
    eff = effects_table(r, spec)
    x = frame["marker"].to_numpy()
    x_ref = float(np.median(x[(x >= 6.0) & (x < 9.0)]))
    empty = eff[(eff["contrast_type"] == "group") & (eff["group"] == "5-<6")]
    assert set(empty["form"]) == {"legacy", "linear", "spline", "fp"}  # spline: crude only
    assert (empty["status"] == "not_estimable").all()
    assert (empty["message"] == "legacy group '5-<6' has no rows in the analysis sample").all()
    assert list(eff.columns) == [  # the README's columns, nothing else
        "adjustment", "form", "status", "message", "contrast_type", "contrast", "group",
        "x_value", "x_reference", "estimate", "se", "within_p10", "within_p90", "by_level",
        "lower", "upper", "effect", "effect_lower", "effect_upper", "scale", "variance"]
    # no weights, no cluster: model-based SEs wherever there is an estimate
    assert (eff.loc[eff["estimate"].notna(), "variance"] == "model").all()
    assert empty["estimate"].isna().all() and empty["x_value"].isna().all()
    np.testing.assert_allclose(empty["x_reference"], x_ref, rtol=1e-12)
    assert (empty["contrast"] == "5-<6 vs 6-<9").all()
    slope = _linear_slope(frame)
    lin = eff[(eff["form"] == "linear") & (eff["adjustment"] == "none")
              & (eff["contrast_type"] == "group") & (eff["status"] == "ok")].set_index("group")
    assert sorted(lin.index) == ["2.5-<5", "6-<9", "<2.5", ">=9"]
    for label, lo, hi in (("<2.5", -np.inf, 2.5), ("2.5-<5", 2.5, 5.0), (">=9", 9.0, np.inf)):
        x_g = float(np.median(x[(x >= lo) & (x < hi)]))
        assert lin.loc[label, "x_value"] == pytest.approx(x_g, rel=1e-12)
        assert lin.loc[label, "estimate"] == pytest.approx(slope * (x_g - x_ref), rel=1e-9)
    for coding in ("legacy", "continuous"):
        fp = eff[(eff["form"] == "fp") & (eff["adjustment"] == coding)]
        assert len(fp) == 6  # five groups and the IQR contrast


def test_an_empty_reference_group_makes_every_group_contrast_not_estimable(
        refit_frame: Any, one_analysis: Any) -> None:
    frame = clinic_frame("continuous", 600, seed=23)
    frame = frame[(frame["marker"] < 5.0) | (frame["marker"] >= 9.0)].reset_index(drop=True)
    raw = one_analysis(OUTCOMES["continuous"], "marker", dict(MARKER_GROUPING),
                       continuous={"forms": ["linear"]})
    spec, r = refit_frame(frame, raw)
    eff = effects_table(r, spec)
    groups = eff[eff["contrast_type"] == "group"]
    assert len(groups) and (groups["status"] == "not_estimable").all()
    assert groups["x_reference"].isna().all() and groups["estimate"].isna().all()
    # each row names the group without rows: its own when it is empty, else the reference
    assert (groups["message"] == "legacy group '5-<9' has no rows in the analysis sample").all()
    assert set(groups["contrast"]) == {"<2.5 vs 5-<9", "2.5-<5 vs 5-<9", "5-<9 (reference)",
                                       ">=9 vs 5-<9"}
    assert groups["x_value"].notna().sum() == 0 and (groups["contrast_type"] == "group").all()
    # the IQR and per-unit contrasts do not need the reference group (OLS slope, statsmodels)
    lin = eff[(eff["form"] == "linear") & (eff["adjustment"] == "none")].set_index(
        "contrast_type")
    assert lin.loc["per_unit", "estimate"] == pytest.approx(_linear_slope(frame), rel=1e-9)
    assert lin.loc["per_unit", "status"] == "ok"


def test_quartiles_in_one_legacy_group_make_only_the_legacy_iqr_not_estimable(
        refit_frame: Any, one_analysis: Any) -> None:
    # Cuts outside the interquartile range: the grouped model gives both quartiles the same
    # value, so its IQR contrast is "not_estimable" (NaN, a message naming the percentiles and
    # the group); the linear form's IQR contrast is the OLS slope times the IQR (statsmodels).
    frame = clinic_frame("continuous", 700, seed=24)
    raw = one_analysis(OUTCOMES["continuous"], "marker", {"cuts": [1.0, 20.0]},
                       continuous={"forms": ["linear"]})
    spec, r = refit_frame(frame, raw)
    eff = effects_table(r, spec)
    iqr = eff[(eff["contrast_type"] == "iqr") & (eff["adjustment"] == "none")].set_index("form")
    q25, q75 = np.quantile(frame["marker"], [0.25, 0.75])
    assert iqr.loc["legacy", "status"] == "not_estimable"
    assert np.isnan(iqr.loc["legacy", "estimate"]) and np.isnan(iqr.loc["legacy", "se"])
    assert iqr.loc["legacy", "message"] == (
        f"the 25th and 75th percentiles ({q25:g}, {q75:g}) fall in the same legacy group "
        "'1-<20': the grouped model cannot contrast them")
    assert iqr.loc["linear", "status"] == "ok" and iqr.loc["linear", "message"] == ""
    assert iqr.loc["linear", "estimate"] == pytest.approx(_linear_slope(frame) * (q75 - q25),
                                                          rel=1e-9)


def _cr(var: str, knots: Any) -> str:
    """patsy's natural cubic spline on the given knots, centred: the same function space as the
    restricted cubic spline without its constant (Durrleman & Simon 1989)."""
    k = [float(v) for v in knots]
    return (f"cr({var}, knots={k[1:-1]}, lower_bound={k[0]}, upper_bound={k[-1]}, "
            "constraints='center')")


def _modifier_case(cuts: list[float]) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Exposure x (legacy ``cuts``), effect modifier w (legacy cut at 50), adjuster z; logistic
    with a modest x by level interaction."""
    rng = np.random.default_rng(31)
    n = 2500
    w = rng.uniform(0, 100, n)
    x = 50 + 0.15 * (w - 50) + rng.normal(0, 10, n)
    z = rng.normal(0, 1, n)
    lp = -1 + 0.04 * (x - 50) + 0.8 * (w >= 50) + 0.3 * z + 0.02 * (w >= 50) * (x - 50)
    frame = pd.DataFrame({"x": x, "w": w, "z": z,
                          "y": (rng.random(n) < 1 / (1 + np.exp(-lp))).astype(int)})
    raw = {"study": "sim", "cohorts": [{"name": "sim", "path": "sim.parquet"}],
           "groupings": {"x": {"cuts": cuts}, "w": {"cuts": [50]}},
           "analyses": [{"name": "a", "outcome": {"type": "binary", "event": "y"},
                         "exposure": "x", "adjust": ["z"], "by": "w",
                         "continuous": {"forms": ["linear"]}}]}
    return frame, raw


def test_level_rows_of_the_spline_remain_when_the_grouped_level_model_fails(
        refit_frame: Any) -> None:
    # An empty legacy group (cut above every value) makes the legacy x level model impossible;
    # the spline x level rows are still there, per coding and level, for the groups with rows.
    frame, raw = _modifier_case([60, 500])
    spec, r = refit_frame(frame, raw)
    eff = effects_table(r, spec)
    levels = eff[eff["by_level"] != ""]
    assert levels.groupby(["form", "adjustment"]).size().to_dict() == {
        ("spline x level", "continuous"): 4, ("spline x level", "legacy"): 4}
    assert (levels["status"] == "ok").all() and levels["estimate"].notna().all()


def test_spline_by_level_group_contrasts_match_statsmodels(refit_frame: Any) -> None:
    # The spline x level rows (continuous adjustment): per level of the modifier w, each legacy
    # group's median vs the reference group's median within the level, and the spread at the
    # group's 10th/90th percentiles, equal statsmodels GLM (binomial) contrasts d'b with SE
    # sqrt(d'Vd) on patsy's natural spline with the same knots x C(level), the level main
    # effect and the continuous adjusters' splines in the model (default 4-knot quantiles).
    import patsy
    import statsmodels.api as sm

    from unbin.refit.interaction import interaction_spline

    frame, raw = _modifier_case([60])
    x, w, z = (frame[c].to_numpy() for c in ("x", "w", "z"))
    spec, r = refit_frame(frame, raw)
    eff = effects_table(r, spec)
    quant = [0.05, 0.35, 0.65, 0.95]
    zk, wk = np.quantile(z, quant), np.quantile(w, quant)
    f = frame.assign(lvl=np.where(w >= 50, "b", "a"))
    yv, X = patsy.dmatrices(
        f"y ~ {_cr('x', interaction_spline(r).knots)} * C(lvl) + {_cr('z', zk)} + "
        f"{_cr('w', wk)}", f, return_type="dataframe")
    fit = sm.GLM(yv, X, family=sm.families.Binomial()).fit(tol=1e-12)
    b, V, di = fit.params.to_numpy(), fit.cov_params().to_numpy(), X.design_info

    def contrast(xs: np.ndarray, x_ref: float, lvl: str) -> tuple[np.ndarray, np.ndarray]:
        new = pd.DataFrame({"x": xs, "lvl": lvl, "z": 0.0, "w": 50.0})
        D = (np.asarray(patsy.build_design_matrices([di], new)[0])
             - np.asarray(patsy.build_design_matrices([di], new.assign(x=x_ref))[0]))
        return D @ b, np.sqrt(np.einsum("ij,jk,ik->i", D, V, D))

    levels = eff[eff["by_level"] != ""]
    assert levels.groupby(["form", "adjustment"]).size().to_dict() == {
        ("legacy x level", "continuous"): 4, ("legacy x level", "legacy"): 4,
        ("spline x level", "continuous"): 4, ("spline x level", "legacy"): 4}
    rows = eff[(eff["form"] == "spline x level") & (eff["adjustment"] == "continuous")]
    for label, lvl, in_lvl in (("<50", "a", w < 50), (">=50", "b", w >= 50)):
        x_ref = float(np.median(x[in_lvl & (x < 60)]))
        for group, in_grp in (("<60", x < 60), (">=60", x >= 60)):
            row = rows[(rows["by_level"] == label) & (rows["group"] == group)].iloc[0]
            vals = x[in_lvl & in_grp]
            x_g = float(np.median(vals))
            est, se = contrast(np.array([x_g]), x_ref, lvl)
            spread, _ = contrast(np.quantile(vals, [0.10, 0.90]), x_ref, lvl)
            assert row["status"] == "ok"
            assert row["contrast"] == (f"<60 (w = {label}) (reference)" if group == "<60"
                                       else f">=60 vs <60 (w = {label})")
            assert row["x_value"] == pytest.approx(x_g, rel=1e-12)
            assert row["x_reference"] == pytest.approx(x_ref, rel=1e-12)
            assert row["estimate"] == pytest.approx(est[0], rel=1e-5, abs=1e-7)
            assert row["se"] == pytest.approx(se[0], rel=1e-5, abs=1e-9)
            np.testing.assert_allclose([row["within_p10"], row["within_p90"]], np.exp(spread),
                                       rtol=1e-5)
            assert row["scale"] == "odds ratio"


def test_a_level_without_reference_rows_gives_not_estimable_level_contrasts(
        refit_frame: Any) -> None:
    frame, raw = level_without_reference_rows()
    spec, r = refit_frame(frame, raw)
    eff = effects_table(r, spec)
    lv = eff[eff["by_level"] == ">=50"]
    assert set(lv["form"]) == {"spline x level", "legacy x level"} and len(lv) == 4
    assert (lv["status"] == "not_estimable").all() and lv["estimate"].isna().all()
    assert (lv["group"] == ">=60").all()  # the level's only group with rows
    spline = eff[(eff["by_level"] == "<50") & (eff["form"] == "spline x level")]
    assert len(spline) == 4 and (spline["status"] == "ok").all()
