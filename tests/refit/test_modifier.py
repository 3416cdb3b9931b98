"""Effect modification (``by``): the modifier enters every adjusted model as a factor of its
levels, and the interaction models (unbin.refit.interaction) hold the level main effects on both sides
of their test. Checked against statsmodels fits of the same explicit designs (patsy natural cubic
splines on the recorded knots), the type-I error of the interaction test under its null in a
seeded replicate study, and per-level curves against a simulated truth."""

from __future__ import annotations

import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import patsy
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from scipy import special, stats

from helpers import keep_analyses, load_check
from unbin.data import analysis_sample
from unbin.questions.curves import curves_table
from unbin.questions.effects import effects_table
from unbin.questions.information import information_table
from unbin.refit.analysis import Refit, adjustment_terms, bare_refit, refit_analysis
from unbin.refit.interaction import SPLINE, fit_level_model, interaction_spline
from unbin.refit.modifier import levels_from_terms
from unbin.spec import Spec, parse_spec
from unbin.terms import GroupedTerm

X_QUANTILES = [0.05, 0.35, 0.65, 0.95]  # the interaction spline's 4 default knots
Z_QUANTILES = [0.05, 0.35, 0.65, 0.95]  # default 4 adjustment knots (common practice)


def _raw(outcome: dict[str, Any], **analysis: Any) -> dict[str, Any]:
    """Exposure x (legacy cut at 60), modifier w with a legacy grouping at 50, adjustment z."""
    return {
        "study": "sim",
        "cohorts": [{"name": "sim", "path": "sim.parquet"}],
        "groupings": {"x": {"cuts": [60]}, "w": {"cuts": [50]}},
        "analyses": [{"name": "a", "outcome": outcome, "exposure": "x", "adjust": ["z"],
                      "by": "w", "continuous": {"forms": ["linear", "spline"],
                                                "spline_knots": [3, 4, 5]},
                      **analysis}],
    }


def _null_frame(n: int, seed: int, step: float = 1.2) -> pd.DataFrame:
    """A main step of the modifier w at its cut (50), no interaction: logit P(y) = -1 +
    0.04 (x - 50) + step [w >= 50] + 0.3 z; x rises with w, so a misfitted modifier leaks
    into the exposure's terms."""
    rng = np.random.default_rng(seed)
    w = rng.uniform(0, 100, n)
    x = 50 + 0.15 * (w - 50) + rng.normal(0, 10, n)
    z = rng.normal(0, 1, n)
    lp = -1 + 0.04 * (x - 50) + step * (w >= 50) + 0.3 * z
    y = (rng.random(n) < special.expit(lp)).astype(int)
    return pd.DataFrame({"x": x, "w": w, "z": z, "y": y})


def _refit(frame: pd.DataFrame, raw: dict[str, Any], tmp: Path) -> tuple[Spec, Refit]:
    spec = parse_spec(raw, base=tmp)
    a = spec.analyses[0]
    return spec, refit_analysis(analysis_sample(frame, a, spec), a, spec, "sim")


def _cr(var: str, knots: list[float] | np.ndarray) -> str:
    """patsy's natural cubic spline on the given knots, centred: the same function space as
    the restricted cubic spline without its constant (Durrleman & Simon 1989)."""
    k = [float(v) for v in knots]
    return (f"cr({var}, knots={k[1:-1]}, lower_bound={k[0]}, upper_bound={k[-1]}, "
            "constraints='center')")


@pytest.fixture(scope="module")
def null_case(tmp_path_factory: pytest.TempPathFactory) -> tuple[pd.DataFrame, Spec, Refit]:
    frame = _null_frame(3000, 11)
    spec, r = _refit(frame, _raw({"type": "binary", "event": "y"}),
                     tmp_path_factory.mktemp("null"))
    return frame, spec, r


def test_modifier_enters_both_codings_as_its_levels(
        null_case: tuple[pd.DataFrame, Spec, Refit]) -> None:
    """Both adjustment codings hold w as the factor of its legacy groups (README: "enters as a
    factor"); the continuous coding adds w's own spline (the trend within the levels), as for
    any numeric adjuster."""
    _, _, r = null_case
    for coding in ("legacy", "continuous"):
        adjust = r.get("null", coding).adjust_terms
        by = [t for t in adjust if t.variable == "w" and isinstance(t, GroupedTerm)]
        assert len(by) == 1 and by[0].cuts == (50.0,), (coding, adjust)
        others = [t for t in adjust if t.variable == "w" and not isinstance(t, GroupedTerm)]
        assert len(others) == (coding == "continuous"), (coding, adjust)


