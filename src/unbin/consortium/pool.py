"""Pooling cohort bundles: pooled curves (pointwise fixed and random effects; multivariate
random-effects meta-analysis of the common-knot spline coefficients), pooled contrasts,
heterogeneity and the harmonisation of legacy cuts across cohorts. Pure: bundle tables in,
pooled tables out (``jobs`` reads and writes).

What pools, so that a pooled number means the same thing in every cohort:

* curves: every cohort's curve is on the common grid relative to the common reference value;
  at each x only the cohorts whose own 1st–99th percentile range holds x count (``k``). A point
  with a single cohort is not a pooled value (estimate NaN, ``k`` = 1 kept).
* contrasts: legacy group contrasts only across cohorts with the same groups (the same
  exposure cuts, ``groups``); continuous forms only at the common exposure values of the common
  basis (``common quartiles``, ``common group``) and the linear form's per-unit slope. Each
  cohort's own-value contrasts (its own quartiles, its own group medians) do not pool. A
  contrast that only one cohort reports is not pooled: it appears in ``heterogeneity`` with
  status "single cohort".

Methods (``method``): ``fixed`` (inverse variance, normal interval); ``random`` (DerSimonian–
Laird tau², normal interval); ``random HKSJ`` (Paule–Mandel tau², Hartung–Knapp–Sidik–Jonkman
t interval on k - 1 df; the one to read with few cohorts); random rows carry the prediction
interval (t on k - 2 df, k >= 3); ``multivariate fixed``/``multivariate random`` (the
common-knot spline, Jackson, White & Thompson 2010; normal intervals).
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pandas as pd

from ..errors import UnbinError
from ..refit.contrasts import Z95
from ..terms import SplineTerm
from .bundles import coefficient_arrays
from .meta_analysis import pool_multivariate, pool_pointwise, pool_univariate, pooled_curve

RATIO_SCALES = {"odds ratio", "hazard ratio", "rate ratio"}
# Contrast types whose exposure values are the same in every cohort (see the module docstring).
COMMON_TYPES = ("common quartiles", "common group")
SINGLE = "single cohort"


def _effect_columns(df: pd.DataFrame) -> pd.DataFrame:
    """effect, effect_lower/upper and effect_pi_lower/upper on the reported scale (exp for
    ratios) from the model-scale estimate and limits; normal limits where none are given."""
    if "lower" not in df:
        df["lower"] = df["estimate"] - Z95 * df["se"]
        df["upper"] = df["estimate"] + Z95 * df["se"]
    for c in ("pi_lower", "pi_upper"):
        if c not in df:
            df[c] = np.nan
    ratio = df["scale"].isin(RATIO_SCALES)
    for src, dst in (("estimate", "effect"), ("lower", "effect_lower"), ("upper", "effect_upper"),
                     ("pi_lower", "effect_pi_lower"), ("pi_upper", "effect_pi_upper")):
        v = df[src].astype(float)
        df[dst] = np.where(ratio, np.exp(v), v)
    return df


def _concat(bundles: dict[str, dict[str, pd.DataFrame]], name: str) -> pd.DataFrame:
    parts = [b[name] for b in bundles.values() if name in b and len(b[name])]
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()


def _pooled_only(a: np.ndarray, at_ref: np.ndarray, single: np.ndarray,
                 ref_value: float = 0.0) -> np.ndarray:
    """A pointwise result where something was pooled: ``ref_value`` at the reference value
    (no cohort has variance there), NaN where one cohort alone counts."""
    return np.where(at_ref, ref_value, np.where(single, np.nan, a))


def pooled_curves(curves: pd.DataFrame) -> pd.DataFrame:
    """Pointwise pooling of the cohorts' curves on the common grid: fixed, random
    (DerSimonian–Laird, normal) and random HKSJ (Paule–Mandel, t on k - 1 df, prediction
    interval on k - 2 df). Points outside a cohort's own 1st–99th percentile range (or outside
    its form's domain: missing estimate) do not count for it; ``k`` is the number that count.
    Where k = 1 nothing is pooled (NaN); at the reference value the contrast is 0."""
    out = []
    for (analysis, adjustment, form), g in curves.groupby(["analysis", "adjustment", "form"],
                                                          sort=True):
        refs = g["x_reference"].round(12).unique()
        if len(refs) != 1:
            raise UnbinError(f"pooling {analysis}: the cohorts' curves use different reference "
                             f"values {sorted(float(r) for r in refs)}; fix "
                             "continuous.reference_value in the spec.")
        Y = g.pivot(index="cohort", columns="x", values="estimate")
        S = g.pivot(index="cohort", columns="x", values="se")
        R = g.pivot(index="cohort", columns="x", values="in_range").fillna(False).astype(bool)
        xs = Y.columns.to_numpy(float)
        y = Y.to_numpy(float)
        v = S.to_numpy(float) ** 2
        usable = R.to_numpy() & np.isfinite(y) & np.isfinite(v) & (v > 0)
        y = np.where(usable, y, np.nan)
        v = np.where(usable, v, 1.0)
        dl = pool_pointwise(y, v, tau2_method="dl")
        pm = pool_pointwise(y, v, tau2_method="pm")
        at_ref = (dl.k == 0) & np.isclose(xs, refs[0])
        # At the reference value itself every in-range cohort's contrast is 0 with no variance:
        # it counts there, though nothing needs pooling.
        k = np.where(at_ref, (R.to_numpy() & np.isfinite(Y.to_numpy(float))).sum(axis=0), dl.k)
        single = dl.k == 1
        scale = g["scale"].iloc[0]
        for method, res, mean, se, lo, hi, pil, piu in (
                ("fixed", dl, dl.fe_mean, dl.fe_se, dl.fe_lower, dl.fe_upper, None, None),
                ("random", dl, dl.re_mean, dl.re_se, dl.re_lower, dl.re_upper, dl.pi_lower,
                 dl.pi_upper),
                ("random HKSJ", pm, pm.re_mean, pm.re_se, pm.hksj_lower, pm.hksj_upper,
                 pm.pi_lower, pm.pi_upper)):
            nan = np.full(xs.shape, np.nan)
            out.append(pd.DataFrame({
                "analysis": analysis, "adjustment": adjustment, "form": form, "method": method,
                "x": xs, "x_reference": refs[0], "k": k,
                "estimate": _pooled_only(mean, at_ref, single),
                "se": _pooled_only(se, at_ref, single),
                "lower": _pooled_only(lo, at_ref, single),
                "upper": _pooled_only(hi, at_ref, single),
                "pi_lower": nan if pil is None else _pooled_only(pil, at_ref, single, np.nan),
                "pi_upper": nan if piu is None else _pooled_only(piu, at_ref, single, np.nan),
                "tau2": np.where(single, np.nan, res.tau2) if method != "fixed" else nan,
                "tau2_method": {"fixed": "", "random": "DL", "random HKSJ": "PM"}[method],
                "i2": np.where(single, np.nan, res.i2), "q": np.where(single, np.nan, res.q),
                "scale": scale}))
    return pd.concat(out, ignore_index=True) if out else pd.DataFrame()


def multivariate_curves(curves: pd.DataFrame, coefs: pd.DataFrame
                        ) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The common-knot spline pooled by multivariate random-effects meta-analysis (Jackson,
    White & Thompson 2010), as a curve on the common grid, plus its heterogeneity rows. Every
    cohort contributes at every x (the pooled spline is one function, so it has no step where
    a cohort's own range ends). One cohort is not pooled ("single cohort")."""
    rows, het = [], []
    if coefs.empty:
        return pd.DataFrame(), pd.DataFrame()
    for (analysis, adjustment), g in coefs.groupby(["analysis", "adjustment"], sort=True):
        item = "common-knot spline (multivariate)"
        bases = g["basis"].unique()
        if len(bases) != 1:
            het.append({"analysis": analysis, "adjustment": adjustment, "item": item,
                        "k": g["cohort"].nunique(), "status": "failed",
                        "message": "the cohorts' bundles use different knots; fix "
                                   "continuous.spline_knots.values in the spec so every cohort "
                                   "fits the same basis."})
            continue
        cohorts = sorted(g["cohort"].unique())
        if len(cohorts) < 2:
            het.append({"analysis": analysis, "adjustment": adjustment, "item": item, "k": 1,
                        "status": SINGLE, "message": f"only cohort {cohorts[0]!r} reports it; "
                                                     "nothing to pool"})
            continue
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
                "estimate": est, "se": se, "lower": est - Z95 * se, "upper": est + Z95 * se,
                "pi_lower": np.nan, "pi_upper": np.nan, "tau2": np.nan,
                "tau2_method": "" if method == "multivariate fixed" else "MM",
                "i2": mv.i2, "q": mv.q, "scale": scale}))
        het.append({"analysis": analysis, "adjustment": adjustment, "item": item,
                    "k": len(cohorts), "q": mv.q, "q_df": mv.q_df, "q_p": mv.q_pvalue,
                    "i2": mv.i2, "tau2": float(np.trace(mv.psi)), "tau2_method": "MM",
                    "status": "ok",
                    "message": f"between-cohort covariance trace; {mv.n_truncated} negative "
                               "eigenvalue(s) truncated at 0"})
    return (pd.concat(rows, ignore_index=True) if rows else pd.DataFrame(), pd.DataFrame(het))


