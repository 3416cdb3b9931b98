"""Tests of the pooled tables (unbin.consortium.pool) on small hand-made bundle tables: which cohorts
count at each x, the multivariate pooled curve rebuilt by hand, the tau² trace, which contrasts
pool (and with which cohorts), and the cut-median correlation."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.meta_analysis import combine_effects

from bundle_rows import coef_rows, contrast_row, curve_rows, cut_rows, rcs_basis
from unbin.consortium.pool import (
    SINGLE,
    harmonisation,
    multivariate_curves,
    pool_bundles,
    pooled_curves,
    pooled_effects,
)

Z = stats.norm.ppf(0.975)


def _cuts(cohort: str, cuts: list[float], median: float) -> list[dict[str, object]]:
    return cut_rows(cohort, cuts, median, first_percentile=30.0)


# --------------------------------------------------------------------------- pointwise: k rule


def test_pointwise_k_counts_only_cohorts_in_their_own_range() -> None:
    # The rule: at x a cohort counts when x is inside its own 1st-99th percentile range
    # (in_range) and its estimate exists; k = 1 is not pooled (NaN); at the reference value
    # the contrast is 0 by construction. Values checked against inverse-variance formulas
    # written out here and against statsmodels combine_effects (DL) where k >= 2.
    xs = np.array([0.0, 1.0, 2.0, 3.0, 4.0])
    a = curve_rows("A", "a", xs, np.array([-.4, -.2, 0., .3, .5]), np.array([.10, .10, 0., .10, .12]),
                    np.array([True, True, True, True, True]))
    b = curve_rows("B", "a", xs, np.array([-.1, -.3, 0., .1, .9]), np.array([.20, .15, 0., .10, .2]),
                    np.array([False, True, True, True, True]))
    c = curve_rows("C", "a", xs, np.array([.3, .1, 0., np.nan, .2]), np.array([.1, .1, 0., .1, .3]),
                    np.array([False, True, True, True, False]))  # missing at x=3 (e.g. FP domain)
    pc = pooled_curves(pd.concat([a, b, c], ignore_index=True))
    fixed = pc[pc["method"] == "fixed"].set_index("x")
    assert fixed["k"].tolist() == [1, 3, 3, 2, 2]
    assert np.isnan(fixed.loc[0.0, "estimate"])  # one cohort: not a pooled value
    assert fixed.loc[2.0, "estimate"] == 0.0 and fixed.loc[2.0, "se"] == 0.0
    # x = 3: A and B only (C has no estimate there)
    w = 1 / np.array([.10, .10]) ** 2
    assert fixed.loc[3.0, "estimate"] == pytest.approx(np.sum(w * [.3, .1]) / w.sum(), rel=1e-12)
    assert fixed.loc[3.0, "se"] == pytest.approx(np.sqrt(1 / w.sum()), rel=1e-12)
    # x = 1: all three, DerSimonian-Laird against statsmodels
    y1, v1 = np.array([-.2, -.3, .1]), np.array([.10, .15, .10]) ** 2
    ref = combine_effects(y1, v1, method_re="dl", use_t=False)
    rnd = pc[pc["method"] == "random"].set_index("x")
    assert rnd.loc[1.0, "estimate"] == pytest.approx(ref.mean_effect_re, rel=1e-10)
    assert rnd.loc[1.0, "tau2"] == pytest.approx(max(ref.tau2, 0.0), rel=1e-8, abs=1e-14)
    assert rnd.loc[1.0, "lower"] == pytest.approx(ref.mean_effect_re - Z * ref.sd_eff_w_re,
                                                  rel=1e-9)
    hk = pc[pc["method"] == "random HKSJ"].set_index("x")
    pm = combine_effects(y1, v1, method_re="pm", use_t=True)
    assert hk.loc[1.0, "estimate"] == pytest.approx(pm.mean_effect_re, rel=1e-6)
    lo, hi = pm.conf_int(alpha=0.05, use_t=True)[3]
    assert (hk.loc[1.0, "lower"], hk.loc[1.0, "upper"]) == pytest.approx((lo, hi), rel=1e-5)
    assert np.isnan(hk.loc[3.0, "pi_lower"])  # k = 2: no prediction interval (t on 0 df)
    assert np.isfinite(hk.loc[1.0, "pi_lower"])
    assert (fixed["tau2_method"] == "").all() and (hk["tau2_method"] == "PM").all()


# --------------------------------------------------------------------------- multivariate


def test_multivariate_curve_rebuilt_by_hand_from_bundle_coefficients() -> None:
    # Jackson, White & Thompson 2010 (Stat Med 29:1282) method of moments, written out in numpy
    # from the bundle's long coefficient rows; the pooled curve and its delta-method SE on the
    # grid, and the heterogeneity row's tau2 = trace(Psi).
    rng = np.random.default_rng(3)
    knots = [1.0, 2.0, 3.0, 4.0]
    p, k = 3, 4
    Ys, Ss, parts = [], [], []
    for i in range(k):
        A = rng.normal(size=(p, p + 3))
        S = (A @ A.T) * 0.01
        y = np.array([0.5, -0.3, 0.2]) + rng.normal(0, 0.3, p)
        Ys.append(y)
        Ss.append(S)
        parts.append(coef_rows(f"c{i}", "a", y, S, knots))
    coefs = pd.concat(parts, ignore_index=True)
    xs = np.linspace(0.5, 4.5, 9)
    curves = pd.concat([curve_rows(f"c{i}", "a", xs, np.zeros(9), np.ones(9), np.ones(9, bool),
                                    form="common_spline", ref=2.5) for i in range(k)])
    rows, het = multivariate_curves(curves, coefs)

    Y, S = np.array(Ys), np.array(Ss)
    W = np.linalg.inv(S)
    A_ = W.sum(0)
    fe_cov = np.linalg.inv(A_)
    fe = fe_cov @ np.einsum("ipq,iq->p", W, Y)
    Qm = sum(W[i] @ np.outer(Y[i] - fe, Y[i] - fe) for i in range(k))
    B = A_ - sum(W[i] @ fe_cov @ W[i] for i in range(k))
    psi = np.linalg.solve(B, Qm - (k - 1) * np.eye(p))
    psi = (psi + psi.T) / 2
    ev, vec = np.linalg.eigh(psi)
    psi = vec @ np.diag(np.maximum(ev, 0)) @ vec.T
    Wr = np.linalg.inv(S + psi)
    re_cov = np.linalg.inv(Wr.sum(0))
    re = re_cov @ np.einsum("ipq,iq->p", Wr, Y)
    D = rcs_basis(xs, np.array(knots)) - rcs_basis(np.array([2.5]), np.array(knots))
    for method, beta, cov in (("multivariate fixed", fe, fe_cov),
                              ("multivariate random", re, re_cov)):
        got = rows[rows["method"] == method].sort_values("x")
        np.testing.assert_allclose(got["estimate"], D @ beta, rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(got["se"], np.sqrt(np.einsum("gp,pq,gq->g", D, cov, D)),
                                   rtol=1e-8, atol=1e-12)
        assert (got["k"] == k).all()
    (h,) = het.to_dict("records")
    assert h["tau2"] == pytest.approx(np.trace(psi), rel=1e-9, abs=1e-14)
    assert h["q"] == pytest.approx(np.trace(Qm), rel=1e-10)
    assert h["q_df"] == p * (k - 1)

    one, het1 = multivariate_curves(curves[curves["cohort"] == "c0"],
                                    coefs[coefs["cohort"] == "c0"])
    assert one.empty and het1["status"].tolist() == [SINGLE]


# --------------------------------------------------------------------------- contrasts


def test_pooled_effects_pool_only_what_means_the_same_in_every_cohort() -> None:
    # Legacy contrasts pool only across cohorts with the same cuts; continuous forms only at
    # the common values; own-value contrasts (own quartiles, own group medians) never; one
    # cohort is "single cohort", not a pooled row. Numbers against statsmodels combine_effects.
    rows = [
        contrast_row("A", "legacy", "group", "hi vs lo", 0.40, 0.10, 7.0, 3.0),
        contrast_row("B", "legacy", "group", "hi vs lo", 0.60, 0.12, 8.0, 2.5),
        contrast_row("C", "legacy", "group", "hi vs lo", 0.10, 0.11, 9.0, 2.0),  # other cuts
        contrast_row("A", "spline", "iqr", "75th vs 25th percentile", 0.3, 0.1, 6.0, 4.0),
        contrast_row("B", "spline", "iqr", "75th vs 25th percentile", 0.5, 0.1, 7.0, 3.0),
        contrast_row("A", "spline", "group", "hi vs lo", 0.3, 0.1, 7.0, 3.0),
        contrast_row("B", "spline", "group", "hi vs lo", 0.3, 0.1, 8.0, 2.5),
        contrast_row("A", "spline", "common quartiles", "common Q3 vs Q1", 0.30, 0.10, 6.5, 3.5),
        contrast_row("B", "spline", "common quartiles", "common Q3 vs Q1", 0.45, 0.08, 6.5, 3.5),
        contrast_row("C", "spline", "common quartiles", "common Q3 vs Q1", 0.20, 0.09, 6.5, 3.5),
        contrast_row("A", "linear", "per_unit", "per unit", 0.05, 0.01, 5.0, 4.0),
        contrast_row("B", "linear", "per_unit", "per unit", 0.07, 0.02, 4.0, 3.0),
    ]
    cuts = pd.DataFrame(_cuts("A", [5.0], 5.1) + _cuts("B", [5.0], 4.9) + _cuts("C", [6.0], 5.5))
    eff, het = pooled_effects(pd.DataFrame(rows), cuts)
    assert set(eff["contrast_type"]) == {"group", "common quartiles", "per_unit"}
    assert not ((eff["form"] == "spline") & (eff["contrast_type"] == "group")).any()
    leg = eff[eff["form"] == "legacy"]
    assert set(leg["groups"]) == {"cuts at 5"} and (leg["k"] == 2).all()
    assert leg["cohorts"].iloc[0] == "A, B"
    single = het[het["status"] == SINGLE]
    assert single["item"].tolist() == ["legacy: hi vs lo (cuts at 6)"]

    cq = eff[eff["contrast_type"] == "common quartiles"].set_index("method")
    assert (cq["k"] == 3).all() and (cq["x_value"] == 6.5).all() and (cq["x_reference"] == 3.5).all()
    y, v = np.array([0.30, 0.45, 0.20]), np.array([0.10, 0.08, 0.09]) ** 2
    dl = combine_effects(y, v, method_re="dl", use_t=False)
    assert cq.loc["fixed", "estimate"] == pytest.approx(dl.mean_effect_fe, rel=1e-12)
    assert cq.loc["random", "estimate"] == pytest.approx(dl.mean_effect_re, rel=1e-10)
    assert cq.loc["random", "effect"] == pytest.approx(np.exp(dl.mean_effect_re), rel=1e-10)
    pm = combine_effects(y, v, method_re="pm", use_t=True)
    lo, hi = pm.conf_int(alpha=0.05, use_t=True)[3]
    assert cq.loc["random HKSJ", "lower"] == pytest.approx(lo, rel=1e-5)
    assert cq.loc["random HKSJ", "effect_upper"] == pytest.approx(np.exp(hi), rel=1e-5)
    # prediction interval (Higgins, Thompson & Spiegelhalter 2009): t on k - 2 = 1 df
    t2 = cq.loc["random", "tau2"]
    half = stats.t.ppf(0.975, 1) * np.sqrt(t2 + cq.loc["random", "se"] ** 2)
    assert cq.loc["random", "pi_upper"] == pytest.approx(cq.loc["random", "estimate"] + half,
                                                         rel=1e-9)
    assert np.isnan(cq.loc["fixed", "pi_lower"])


def test_common_contrasts_with_different_values_do_not_pool_together() -> None:
    # Two cohorts whose "common" values differ (bundles from different bases) stay apart: each
    # is a single cohort, and nothing is reported as pooled.
    rows = [contrast_row("A", "spline", "common quartiles", "common Q3 vs Q1", 0.3, 0.1, 6.5, 3.5),
            contrast_row("B", "spline", "common quartiles", "common Q3 vs Q1", 0.4, 0.1, 7.0, 3.5)]
    eff, het = pooled_effects(pd.DataFrame(rows))
    assert eff.empty
    assert het["status"].tolist() == [SINGLE, SINGLE]


# --------------------------------------------------------------------------- harmonisation


def test_cut_median_correlation_matches_numpy() -> None:
    # numpy.corrcoef on the same cut and median values; the mean |percentile - 50| by hand.
    meds = [4.0, 5.5, 4.8, 6.1]
    cuts_ = [5.0, 6.2, 5.1, 7.3]
    cuts = pd.DataFrame([r for i, (c, m) in enumerate(zip(cuts_, meds, strict=True))
                         for r in _cuts(f"c{i}", [c], m)])
    cuts.loc[:, "percentile"] = [40.0, 55.0, 62.0, 35.0]
    out = harmonisation(cuts)
    assert out["cut_median_correlation"].iloc[0] == pytest.approx(
        np.corrcoef(cuts_, meds)[0, 1], rel=1e-12)
    assert out["mean_distance_from_p50"].iloc[0] == pytest.approx(np.mean([10, 5, 12, 15]))
    assert (out["cohorts"] == 4).all()
    two = harmonisation(cuts[cuts["cohort"].isin(["c0", "c1"])])
    assert two["cut_median_correlation"].isna().all()  # fewer than three cohorts: undefined


def test_pool_bundles_end_to_end_on_hand_made_bundles() -> None:
    xs = np.array([1.0, 2.0, 3.0])
    bundles = {}
    for i, (c, shift) in enumerate((("A", 0.0), ("B", 0.1), ("C", -0.05))):
        bundles[c] = {
            "curves": curve_rows(c, "a", xs, np.array([-.2, 0, .3]) + shift * (xs - 2),
                                  np.array([.1, 0, .1]) * (1 + i / 4), np.ones(3, bool),
                                  ref=2.0),
            "coefficients": pd.DataFrame(),
            "contrasts": pd.DataFrame([contrast_row(c, "legacy", "group", "hi vs lo",
                                                 0.4 + shift, 0.1)]),
            "counts": pd.DataFrame(),
            "cuts": pd.DataFrame(_cuts(c, [5.0], 5.0 + i)),
        }
    out = pool_bundles(bundles)
    assert set(out) == {"pooled_curves", "pooled_effects", "heterogeneity", "harmonisation"}
    pc = out["pooled_curves"]
    assert set(pc["method"]) == {"fixed", "random", "random HKSJ"}
    assert pc.loc[pc["x"] == 2.0, "k"].eq(3).all()  # at the reference every cohort counts
    assert {"effect_pi_lower", "effect_pi_upper", "tau2_method"} <= set(pc.columns)
    assert (out["pooled_effects"]["k"] == 3).all()


def test_pooled_figure_leads_with_the_multivariate_spline_and_shows_k() -> None:
    # The figure draws the multivariate pooled spline as the primary curve (one function, no
    # step where a cohort leaves the pointwise pool) and k along x from the pointwise rows.
    from pathlib import Path

    from conftest import _one_analysis
    from unbin.present.figures.base import Context
    from unbin.present.figures.pooled import draw
    from unbin.spec import parse_spec

    rng = np.random.default_rng(5)
    knots = [1.0, 2.0, 3.0, 4.0]
    xs = np.linspace(0.5, 4.5, 21)
    curves, coefs = [], []
    for i, c in enumerate(("A", "B", "C")):
        A = rng.normal(size=(3, 6))
        b = np.array([0.5, -0.3, 0.2]) + rng.normal(0, 0.1, 3)
        coefs.append(coef_rows(c, "a", b, A @ A.T * 0.01, knots))
        D = rcs_basis(xs, np.array(knots)) - rcs_basis(np.array([2.5]), np.array(knots))
        curves.append(curve_rows(c, "a", xs, D @ b, np.where(xs == 2.5, 0.0, 0.1), xs <= 4.5 - i,
                                  form="common_spline", ref=2.5))
    bundles = {c: {"curves": cv, "coefficients": cf, "contrasts": pd.DataFrame(),
                   "counts": pd.DataFrame(), "cuts": pd.DataFrame()}
               for c, cv, cf in zip("ABC", curves, coefs, strict=True)}
    out = pool_bundles(bundles)
    raw = _one_analysis({"type": "binary", "event": "y"}, "x", {"cuts": [2.0]})
    spec = parse_spec(raw, base=Path("."))
    per = pd.concat(curves, ignore_index=True)
    per["effect"] = np.exp(per["estimate"])
    drawn = draw(Context(tables={**out, "curves": per}, spec=spec), None, "a")
    assert drawn is not None
    assert "multivariate random-effects pooling" in drawn.alt
    assert "1 to 3 cohorts count" in drawn.alt and "3 cohort curve(s)" in drawn.alt
    mv = out["pooled_curves"]
    mv = mv[mv["method"] == "multivariate random"]
    assert mv["estimate"].notna().all() and len(mv) == len(xs)  # no gap where k drops
