"""Pooling cohort bundles: pooled curves (pointwise fixed and random effects; multivariate
random-effects meta-analysis of the common-knot spline coefficients), pooled contrasts,
heterogeneity and the harmonisation of legacy cuts across cohorts. Pure: bundle tables in,
pooled tables out (``jobs`` reads and writes)."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd

from .bundles import coefficient_arrays
from .contrasts import Z95
from .errors import UnbinError
from .pooling import pool_multivariate, pool_pointwise, pool_univariate, pooled_curve
from .terms import SplineTerm

RATIO_SCALES = {"odds ratio", "hazard ratio", "rate ratio"}


def _effect_columns(df: pd.DataFrame) -> pd.DataFrame:
    df["lower"] = df["estimate"] - Z95 * df["se"]
    df["upper"] = df["estimate"] + Z95 * df["se"]
    ratio = df["scale"].isin(RATIO_SCALES)
    for src, dst in (("estimate", "effect"), ("lower", "effect_lower"), ("upper", "effect_upper")):
        df[dst] = np.where(ratio, np.exp(df[src]), df[src])
    return df


def _concat(bundles: dict[str, dict[str, pd.DataFrame]], name: str) -> pd.DataFrame:
    parts = [b[name] for b in bundles.values() if name in b and len(b[name])]
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()


def pooled_curves(curves: pd.DataFrame) -> pd.DataFrame:
    """Pointwise FE and DerSimonian–Laird RE pooling of the cohorts' curves on the common grid.
    Points outside a cohort's own 1st–99th percentile range do not count for it."""
    out = []
    for (analysis, adjustment, form), g in curves.groupby(["analysis", "adjustment", "form"],
                                                          sort=True):
        refs = g["x_reference"].round(12).unique()
        if len(refs) != 1:
            raise UnbinError(f"pooling {analysis}: the cohorts' curves use different reference "
                             f"values {sorted(refs)}; fix continuous.reference_value in the spec.")
        Y = g.pivot(index="cohort", columns="x", values="estimate")
        S = g.pivot(index="cohort", columns="x", values="se")
        R = g.pivot(index="cohort", columns="x", values="in_range").astype(bool)
        xs = Y.columns.to_numpy(float)
        y = Y.to_numpy(float)
        v = S.to_numpy(float) ** 2
        usable = R.to_numpy() & np.isfinite(y) & (v > 0)
        y = np.where(usable, y, np.nan)
        v = np.where(usable, v, 1.0)
        res = pool_pointwise(y, v)
        at_ref = ~usable.any(axis=0) & np.isclose(xs, refs[0])
        scale = g["scale"].iloc[0]
        for method, mean, se in (("fixed", res.fe_mean, res.fe_se),
                                 ("random", res.re_mean, res.re_se)):
            est = np.where(at_ref, 0.0, mean)
            sev = np.where(at_ref, 0.0, se)
            out.append(pd.DataFrame({
                "analysis": analysis, "adjustment": adjustment, "form": form, "method": method,
                "x": xs, "x_reference": refs[0], "k": res.k, "estimate": est, "se": sev,
                "tau2": res.tau2, "i2": res.i2, "q": res.q, "scale": scale}))
    return pd.concat(out, ignore_index=True) if out else pd.DataFrame()


