"""The pooled tables (unbin.consortium.pool) row by row on hand-made bundles: every column the
output reference names, the rows at the reference value, at one cohort and where no cohort
counts, the multivariate and heterogeneity rows in full, which contrasts pool, the
harmonisation edges, and independence from the order the bundles come in."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.meta_analysis import combine_effects

from bundle_rows import coef_rows, contrast_row, curve_rows, cut_rows, rcs_basis
from unbin.consortium.pool import (
    SINGLE,
    _effect_columns,
    group_signatures,
    harmonisation,
    multivariate_curves,
    pool_bundles,
    pooled_curves,
    pooled_effects,
)
from unbin.errors import UnbinError

Z = stats.norm.ppf(0.975)

# The columns of README's output reference (rows `pooled_curves`, `pooled_effects`,
# `heterogeneity`, `harmonisation`), with the key columns in front.
CURVE_COLUMNS = {"analysis", "adjustment", "form", "method", "x", "x_reference", "k", "estimate",
                 "se", "lower", "upper", "pi_lower", "pi_upper", "effect", "effect_lower",
                 "effect_upper", "effect_pi_lower", "effect_pi_upper", "tau2", "tau2_method",
                 "i2", "q", "scale"}
EFFECT_COLUMNS = {"analysis", "adjustment", "form", "contrast_type", "contrast", "groups",
                  "x_value", "x_reference", "method", "k", "cohorts", "estimate", "se", "lower",
                  "upper", "pi_lower", "pi_upper", "effect", "effect_lower", "effect_upper",
                  "effect_pi_lower", "effect_pi_upper", "tau2", "tau2_method", "scale"}
HET_COLUMNS = {"analysis", "adjustment", "item", "k", "q", "q_df", "q_p", "i2", "tau2",
               "tau2_method", "status", "message"}
KNOTS = [1.0, 2.0, 3.0, 4.0]


def _moments(Y: np.ndarray, S: np.ndarray) -> dict[str, object]:
    """Jackson, White & Thompson 2010 (Stat Med 29:1282), written out in numpy."""
    k, p = Y.shape
    W = np.linalg.inv(S)
    fe_cov = np.linalg.inv(W.sum(0))
    fe = fe_cov @ np.einsum("ipq,iq->p", W, Y)
    Qm = sum(W[i] @ np.outer(Y[i] - fe, Y[i] - fe) for i in range(k))
    B = W.sum(0) - sum(W[i] @ fe_cov @ W[i] for i in range(k))
    psi_u = np.linalg.solve(B, Qm - (k - 1) * np.eye(p))
    ev, vec = np.linalg.eigh((psi_u + psi_u.T) / 2)
    psi = vec @ np.diag(np.maximum(ev, 0)) @ vec.T
    Wr = np.linalg.inv(S + psi)
    re_cov = np.linalg.inv(Wr.sum(0))
    q = float(np.trace(Qm))
    return {"fe": fe, "fe_cov": fe_cov, "re": re_cov @ np.einsum("ipq,iq->p", Wr, Y),
            "re_cov": re_cov, "q": q, "df": p * (k - 1), "tau2": float(np.trace(psi)),
            "negative": int((ev < 0).sum()), "i2": max(0.0, (q - p * (k - 1)) / q)}


def _bundles() -> dict[str, dict[str, pd.DataFrame]]:
    """Three cohorts; C lists its analyses and contrasts in reverse, B its coefficients; C
    has no coefficients table at all."""
    rng = np.random.default_rng(12)
    xs = np.array([1.0, 2.0, 3.0])
    grid = np.linspace(0.5, 4.5, 5)
    out = {}
    for i, c in enumerate("ABC"):
        parts = [curve_rows(c, a, xs, np.array([-.2, 0, .3]) + 0.1 * i * (xs - 2) + j,
                         np.array([.1, 0, .1]) * (1 + i / 4), np.ones(3, bool))
                 for j, a in enumerate(("a", "b"))]
        parts += [curve_rows(c, a, grid, 0.2 * (grid - 2.5), np.full(5, 0.1), np.ones(5, bool),
                          form="common_spline", ref=2.5) for a in ("a", "b")]
        contrasts = [contrast_row(c, "legacy", "group", "hi vs lo", 0.4 + 0.2 * i, 0.1),
                     contrast_row(c, "legacy", "group", "mid vs lo", 0.2 + 0.1 * i, 0.1),
                     contrast_row(c, "spline", "common quartiles", "common Q3 vs Q1",
                               0.3 - 0.1 * i, 0.08, 6.5, 3.5)]
        if c == "C":
            parts.reverse()
            contrasts.reverse()
        bundle = {"curves": pd.concat(parts, ignore_index=True),
                  "contrasts": pd.DataFrame(contrasts),
                  "counts": pd.DataFrame(),
                  "cuts": pd.DataFrame(cut_rows(c, [5.0], 5.0 + i))}
        if c != "C":
            coefs = []
            for a in ("b", "a") if c == "B" else ("a", "b"):
                A = rng.normal(size=(3, 6))
                coefs.append(coef_rows(c, a, np.array([0.5, -0.3, 0.2]) * (1 + i), A @ A.T * 0.01,
                                    KNOTS))
            bundle["coefficients"] = pd.concat(coefs, ignore_index=True)
        out[c] = bundle
    return out


def test_tables_have_the_documented_columns_and_do_not_depend_on_the_bundle_order() -> None:
    # README's output reference names the columns; the same bundles in another order (and
    # each cohort's analyses in another order) give the same tables, with a plain row index
    # and numeric columns stored as floats.
    bundles = _bundles()
    out = pool_bundles(bundles)
    again = pool_bundles({c: bundles[c] for c in "CBA"})
    assert set(out["pooled_curves"].columns) == CURVE_COLUMNS
    assert set(out["pooled_effects"].columns) == EFFECT_COLUMNS
    assert set(out["heterogeneity"].columns) == HET_COLUMNS
    for name in ("pooled_curves", "pooled_effects", "heterogeneity"):
        pd.testing.assert_frame_equal(out[name], again[name])
        assert isinstance(out[name].index, pd.RangeIndex), name
    for col in ("estimate", "se", "lower", "upper", "pi_lower", "pi_upper", "tau2", "i2", "q"):
        assert out["pooled_curves"][col].dtype == np.float64, col
    assert (out["pooled_curves"]["scale"] == "odds ratio").all()
    assert set(out["pooled_curves"]["analysis"]) == {"a", "b"}
    hm = out["harmonisation"]
    assert "index" not in hm and isinstance(hm.index, pd.RangeIndex) and len(hm) == 3
    assert set(out["pooled_effects"]["groups"]) == {"cuts at 5", ""}


def test_pointwise_rows_at_the_reference_at_one_cohort_and_where_none_counts() -> None:
    # The k rule (module docstring) row by row: x = 0 has one cohort (not pooled: every
    # number missing), x = 5 none (missing, k = 0), x = 2 is the reference (contrast 0 with
    # no variance; cohort C's own range does not reach it, so k = 2). At x = 1 the pooled rows
    # against statsmodels combine_effects (DL; PM with HKSJ) and the prediction interval on
    # t_1 (Higgins, Thompson & Spiegelhalter 2009) written out with scipy.
    xs = np.arange(6.0)
    a = curve_rows("A", "a", xs, np.array([-.4, -.2, 0, .3, .5, .1]),
                np.array([.1, .1, 0, .1, .12, .1]), np.array([1, 1, 1, 1, 1, 0], bool))
    b = curve_rows("B", "a", xs, np.array([-.1, -.3, 0, .1, .9, .1]),
                np.array([.2, .15, 0, .1, .2, .1]), np.array([0, 1, 1, 1, 1, 0], bool))
    c = curve_rows("C", "a", xs, np.array([.3, .4, 0, .2, .2, .1]),
                np.array([.1, .1, 0, .1, .3, .1]), np.array([0, 1, 0, 1, 0, 0], bool))
    pc = pooled_curves(pd.concat([a, b, c], ignore_index=True))
    assert isinstance(pc.index, pd.RangeIndex)
    numbers = ["estimate", "se", "lower", "upper", "pi_lower", "pi_upper", "tau2", "i2", "q"]
    for method in ("fixed", "random", "random HKSJ"):
        rows = pc[pc["method"] == method].set_index("x")
        assert rows["k"].tolist() == [1, 3, 2, 3, 2, 0]
        assert rows.loc[[0.0, 5.0], numbers].isna().all().all()
        assert (rows.loc[2.0, ["estimate", "se", "lower", "upper"]] == 0.0).all()
        assert rows.loc[[2.0], ["pi_lower", "pi_upper"]].isna().all().all()
        assert (rows["tau2_method"] == {"fixed": "", "random": "DL",
                                        "random HKSJ": "PM"}[method]).all()
    y1, v1 = np.array([-.2, -.3, .4]), np.array([.1, .15, .1]) ** 2
    dl = combine_effects(y1, v1, method_re="dl", use_t=False)
    pm = combine_effects(y1, v1, method_re="pm", use_t=True)
    fixed = pc[pc["method"] == "fixed"].set_index("x").loc[1.0]
    assert np.isnan(fixed["tau2"]) and np.isnan(fixed["pi_upper"])
    assert fixed["lower"] == pytest.approx(dl.mean_effect_fe - Z * dl.sd_eff_w_fe, rel=1e-10)
    assert fixed["q"] == pytest.approx(dl.q, rel=1e-10) and fixed["i2"] == pytest.approx(dl.i2)
    rnd = pc[pc["method"] == "random"].set_index("x").loc[1.0]
    assert rnd["tau2"] == pytest.approx(dl.tau2, rel=1e-9)
    half = stats.t.ppf(0.975, 1) * np.sqrt(dl.tau2 + dl.sd_eff_w_re**2)
    assert rnd["pi_upper"] == pytest.approx(dl.mean_effect_re + half, rel=1e-9)
    assert rnd["pi_lower"] == pytest.approx(dl.mean_effect_re - half, rel=1e-9)
    hk = pc[pc["method"] == "random HKSJ"].set_index("x").loc[1.0]
    assert hk["tau2"] == pytest.approx(pm.tau2, rel=1e-5)
    half = stats.t.ppf(0.975, 1) * np.sqrt(hk["tau2"] + hk["se"] ** 2)
    assert hk["pi_upper"] == pytest.approx(hk["estimate"] + half, rel=1e-12)


def test_reference_values_equal_to_rounding_pool_and_different_ones_are_named() -> None:
    xs = np.array([1.0, 2.0, 3.0])
    one = np.ones(3, bool)
    a = curve_rows("A", "a", xs, np.array([-.2, 0, .3]), np.array([.1, 0, .1]), one)
    b = curve_rows("B", "a", xs, np.array([-.1, 0, .2]), np.array([.1, 0, .1]), one,
                ref=2.0 + 2e-13)
    pc = pooled_curves(pd.concat([a, b], ignore_index=True))
    assert (pc["x_reference"] == 2.0).all() and (pc["k"] == 2).all()
    b["x_reference"] = 2.5
    with pytest.raises(UnbinError, match=r"^pooling a: the cohorts' curves use different "
                                         r"reference values \[2\.0, 2\.5\]; fix "
                                         r"continuous\.reference_value in the spec\.$"):
        pooled_curves(pd.concat([a, b], ignore_index=True))


def test_multivariate_rows_and_heterogeneity_rows_in_full() -> None:
    # Analysis "a": the cohorts' knots differ (failed row); "b": one cohort (single cohort);
    # "c": two cohorts pooled, rows against the method of moments written out in numpy
    # (Jackson, White & Thompson 2010), normal limits with scipy's quantile, the Q p-value on
    # p (k - 1) df with scipy's chi-square. The curves of other forms, adjustments and analyses
    # do not enter the grid.
    rng = np.random.default_rng(4)
    grid = np.linspace(0.5, 4.5, 7)
    coefs, curves, Ys, Ss = [], [], [], []
    for analysis, cohorts in (("a", "AB"), ("b", "A"), ("c", "AB")):
        for i, c in enumerate(cohorts):
            A = rng.normal(size=(3, 6))
            y, S = np.array([0.5, -0.3, 0.2]) + rng.normal(0, 0.3, 3), A @ A.T * 0.01
            knots = [1.0, 2.0, 3.0, 4.0 + i] if analysis == "a" else KNOTS
            coefs.append(coef_rows(c, analysis, y, S, knots))
            curves.append(curve_rows(c, analysis, grid, np.zeros(7), np.ones(7), np.ones(7, bool),
                                  form="common_spline", ref=2.5))
            curves.append(curve_rows(c, analysis, grid + 0.1, np.zeros(7), np.ones(7),
                                  np.ones(7, bool), form="spline", ref=2.5))
            if analysis == "c":
                Ys.append(y)
                Ss.append(S)
    other = curve_rows("A", "z", grid + 0.2, np.zeros(7), np.ones(7), np.ones(7, bool),
                    form="common_spline", ref=1.0)
    rows, het = multivariate_curves(pd.concat([other, *curves], ignore_index=True),
                                    pd.concat(coefs, ignore_index=True))
    assert isinstance(rows.index, pd.RangeIndex) and set(rows["analysis"]) == {"c"}
    h = het.set_index("analysis")
    assert h.loc["a", "status"] == "failed" and h.loc["a", "k"] == 2
    assert h.loc["a", "message"] == ("the cohorts' bundles use different knots; fix "
                                     "continuous.spline_knots.values in the spec so every "
                                     "cohort fits the same basis.")
    assert h.loc["b", "status"] == SINGLE and h.loc["b", "k"] == 1
    assert h.loc["b", "message"] == "only cohort 'A' reports it; nothing to pool"
    assert (het["item"] == "common-knot spline (multivariate)").all()
    assert (het["adjustment"] == "legacy").all()
    ref = _moments(np.array(Ys), np.array(Ss))
    want = {"k": 2, "q": ref["q"], "q_df": ref["df"], "q_p": stats.chi2.sf(ref["q"], ref["df"]),
            "i2": ref["i2"], "tau2": ref["tau2"], "tau2_method": "MM", "status": "ok",
            "message": f"between-cohort covariance trace; {ref['negative']} negative "
                       "eigenvalue(s) truncated at 0"}
    for key, value in want.items():
        got = h.loc["c", key]
        assert got == (pytest.approx(value, rel=1e-9, abs=1e-14) if isinstance(value, float)
                       else value), key
    D = rcs_basis(grid, np.array(KNOTS)) - rcs_basis(np.array([2.5]), np.array(KNOTS))
    for method, beta, cov, tm in (("multivariate fixed", ref["fe"], ref["fe_cov"], ""),
                                  ("multivariate random", ref["re"], ref["re_cov"], "MM")):
        got = rows[rows["method"] == method]
        np.testing.assert_allclose(got["x"], grid)
        est, se = D @ beta, np.sqrt(np.einsum("gp,pq,gq->g", D, cov, D))
        np.testing.assert_allclose(got["estimate"], est, rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(got["lower"], est - Z * se, rtol=1e-8, atol=1e-12)
        np.testing.assert_allclose(got["upper"], est + Z * se, rtol=1e-8, atol=1e-12)
        assert got[["pi_lower", "pi_upper", "tau2"]].isna().all().all()
        assert (got["tau2_method"] == tm).all() and (got["x_reference"] == 2.5).all()
        assert (got["k"] == 2).all() and (got["scale"] == "odds ratio").all()
        assert got["q"].iloc[0] == pytest.approx(ref["q"], rel=1e-10)
        assert got["i2"].iloc[0] == pytest.approx(ref["i2"], rel=1e-9, abs=1e-14)


def test_pooled_effects_rows_in_full() -> None:
    # Which contrasts pool (module docstring) and every column of the pooled and
    # heterogeneity rows, against statsmodels combine_effects and scipy.
    rows = [
        contrast_row("A", "legacy", "group", "hi vs lo", 0.40, 0.10),
        contrast_row("B", "legacy", "group", "hi vs lo", 0.60, 0.12),
        contrast_row("C", "legacy", "group", "hi vs lo", 0.10, 0.11),  # cuts at 4: alone
        contrast_row("D", "legacy", "group", "hi vs lo", 0.20, 0.11),  # no cuts reported: alone
        contrast_row("A", "spline", "common quartiles", "common Q3 vs Q1", 0.30, 0.10, 6.5, 3.5),
        contrast_row("B", "spline", "common quartiles", "common Q3 vs Q1", 0.45, 0.08,
                  6.5 + 3e-10, 3.5 - 3e-10),  # the same values up to rounding
        contrast_row("A", "linear", "common group", "common hi vs lo", np.nan, 0.1, 7.0, 3.0),
        contrast_row("B", "linear", "common group", "common hi vs lo", 0.3, np.inf, 7.0, 3.0),
        contrast_row("C", "spline", "common quartiles", "common Q3 vs Q1", np.nan, 0.08, 6.5, 3.5),
        contrast_row("D", "spline", "common quartiles", "common Q3 vs Q1", 0.50, 0.0, 6.5, 3.5),
        contrast_row("A", "spline", "common group", "common hi vs lo", 0.3, 0.1, 7.0, 3.0),
        contrast_row("B", "spline", "common group", "common hi vs lo", 0.3, 0.1, 7.0, 4.0),
        contrast_row("A", "linear", "common quartiles", "common Q3 vs Q1", 0.2, 0.05, 6.5, 3.5),
        contrast_row("B", "linear", "common quartiles", "common Q3 vs Q1", 0.3, 0.05, 6.5, 3.5),
        contrast_row("A", "linear", "per_unit", "per unit", 0.05, 0.01, 5.0, 4.0),
        contrast_row("B", "linear", "per_unit", "per unit", 0.12, 0.02, 4.0, 3.0),
    ]
    cuts = pd.DataFrame(cut_rows("A", [5.0, 6.0], 5.1) + cut_rows("B", [6.0, 5.0], 4.9)
                        + cut_rows("C", [4.0], 5.5) + cut_rows("A", [30.0], 50.0, "adjustment", "age")
                        + cut_rows("B", [40.0], 50.0, "adjustment", "age"))
    eff, het = pooled_effects(pd.DataFrame(rows), cuts)
    assert isinstance(eff.index, pd.RangeIndex) and isinstance(het.index, pd.RangeIndex)
    assert not (eff["contrast_type"] == "common group").any()  # nothing usable, or alone
    assert "linear: common hi vs lo" not in set(het["item"])
    single = het[het["status"] == SINGLE].set_index("item")
    assert sorted(single.index) == ["legacy: hi vs lo (cuts at 4)",
                                    "legacy: hi vs lo (cuts not reported)",
                                    "spline: common hi vs lo", "spline: common hi vs lo"]
    assert single.loc["legacy: hi vs lo (cuts at 4)", "message"] == (
        "only cohort 'C' reports it with these groups/values; nothing to pool")
    assert (single["k"] == 1).all() and (single["analysis"] == "a").all()
    assert (single["adjustment"] == "legacy").all()
    for (form, ctype, groups), (y, v, cohorts) in {
            ("legacy", "group", "cuts at 5, 6"): ([0.40, 0.60], [0.10, 0.12], "A, B"),
            ("spline", "common quartiles", ""): ([0.30, 0.45], [0.10, 0.08], "A, B"),
            ("linear", "common quartiles", ""): ([0.2, 0.3], [0.05, 0.05], "A, B"),
            ("linear", "per_unit", ""): ([0.05, 0.12], [0.01, 0.02], "A, B")}.items():
        got = eff[(eff["form"] == form) & (eff["contrast_type"] == ctype)].set_index("method")
        assert (got["groups"] == groups).all() and (got["k"] == 2).all()
        assert (got["cohorts"] == cohorts).all() and (got["scale"] == "odds ratio").all()
        y_, v_ = np.array(y), np.array(v) ** 2
        dl = combine_effects(y_, v_, method_re="dl", use_t=False)
        pm = combine_effects(y_, v_, method_re="pm", use_t=True)
        assert got.loc["fixed", "lower"] == pytest.approx(dl.mean_effect_fe - Z * dl.sd_eff_w_fe,
                                                          rel=1e-10)
        assert got.loc["fixed", "upper"] == pytest.approx(dl.mean_effect_fe + Z * dl.sd_eff_w_fe,
                                                          rel=1e-10)
        assert got.loc["random", "estimate"] == pytest.approx(dl.mean_effect_re, rel=1e-10)
        assert dl.tau2 > 0  # precondition: the heterogeneous case, where statsmodels agrees
        assert got.loc["random", "tau2"] == pytest.approx(dl.tau2, rel=1e-9)
        assert got.loc["random HKSJ", "tau2"] == pytest.approx(pm.tau2, rel=1e-5, abs=1e-12)
        assert got.loc["fixed", ["pi_lower", "pi_upper", "tau2"]].isna().all()
        assert got.loc["random", ["pi_lower", "pi_upper"]].isna().all()  # k = 2: t on 0 df
        assert got["tau2_method"].tolist() == ["", "DL", "PM"]
        item = f"{form}: {got['contrast'].iloc[0]}" + (f" ({groups})" if groups else "")
        h = het[het["item"] == item].set_index("tau2_method")
        assert sorted(h.index) == ["DL", "PM"] and (h["status"] == "ok").all()
        assert (h["message"] == "").all() and (h["k"] == 2).all() and (h["q_df"] == 1).all()
        assert h.loc["DL", "q"] == pytest.approx(dl.q, rel=1e-10)
        assert h.loc["PM", "q_p"] == pytest.approx(stats.chi2.sf(dl.q, 1), rel=1e-9)
        assert h.loc["DL", "i2"] == pytest.approx(max(dl.i2, 0.0), abs=1e-12)
        assert h.loc["PM", "tau2"] == pytest.approx(pm.tau2, rel=1e-5, abs=1e-12)


def test_harmonisation_edges() -> None:
    # numpy.corrcoef across three cohorts (two distinct cuts, two distinct medians); medians
    # that do not vary leave the correlation undefined (NaN, without a warning); the mean
    # |percentile - 50| by hand.
    cuts = pd.DataFrame(cut_rows("A", [5.0], 4.0) + cut_rows("B", [5.0], 6.0) + cut_rows("C", [7.0], 6.0))
    cuts["percentile"] = [40.0, 65.0, 52.0]
    out = harmonisation(cuts)
    assert out["cut_median_correlation"].iloc[0] == pytest.approx(
        np.corrcoef([5.0, 5.0, 7.0], [4.0, 6.0, 6.0])[0, 1], rel=1e-12)
    assert out["mean_distance_from_p50"].iloc[0] == pytest.approx(np.mean([10, 15, 2]))
    assert isinstance(out.index, pd.RangeIndex) and "index" not in out
    flat = cuts.assign(median=5.0)
    assert harmonisation(flat)["cut_median_correlation"].isna().all()


def test_group_signatures_read_exposure_cuts_and_cuts_without_a_role() -> None:
    # The groups text lists the exposure's cuts in increasing order; adjustment cuts do not
    # enter it; cuts written without a role column are all the exposure's.
    cuts = pd.DataFrame(cut_rows("A", [6.0, 5.0], 5.0) + cut_rows("A", [30.0], 50.0, "adjustment",
                                                            "age"))
    assert group_signatures(cuts) == {("A", "a"): "cuts at 5, 6"}
    assert group_signatures(cuts.iloc[:2].drop(columns="role")) == {("A", "a"): "cuts at 5, 6"}


def test_effect_columns_without_limits_use_normal_limits() -> None:
    # Rows without limits (the published tables' rows): estimate -+ z_0.975 se (scipy), exp
    # on ratio scales only; a missing prediction interval stays missing.
    df = pd.DataFrame({"estimate": [0.2, 0.2], "se": [0.1, 0.1],
                       "scale": ["hazard ratio", "difference"]})
    out = _effect_columns(df)
    np.testing.assert_allclose(out["lower"], 0.2 - Z * 0.1, rtol=1e-14)
    np.testing.assert_allclose(out["upper"], 0.2 + Z * 0.1, rtol=1e-14)
    np.testing.assert_allclose(out["effect_upper"], [np.exp(0.2 + Z * 0.1), 0.2 + Z * 0.1],
                               rtol=1e-14)
    assert out[["pi_lower", "pi_upper", "effect_pi_lower"]].isna().all().all()
    assert out["pi_upper"].dtype == np.float64


def test_pool_bundles_with_only_curves_or_only_contrasts() -> None:
    # Bundles may lack a table (an analysis without contrasts, a cohort without a common
    # spline): the other tables are still pooled, and the cuts give the groups.
    full = _bundles()
    curves_only = {c: {"curves": b["curves"]} for c, b in full.items()}
    out = pool_bundles(curves_only)
    assert len(out["pooled_curves"]) and out["heterogeneity"].empty
    assert out["pooled_effects"].empty and out["harmonisation"].empty
    contrasts_only = {c: {"contrasts": b["contrasts"], "cuts": b["cuts"]}
                      for c, b in full.items()}
    out = pool_bundles(contrasts_only)
    assert out["pooled_curves"].empty and len(out["heterogeneity"])
    assert set(out["heterogeneity"]["status"]) == {"ok"}
    legacy = out["pooled_effects"][out["pooled_effects"]["form"] == "legacy"]
    assert (legacy["groups"] == "cuts at 5").all() and (legacy["k"] == 3).all()