def test_null_interaction_with_a_main_step_is_not_significant(
        null_case: tuple[pd.DataFrame, Spec, Refit]) -> None:
    """A main step of the modifier and no interaction: the interaction test (fixed 4-knot
    spline x level, level main effects on both sides) is not significant at 5% in either
    coding (a seeded draw; the replicate study below gives the operating characteristic)."""
    frame, spec, r = null_case
    info = information_table(r, spec).set_index("adjustment")
    for coding in ("legacy", "continuous"):
        assert info.loc[coding, "interaction_df"] == 3
        assert info.loc[coding, "interaction_p"] > 0.05, info.loc[coding].to_dict()
        assert "4 knots" in info.loc[coding, "interaction_detail"]
    assert np.isnan(info.loc["none", "interaction_lr"])


def test_interaction_lr_matches_statsmodels(null_case: tuple[pd.DataFrame, Spec, Refit]) -> None:
    """LR of spline x level, continuous adjustment: statsmodels GLM (binomial) on patsy's
    natural cubic spline with the recorded knots, C(level) in both models; to 1e-6."""
    frame, spec, r = null_case
    info = information_table(r, spec).set_index("adjustment")
    knots = interaction_spline(r).knots
    np.testing.assert_allclose(knots, np.quantile(frame["x"], X_QUANTILES), rtol=1e-12)
    zk = np.quantile(frame["z"], Z_QUANTILES)
    wk = np.quantile(frame["w"], Z_QUANTILES)  # w's own spline, continuous coding
    f = frame.assign(lvl=np.where(frame["w"] >= 50, "b", "a"))
    fam = sm.families.Binomial()
    main = smf.glm(f"y ~ {_cr('x', knots)} + C(lvl) + {_cr('z', zk)} + {_cr('w', wk)}", f,
                   family=fam).fit(tol=1e-12)
    full = smf.glm(f"y ~ {_cr('x', knots)} * C(lvl) + {_cr('z', zk)} + {_cr('w', wk)}", f,
                   family=fam).fit(tol=1e-12)
    lr = 2 * (full.llf - main.llf)
    np.testing.assert_allclose(info.loc["continuous", "interaction_lr"], lr, rtol=1e-6)
    np.testing.assert_allclose(info.loc["continuous", "interaction_p"], stats.chi2.sf(lr, 3),
                               rtol=1e-5)
    # legacy coding: z as it is (linear), w as its groups
    main_l = smf.glm(f"y ~ {_cr('x', knots)} + C(lvl) + z", f, family=fam).fit(tol=1e-12)
    full_l = smf.glm(f"y ~ {_cr('x', knots)} * C(lvl) + z", f, family=fam).fit(tol=1e-12)
    np.testing.assert_allclose(info.loc["legacy", "interaction_lr"],
                               2 * (full_l.llf - main_l.llf), rtol=1e-6)


def _per_level_reference(frame: pd.DataFrame) -> pd.DataFrame:
    rows = []
    for lvl, g in frame.groupby(frame["w"] >= 50):
        rows.append({"lvl": "b" if lvl else "a", "x_ref": float(np.median(g["x"][g["x"] < 60]))})
    return pd.DataFrame(rows).set_index("lvl")


def test_per_level_curves_match_statsmodels_delta_method(
        null_case: tuple[pd.DataFrame, Spec, Refit]) -> None:
    """Per-level curves of the spline x level model (continuous adjustment): estimate and SE of
    f_j(x) - f_j(x_ref,j) equal statsmodels' contrast d'b with SE sqrt(d'Vd), d the difference of
    the patsy design rows at x and at the level's reference (median of x < 60 within the level)."""
    frame, spec, r = null_case
    cur = curves_table(r, spec)
    assert (cur.loc[cur["form"] != SPLINE, "by_level"] == "").all()
    knots = interaction_spline(r).knots
    zk = np.quantile(frame["z"], Z_QUANTILES)
    wk = np.quantile(frame["w"], Z_QUANTILES)
    f = frame.assign(lvl=np.where(frame["w"] >= 50, "b", "a"))
    yv, X = patsy.dmatrices(f"y ~ {_cr('x', knots)} * C(lvl) + {_cr('z', zk)} + {_cr('w', wk)}",
                            f, return_type="dataframe")
    full = sm.GLM(yv, X, family=sm.families.Binomial()).fit(tol=1e-12)
    di = X.design_info
    refs = _per_level_reference(frame)
    for label, lvl in (("<50", "a"), (">=50", "b")):
        rows = cur[(cur["form"] == SPLINE) & (cur["adjustment"] == "continuous")
                   & (cur["by_level"] == label)]
        assert len(rows) == r.analysis.continuous.grid_points
        x_ref = refs.loc[lvl, "x_ref"]
        np.testing.assert_allclose(rows["x_reference"], x_ref, rtol=1e-12)
        xs = rows["x"].to_numpy()
        new = pd.DataFrame({"x": xs, "lvl": lvl, "z": 0.0, "w": 50.0})
        at_ref = new.assign(x=x_ref)
        D = (np.asarray(patsy.build_design_matrices([di], new)[0])
             - np.asarray(patsy.build_design_matrices([di], at_ref)[0]))
        est = D @ full.params.to_numpy()
        se = np.sqrt(np.einsum("ij,jk,ik->i", D, full.cov_params().to_numpy(), D))
        np.testing.assert_allclose(rows["estimate"], est, rtol=1e-5, atol=1e-7)
        np.testing.assert_allclose(rows["se"], se, rtol=1e-5, atol=1e-7)