def multivariate_curves(curves: pd.DataFrame, coefs: pd.DataFrame
                        ) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The common-knot spline pooled by multivariate random-effects meta-analysis (Jackson,
    White & Thompson 2010), as a curve on the common grid, plus its heterogeneity rows."""
    rows, het = [], []
    if coefs.empty:
        return pd.DataFrame(), pd.DataFrame()
    for (analysis, adjustment), g in coefs.groupby(["analysis", "adjustment"], sort=True):
        bases = g["basis"].unique()
        if len(bases) != 1:
            het.append({"analysis": analysis, "adjustment": adjustment,
                        "item": "common-knot spline (multivariate)", "k": g["cohort"].nunique(),
                        "status": "failed",
                        "message": "the cohorts' bundles use different knots; fix "
                                   "continuous.spline_knots.values in the spec so every cohort "
                                   "fits the same basis."})
            continue
        cohorts = sorted(g["cohort"].unique())
        arrays = [coefficient_arrays(g[g["cohort"] == c]) for c in cohorts]
        Y = np.array([a[0] for a in arrays])
        S = np.array([a[1] for a in arrays])
        mv = pool_multivariate(Y, S)
        (term_dict,) = json.loads(bases[0])
        term = SplineTerm(term_dict["variable"], tuple(term_dict["knots"]))
        cg = curves[(curves["analysis"] == analysis) & (curves["adjustment"] == adjustment)
                    & (curves["form"] == "common_spline")]
        xs = np.sort(cg["x"].unique())
        ref = float(cg["x_reference"].iloc[0])
        scale = cg["scale"].iloc[0]
        Bg, Br = term.basis(xs), term.basis(np.array([ref]))
        for method, beta, cov in (("multivariate fixed", mv.fe_mean, mv.fe_cov),
                                  ("multivariate random", mv.re_mean, mv.re_cov)):
            est, se = pooled_curve(beta, cov, Bg, Br)
            rows.append(pd.DataFrame({
                "analysis": analysis, "adjustment": adjustment, "form": "common_spline",
                "method": method, "x": xs, "x_reference": ref, "k": len(cohorts),
                "estimate": est, "se": se, "tau2": np.nan, "i2": mv.i2, "q": mv.q,
                "scale": scale}))
        het.append({"analysis": analysis, "adjustment": adjustment,
                    "item": "common-knot spline (multivariate)", "k": len(cohorts),
                    "q": mv.q, "q_df": mv.q_df, "q_p": mv.q_pvalue, "i2": mv.i2,
                    "tau2": float(np.trace(mv.psi)), "status": "ok",
                    "message": f"between-cohort covariance trace; {mv.n_truncated} negative "
                               "eigenvalue(s) truncated at 0"})
    return (pd.concat(rows, ignore_index=True) if rows else pd.DataFrame(), pd.DataFrame(het))


def pooled_effects(contrasts: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Each contrast (legacy groups and continuous forms) pooled across cohorts, FE and RE."""
    rows, het = [], []
    keys = ["analysis", "adjustment", "form", "contrast_type", "contrast"]
    for key, g in contrasts.groupby(keys, sort=True):
        g = g[np.isfinite(g["se"]) & (g["se"] > 0)]
        if len(g) == 0:
            continue
        pe = pool_univariate(g["estimate"].to_numpy(float), g["se"].to_numpy(float) ** 2)
        base = dict(zip(keys, key, strict=True))
        for method, mean, se in (("fixed", pe.fe_mean, pe.fe_se), ("random", pe.re_mean,
                                                                   pe.re_se)):
            rows.append({**base, "method": method, "k": pe.k, "estimate": mean, "se": se,
                         "scale": g["scale"].iloc[0]})
        het.append({**{k: base[k] for k in ("analysis", "adjustment")},
                    "item": f"{base['form']}: {base['contrast']}", "k": pe.k, "q": pe.q,
                    "q_df": pe.q_df, "q_p": pe.q_pvalue, "i2": pe.i2, "tau2": pe.tau2,
                    "status": "ok", "message": ""})
    eff = _effect_columns(pd.DataFrame(rows)) if rows else pd.DataFrame()
    return eff, pd.DataFrame(het)


def harmonisation(cuts: pd.DataFrame) -> pd.DataFrame:
    """Each cohort's legacy cuts, their percentile and the cohort median; across cohorts, the
    correlation between cuts and medians (cuts that track the sample medians suggest they were
    chosen from the data) and the mean distance of the cuts' percentiles from 50."""
    if cuts.empty:
        return pd.DataFrame()
    out = cuts.copy()
    out["cut_rank"] = out.groupby(["cohort", "analysis", "variable"]).cumcount()
    corr, spread = {}, {}
    for key, g in out.groupby(["analysis", "variable", "cut_rank"]):
        ok = g["cut"].nunique() > 1 and g["median"].nunique() > 1 and len(g) >= 3
        corr[key] = float(np.corrcoef(g["cut"], g["median"])[0, 1]) if ok else np.nan
        spread[key] = float(np.mean(np.abs(g["percentile"] - 50.0)))
    idx = list(zip(out["analysis"], out["variable"], out["cut_rank"], strict=True))
    out["cut_median_correlation"] = [corr[i] for i in idx]
    out["mean_distance_from_p50"] = [spread[i] for i in idx]
    out["cohorts"] = out.groupby(["analysis", "variable", "cut_rank"])["cohort"].transform("nunique")
    return out.reset_index(drop=True)


def pool_bundles(bundles: dict[str, dict[str, pd.DataFrame]]) -> dict[str, pd.DataFrame]:
    curves = _concat(bundles, "curves")
    pc = pooled_curves(curves) if len(curves) else pd.DataFrame()
    mvc, mvh = multivariate_curves(curves, _concat(bundles, "coefficients"))
    pcur = pd.concat([d for d in (pc, mvc) if len(d)], ignore_index=True) \
        if len(pc) or len(mvc) else pd.DataFrame()
    if len(pcur):
        pcur = _effect_columns(pcur)
    eff, eh = pooled_effects(_concat(bundles, "contrasts"))
    het = pd.concat([d for d in (eh, mvh) if len(d)], ignore_index=True) \
        if len(eh) or len(mvh) else pd.DataFrame()
    return {"pooled_curves": pcur, "pooled_effects": eff, "heterogeneity": het,
            "harmonisation": harmonisation(_concat(bundles, "cuts"))}