def group_signatures(cuts: pd.DataFrame) -> dict[tuple[str, str], str]:
    """(cohort, analysis) -> the legacy exposure groups as text ("cuts at 30, 60"), from the
    bundles' cut rows; cohorts whose cuts are not in their bundle get no entry."""
    if cuts.empty:
        return {}
    ex = cuts[cuts["role"] == "exposure"] if "role" in cuts else cuts
    out = {}
    for (cohort, analysis), g in ex.groupby(["cohort", "analysis"], sort=True):
        out[(str(cohort), str(analysis))] = "cuts at " + ", ".join(
            f"{float(c):.10g}" for c in sorted(g["cut"].astype(float)))
    return out


def _pools(contrasts: pd.DataFrame, signatures: dict[tuple[str, str], str]) -> pd.DataFrame:
    """The contrast rows that may pool, each with the key that says with which others:
    legacy group contrasts by their groups, common-value contrasts by their exposure values,
    the linear per-unit slope as it is."""
    c = contrasts
    legacy = c[(c["form"] == "legacy") & (c["contrast_type"] == "group")].copy()
    legacy["groups"] = [signatures.get((str(a), str(b)), "cuts not reported")
                        for a, b in zip(legacy["cohort"], legacy["analysis"], strict=True)]
    legacy["x_value"] = np.nan  # each cohort's own group median: not part of the meaning
    legacy["x_reference"] = np.nan
    common = c[c["contrast_type"].isin(COMMON_TYPES)].copy()
    common["groups"] = ""
    per_unit = c[(c["form"] == "linear") & (c["contrast_type"] == "per_unit")].copy()
    per_unit["groups"] = ""
    per_unit["x_value"] = np.nan  # a slope: the same quantity at any value
    per_unit["x_reference"] = np.nan
    return pd.concat([legacy, common, per_unit], ignore_index=True)