def test_legacy_subgroup_contrasts_match_statsmodels(
        null_case: tuple[pd.DataFrame, Spec, Refit]) -> None:
    """Legacy groups x level (continuous adjustment): each group vs the reference group within
    each level equals the statsmodels GLM contrast of C(grp) * C(lvl) (main + interaction
    coefficient), with its delta-method SE."""
    frame, spec, r = null_case
    eff = effects_table(r, spec)
    zk = np.quantile(frame["z"], Z_QUANTILES)
    wk = np.quantile(frame["w"], Z_QUANTILES)
    f = frame.assign(lvl=np.where(frame["w"] >= 50, "b", "a"),
                     grp=np.where(frame["x"] >= 60, "hi", "lo"))
    fit = smf.glm(f"y ~ C(grp, Treatment('lo')) * C(lvl) + {_cr('z', zk)} + {_cr('w', wk)}", f,
                  family=sm.families.Binomial()).fit(tol=1e-12)
    p, V = fit.params, fit.cov_params()
    g = "C(grp, Treatment('lo'))[T.hi]"
    gi = f"{g}:C(lvl)[T.b]"
    want = {"<50": (p[g], np.sqrt(V.loc[g, g])),
            ">=50": (p[g] + p[gi], np.sqrt(V.loc[g, g] + 2 * V.loc[g, gi] + V.loc[gi, gi]))}
    for label, (est, se) in want.items():
        row = eff[(eff["form"] == "legacy x level") & (eff["adjustment"] == "continuous")
                  & (eff["by_level"] == label) & (eff["group"] == ">=60")]
        assert len(row) == 1
        assert row["contrast"].iloc[0] == f">=60 vs <60 (w = {label})"
        np.testing.assert_allclose(row["estimate"].iloc[0], est, rtol=1e-6)
        np.testing.assert_allclose(row["se"].iloc[0], se, rtol=1e-5)
    assert (eff.loc[~eff["form"].str.endswith(" x level"), "by_level"] == "").all()


def test_per_level_thresholds_plug_back_into_statsmodels(tmp_path: Path) -> None:
    """Implied thresholds per level of a grouped modifier come from the interaction model WITH
    the level main effect: at each reported exposure value x*, the statsmodels GLM (binomial,
    patsy natural cubic spline on the recorded knots x C(level) + splines of z and w) gives the
    threshold risk at the same quantile of the level's linear predictors with x set to x*."""
    from unbin.questions.thresholds import thresholds_table

    frame = _null_frame(3000, 11)
    raw = _raw({"type": "binary", "event": "y"})
    raw["risk_thresholds"] = [0.3, 0.5]
    spec, r = _refit(frame, raw, tmp_path)
    tab = thresholds_table(r, spec)
    rows = tab[(tab["model"] == "spline x w") & (tab["status"] == "ok")
               & tab["exposure_value"].notna()]
    assert set(rows["level"]) == {"<50", ">=50"}
    knots = interaction_spline(r).knots
    zk = np.quantile(frame["z"], Z_QUANTILES)
    wk = np.quantile(frame["w"], Z_QUANTILES)
    f = frame.assign(lvl=np.where(frame["w"] >= 50, "b", "a"))
    yv, X = patsy.dmatrices(f"y ~ {_cr('x', knots)} * C(lvl) + {_cr('z', zk)} + {_cr('w', wk)}",
                            f, return_type="dataframe")
    full = sm.GLM(yv, X, family=sm.families.Binomial()).fit(tol=1e-12)
    di = X.design_info
    for row in rows.itertuples():
        part = f[f["lvl"] == ("b" if row.level == ">=50" else "a")]
        Xs = np.asarray(patsy.build_design_matrices([di], part.assign(x=row.exposure_value))[0])
        lp = np.quantile(Xs @ full.params.to_numpy(), row.profile_quantile)
        assert abs(special.expit(lp) - row.threshold) < 1e-6, row


def test_interaction_type_one_error_in_replicates(tmp_path: Path) -> None:
    """Type-I error of the interaction LR test at 5% under its null (main step of the modifier,
    no interaction): 200 seeded replicates of n = 1000, logistic; the rejection rate must lie in
    0.05 +- 3 sqrt(0.05 x 0.95 / 200) (two-sided Monte-Carlo band, common practice). Uses the
    same functions as the workflow (adjustment_terms, interaction_spline, fit_level_model)."""
    out = load_check("interaction").run(200, 2026)
    band = 3 * np.sqrt(0.05 * 0.95 / 200)
    assert out["failed"] == 0
    assert abs(out["type1_error"] - 0.05) <= band, out


def test_per_level_curves_recover_a_real_interaction(tmp_path: Path) -> None:
    """Known truth, linear outcome: y = 2 + b_j (x - 50) + 1.5 [w >= 50] + 0.5 z + e, e ~ N(0, 1),
    b = 0.08 below the modifier's cut and -0.04 above. The interaction is detected (p < 1e-6)
    and each level's curve, relative to its own reference value, is within 4 pointwise SEs of
    b_j (x - x_ref,j) at every in-range grid point, and within 0.25 outcome units."""
    rng = np.random.default_rng(5)
    n = 4000
    w = rng.uniform(0, 100, n)
    x = 50 + 0.15 * (w - 50) + rng.normal(0, 10, n)
    z = rng.normal(0, 1, n)
    slope = np.where(w >= 50, -0.04, 0.08)
    y = 2 + slope * (x - 50) + 1.5 * (w >= 50) + 0.5 * z + rng.normal(0, 1, n)
    frame = pd.DataFrame({"x": x, "w": w, "z": z, "y": y})
    spec, r = _refit(frame, _raw({"type": "continuous", "value": "y"}), tmp_path)
    info = information_table(r, spec).set_index("adjustment")
    assert info.loc["continuous", "interaction_p"] < 1e-6
    cur = curves_table(r, spec)
    for label, b in (("<50", 0.08), (">=50", -0.04)):
        rows = cur[(cur["form"] == SPLINE) & (cur["adjustment"] == "continuous")
                   & (cur["by_level"] == label) & cur["in_range"]]
        truth = b * (rows["x"] - rows["x_reference"])
        err = (rows["estimate"] - truth).abs()
        assert (err <= 4 * rows["se"]).all(), label
        assert err.max() < 0.25, label


def test_no_modifier_and_numeric_modifier_without_levels(tmp_path: Path) -> None:
    """Without by: interaction columns NaN/empty and by_level "". A numeric by with many values
    and no grouping: no levels, and the information table says why."""
    frame = _null_frame(600, 3)
    raw = _raw({"type": "binary", "event": "y"})
    del raw["analyses"][0]["by"]
    spec, r = _refit(frame, raw, tmp_path)
    info = information_table(r, spec)
    assert info["interaction_lr"].isna().all() and (info["interaction_detail"] == "").all()
    assert (curves_table(r, spec)["by_level"] == "").all()
    assert (effects_table(r, spec)["by_level"] == "").all()
    raw = _raw({"type": "binary", "event": "y"})
    del raw["groupings"]["w"]
    spec, r = _refit(frame, raw, tmp_path)
    info = information_table(r, spec).set_index("adjustment")
    assert np.isnan(info.loc["continuous", "interaction_lr"])
    assert "no grouping" in info.loc["continuous", "interaction_detail"]


def test_levels_come_from_the_factor_in_the_adjustment(tmp_path: Path) -> None:
    """The levels the interaction uses are those of the factor in the adjustment terms: the
    legacy groups of w (cut 50, closed left: 50 itself is in '>=50'; the spec's semantics)."""
    frame = pd.DataFrame({"x": np.linspace(30, 80, 40), "w": np.r_[np.full(20, 49.0),
                                                                       np.full(20, 50.0)],
                          "z": 0.0, "y": np.tile([0, 1], 20)})
    spec = parse_spec(_raw({"type": "binary", "event": "y"}), base=tmp_path)
    a = spec.analyses[0]
    s = analysis_sample(frame, a, spec)
    r = bare_refit(s, a, spec, "sim")
    adjust = adjustment_terms(s.frame, a, spec, "continuous")
    lv = levels_from_terms("w", adjust, s.frame, len(r.x))
    assert lv.labels == ("<50", ">=50")
    np.testing.assert_array_equal(lv.codes, np.r_[np.zeros(20), np.ones(20)])
    m = fit_level_model(r, interaction_spline(r), adjust, "continuous", lv)
    assert m.df == 3