def pooled_effects(contrasts: pd.DataFrame, cuts: pd.DataFrame | None = None
                   ) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Contrasts that mean the same thing in every cohort (see the module docstring) pooled
    across cohorts: fixed, random (DL, normal) and random HKSJ (PM, t); prediction intervals
    on the random rows. A contrast with one cohort is listed in the heterogeneity rows as
    "single cohort", not pooled."""
    rows: list[dict[str, Any]] = []
    het: list[dict[str, Any]] = []
    if contrasts.empty:
        return pd.DataFrame(), pd.DataFrame()
    c = _pools(contrasts, group_signatures(cuts if cuts is not None else pd.DataFrame()))
    c["xv"] = c["x_value"].round(9)
    c["xr"] = c["x_reference"].round(9)
    keys = ["analysis", "adjustment", "form", "contrast_type", "contrast", "groups", "xv", "xr"]
    for key, g in c.groupby(keys, sort=True, dropna=False):
        g = g[np.isfinite(g["estimate"]) & np.isfinite(g["se"]) & (g["se"] > 0)]
        if len(g) == 0:
            continue
        base = dict(zip(keys[:6], key[:6], strict=True))
        base["x_value"] = float(g["x_value"].iloc[0])
        base["x_reference"] = float(g["x_reference"].iloc[0])
        item = f"{base['form']}: {base['contrast']}" + (f" ({base['groups']})"
                                                          if base["groups"] else "")
        if len(g) < 2:
            het.append({"analysis": base["analysis"], "adjustment": base["adjustment"],
                        "item": item, "k": 1, "status": SINGLE,
                        "message": f"only cohort {g['cohort'].iloc[0]!r} reports it with these "
                                   "groups/values; nothing to pool"})
            continue
        y = g["estimate"].to_numpy(float)
        v = g["se"].to_numpy(float) ** 2
        dl = pool_univariate(y, v, tau2_method="dl")
        pm = pool_univariate(y, v, tau2_method="pm")
        scale = g["scale"].iloc[0]
        for method, mean, se, (lo, hi), (pil, piu), tau2, tm in (
                ("fixed", dl.fe_mean, dl.fe_se, dl.ci(random=False), (np.nan, np.nan),
                 np.nan, ""),
                ("random", dl.re_mean, dl.re_se, dl.ci(), dl.prediction_interval(), dl.tau2,
                 "DL"),
                ("random HKSJ", pm.re_mean, pm.re_se, pm.ci_hksj(), pm.prediction_interval(),
                 pm.tau2, "PM")):
            rows.append({**base, "method": method, "k": dl.k, "cohorts": ", ".join(
                sorted(map(str, g["cohort"]))), "estimate": mean, "se": se, "lower": lo,
                "upper": hi, "pi_lower": pil, "pi_upper": piu, "tau2": tau2,
                "tau2_method": tm, "scale": scale})
        for tm, pe in (("DL", dl), ("PM", pm)):
            het.append({"analysis": base["analysis"], "adjustment": base["adjustment"],
                        "item": item, "k": pe.k, "q": pe.q, "q_df": pe.q_df, "q_p": pe.q_pvalue,
                        "i2": pe.i2, "tau2": pe.tau2, "tau2_method": tm, "status": "ok",
                        "message": ""})
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
    cuts = _concat(bundles, "cuts")
    eff, eh = pooled_effects(_concat(bundles, "contrasts"), cuts)
    het = pd.concat([d for d in (eh, mvh) if len(d)], ignore_index=True) \
        if len(eh) or len(mvh) else pd.DataFrame()
    return {"pooled_curves": pcur, "pooled_effects": eff, "heterogeneity": het,
            "harmonisation": harmonisation(cuts)}