@pytest.fixture(scope="module")
def demo_tables() -> tuple[Spec, dict[str, pd.DataFrame]]:
    """The demo's two analyses with a ``by`` on its first cohort, through ``jobs.analyse`` (the
    workflow's per-analysis function), without the resampling questions."""
    from unbin.demo import demo_spec, simulate_registry
    from unbin.pipeline.jobs import analyse

    raw = demo_spec()
    keep_analyses(raw, "readmission_sodium", "sbp_urate")
    spec = parse_spec(raw, base=Path("."))
    frame = simulate_registry()
    out: dict[str, list[pd.DataFrame]] = {}
    for a in spec.analyses:
        tables, status = analyse(spec, "lindenfeld", a.name, frame, resampling=False)
        assert status["status"] == "ok", status["message"]
        for name, df in tables.items():
            out.setdefault(name, []).append(
                df.assign(cohort="lindenfeld", analysis=a.name)[["cohort", "analysis",
                                                                  *df.columns]])
    with warnings.catch_warnings():  # tables of both analyses with all-missing columns
        warnings.simplefilter("ignore", FutureWarning)
        return spec, {k: pd.concat(v, ignore_index=True) for k, v in out.items()}


def test_demo_effect_modification_recovers_its_truth(
        demo_tables: tuple[Spec, dict[str, pd.DataFrame]]) -> None:
    """unbin.demo's truths: systolic pressure's slope on urate is 0.5, 1.5, 2.5, 3.5 mmHg per
    mg/dL in the age groups <50, 50-<60, 60-<70, >=70 (a real interaction, detected at p < 0.001);
    each level's curve, a line through its reference, has the level's slope within 3 SEs of a
    least-squares line through the curve (SE of the curve at the level's 90th percentile over
    its distance from the reference). Per-level thresholds and the legacy subgroup contrasts
    are filled for the analyses with a ``by``."""
    from unbin.demo import TRUE_SBP_PER_URATE_BY_AGE

    _, t = demo_tables
    info = t["information"].set_index(["analysis", "adjustment"])
    assert info.loc[("sbp_urate", "continuous"), "interaction_p"] < 1e-3
    assert info.loc[("sbp_urate", "continuous"), "interaction_df"] == 9
    cur = t["curves"]
    cur = cur[(cur["analysis"] == "sbp_urate") & (cur["form"] == SPLINE)
              & (cur["adjustment"] == "continuous") & cur["in_range"]]
    for level, slope in zip(("<50", "50-<60", "60-<70", ">=70"), TRUE_SBP_PER_URATE_BY_AGE,
                            strict=True):
        g = cur[cur["by_level"] == level]
        dx = (g["x"] - g["x_reference"]).to_numpy()
        fitted = float(np.polyfit(dx, g["estimate"].to_numpy(), 1)[0])
        far = int(np.argmax(np.abs(dx)))
        se_slope = float(g["se"].to_numpy()[far] / abs(dx[far]))
        assert abs(fitted - slope) < 3 * se_slope, (level, fitted, se_slope)
    thr = t["thresholds"]
    assert set(thr.loc[thr["analysis"] == "sbp_urate", "level"]) >= {"<50", ">=70"}
    eff = t["effects"]
    assert set(eff.loc[eff["form"] == "legacy x level", "by_level"]) >= {"0", "1"}


def test_demo_level_curves_figure(demo_tables: tuple[Spec, dict[str, pd.DataFrame]]) -> None:
    """The level-curves figure is drawn for an analysis with a ``by`` (one panel per level,
    the interaction test in its alt text) and skipped for one without per-level rows."""
    from unbin.present.figures import Context
    from unbin.present.figures.levels import draw

    spec, t = demo_tables
    ctx = Context(t, spec)
    drawn = draw(ctx, "lindenfeld", "sbp_urate")
    assert drawn is not None
    assert "4 panels" in drawn.alt and "interaction LR" in drawn.alt
    no_levels = {k: (v[v["form"] != SPLINE] if k == "curves" else v) for k, v in t.items()}
    assert draw(Context(no_levels, spec), "lindenfeld", "sbp_urate") is None
