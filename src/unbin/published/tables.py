"""Published tables -> the ``published_*`` tables and the rows they add to the pooled tables.
Pure: the checked studies and the data cohorts' bundle tables in, data frames out.

Per study: assigned exposures (``unbin.published.exposure``), the covariance of the log
ratios (``unbin.published.covariance``), linear and restricted-cubic-spline GLS trends on the
common knots (``unbin.published.gls``). Knots, in order of precedence: fixed in the spec
(``continuous.spline_knots.values``), the data cohorts' common-knot spline (so every
contributor has the same basis), else the default knot quantiles of the pooled distribution of
assigned exposures, each group weighted by its size (cases + controls, participants or
person-time share; equal weights where the table gives none). The spline coefficient vectors
of the published studies and of the data cohorts (common-knot spline, ``coefficients``
bundle) are then pooled by the multivariate method of moments (Jackson, White & Thompson 2010),
with all contributors, individual data only and published tables only (the sensitivity rows).
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from ..consortium.bundles import coefficient_arrays
from ..consortium.meta_analysis import pool_multivariate, pooled_curve
from ..consortium.pooling_base import PoolingInputError
from ..refit.contrasts import Z95
from ..terms.spline import KNOT_QUANTILES
from .covariance import StudyCovariance, log_ratio_and_variance, study_covariance
from .exposure import assigned_exposures
from .gls import TrendFit, fit_trend, trend_basis, trend_curve
from .spec import PublishedStudy

EVIDENCE_DATA = "individual data"
EVIDENCE_TABLE = "published table"
EVIDENCE_POOLED = "pooled"
POOLED_SETS = (("all", "all contributors"), ("data", "individual data only"),
               ("published", "published tables only"))
GRID_POINTS = 100

GROUPS_COLUMNS = ("analysis", "study", "group", "reference", "lower", "upper",
                  "assigned_exposure", "exposure_rule", "ratio", "ratio_lower", "ratio_upper",
                  "cases", "other_count", "fitted_cases", "fitted_other", "covariance_method",
                  "plotted_log_ratio")
FITS_COLUMNS = ("analysis", "adjustment", "study", "evidence", "form", "scale", "design",
                "covariance_method", "groups", "k", "knots", "coefficients", "slope",
                "slope_se", "gof_q", "gof_df", "gof_p", "nonlinear_chi2", "nonlinear_df",
                "nonlinear_p", "i2", "max_shift_without_published", "status", "message")
CURVES_COLUMNS = ("analysis", "adjustment", "curve", "evidence", "form", "x", "x_reference",
                  "estimate", "se", "lower", "upper", "effect", "effect_lower",
                  "effect_upper", "scale")


@dataclass(frozen=True)
class PreparedStudy:
    """One study's table in the order the maths needs: reference group first."""

    study: PublishedStudy
    exposures: np.ndarray  # reference first
    rules: tuple[str, ...]  # in the table's order
    assigned: tuple[float, ...]  # in the table's order
    order: tuple[int, ...]  # table index of each position (reference first)
    log_ratios: np.ndarray  # non-reference groups
    covariance: StudyCovariance


def prepare(study: PublishedStudy) -> PreparedStudy:
    g = study.groups
    vals, rules = assigned_exposures([x.lower for x in g], [x.upper for x in g],
                                     [x.median for x in g], [x.mean for x in g],
                                     open_rule=study.open_rule)
    order = (study.reference,) + tuple(i for i in range(len(g)) if i != study.reference)
    rest = [g[i] for i in order[1:]]
    lr, var = log_ratio_and_variance(np.array([x.ratio for x in rest]),
                                     np.array([x.ratio_lower for x in rest], dtype=float),
                                     np.array([x.ratio_upper for x in rest], dtype=float))
    cases = [g[i].cases for i in order]
    other = [g[i].other for i in order]
    have_cases = all(c is not None for c in cases)
    have_other = all(o is not None for o in other)
    kind = study.kind
    # odds ratios of a cohort with participants: the odds formulation wants the non-cases
    participants_odds = kind == "odds" and study.design == "cohort_participants"
    if have_cases and have_other:
        o = np.array(other, float)
        c = np.array(cases, float)
        cov = study_covariance(kind, lr, var, c, o - c if participants_odds else o)
    elif have_other:
        sizes = np.array(other, float)
        cov = study_covariance(kind, lr, var, group_sizes=sizes,
                               total_cases=study.total_cases if kind != "rate" else None,
                               sizes_of="other" if study.design == "case_control" else "total")
    else:
        cov = study_covariance(kind, lr, var)
    return PreparedStudy(study, np.array([vals[i] for i in order]), tuple(rules), tuple(vals),
                         order, lr, cov)


def group_weights(p: PreparedStudy) -> np.ndarray:
    """Each group's share of its study (reference first), for the pooled exposure
    distribution; equal when the table gives no sizes."""
    g = p.study.groups
    size = [((g[i].cases or 0.0) + (g[i].other or 0.0)) if p.study.design == "case_control"
            else (g[i].other or 0.0) for i in p.order]
    s = np.array(size, float)
    return s / s.sum() if s.sum() > 0 else np.full(s.size, 1.0 / s.size)


def knots_from_assigned(prepared: Sequence[PreparedStudy], k: int) -> tuple[float, ...]:
    """Default knot quantiles of the pooled, size-weighted distribution of assigned exposures
    (a weighted inverse distribution function); fewer knots when they are not distinct."""
    x = np.concatenate([p.exposures for p in prepared])
    w = np.concatenate([group_weights(p) for p in prepared])
    idx = np.argsort(x, kind="stable")
    x, w = x[idx], w[idx]
    cdf = (np.cumsum(w) - 0.5 * w) / w.sum()
    for kk in range(k, 2, -1):
        knots = tuple(float(v) for v in np.interp(KNOT_QUANTILES[kk], cdf, x))
        if all(b > a for a, b in zip(knots, knots[1:], strict=False)):
            return knots
    raise ValueError("the assigned exposures are too few to place 3 distinct knots; fix "
                     "continuous.spline_knots.values in the spec")


def _data_spline(coefs: pd.DataFrame, analysis: str) -> dict[str, Any]:
    """The data cohorts' common-knot coefficients of ``analysis``, per adjustment:
    {adjustment: (knots, [(cohort, b, V)])}."""
    out: dict[str, Any] = {}
    if coefs.empty:
        return out
    g = coefs[coefs["analysis"] == analysis]
    for adj, ga in g.groupby("adjustment", sort=True):
        bases = ga["basis"].unique()
        if len(bases) != 1:
            continue
        (term,) = json.loads(bases[0])
        cohorts = [(c, *coefficient_arrays(ga[ga["cohort"] == c]))
                   for c in sorted(ga["cohort"].unique())]
        out[str(adj)] = (tuple(float(v) for v in term["knots"]), cohorts)
    return out


def _fit_row(analysis: str, adjustment: str, study: str, evidence: str, fit: TrendFit | None,
             **extra: Any) -> dict[str, Any]:
    row: dict[str, Any] = {c: np.nan for c in FITS_COLUMNS}
    row.update(analysis=analysis, adjustment=adjustment, study=study, evidence=evidence,
               status="ok", message="", design="", covariance_method="", knots="",
               coefficients="", scale="", max_shift_without_published=np.nan)
    if fit is not None:
        row.update(form=fit.form, knots=", ".join(f"{v:.6g}" for v in fit.knots),
                   coefficients=json.dumps([float(v) for v in fit.coef]),
                   gof_q=fit.q, gof_df=fit.q_df, gof_p=fit.q_p,
                   nonlinear_chi2=fit.nonlinear_chi2, nonlinear_df=fit.nonlinear_df,
                   nonlinear_p=fit.nonlinear_p)
        if fit.form == "linear":
            row.update(slope=float(fit.coef[0]), slope_se=float(np.sqrt(fit.cov[0, 0])))
    row.update(extra)
    return row


def _curve_rows(analysis: str, adjustment: str, curve: str, evidence: str, form: str,
                xs: np.ndarray, ref: float, est: np.ndarray, se: np.ndarray,
                scale: str) -> pd.DataFrame:
    lo, hi = est - Z95 * se, est + Z95 * se
    ratio = scale.endswith("ratio")
    tr = np.exp if ratio else (lambda a: a)
    return pd.DataFrame({"analysis": analysis, "adjustment": adjustment, "curve": curve,
                         "evidence": evidence, "form": form, "x": xs, "x_reference": ref,
                         "estimate": est, "se": se, "lower": lo, "upper": hi,
                         "effect": tr(est), "effect_lower": tr(lo), "effect_upper": tr(hi),
                         "scale": scale})


def published_tables(studies: Sequence[PublishedStudy], coefs: pd.DataFrame,
                     curves: pd.DataFrame, fixed_knots: dict[str, tuple[float, ...] | None],
                     knot_count: dict[str, int]) -> dict[str, pd.DataFrame]:
    """The ``published_*`` tables plus ``pooled_curves``/``heterogeneity`` rows
    (keys ``pooled_curves_rows``, ``heterogeneity_rows``). ``coefs``/``curves``: the data
    cohorts' bundle tables (may be empty); ``fixed_knots``/``knot_count``: per analysis, the
    spec's fixed knots (or None) and its number of common knots."""
    groups_rows: list[dict[str, Any]] = []
    fits_rows: list[dict[str, Any]] = []
    curve_parts: list[pd.DataFrame] = []
    pooled_parts: list[pd.DataFrame] = []
    het_rows: list[dict[str, Any]] = []
    by_analysis: dict[str, list[PublishedStudy]] = {}
    for s in studies:
        by_analysis.setdefault(s.analysis, []).append(s)
    for analysis, group in sorted(by_analysis.items()):
        prepared: list[PreparedStudy] = []
        for s in group:
            try:
                prepared.append(prepare(s))
            except (ValueError, np.linalg.LinAlgError) as exc:
                fits_rows.append(_fit_row(analysis, "", s.name, EVIDENCE_TABLE, None,
                                          form="", status="failed", message=str(exc),
                                          scale=s.scale_label, design=s.design))
        data = _data_spline(coefs, analysis)
        cg = curves[(curves["analysis"] == analysis) & (curves["form"] == "common_spline")] \
            if len(curves) else pd.DataFrame()
        fixed = fixed_knots.get(analysis)
        adjustments = sorted(data) if data else ["published"]
        for adj in adjustments:
            if fixed is not None:
                knots = tuple(fixed)
            elif adj in data:
                knots = data[adj][0]
            else:
                try:
                    knots = knots_from_assigned(prepared, knot_count.get(analysis, 3))
                except ValueError as exc:
                    fits_rows.append(_fit_row(analysis, adj, "(all)", EVIDENCE_TABLE, None,
                                              form="spline", status="failed", message=str(exc)))
                    continue
            cga = cg[cg["adjustment"] == adj] if len(cg) else cg
            if len(cga):
                xs = np.sort(cga["x"].unique())
                ref = float(cga["x_reference"].iloc[0])
                data_scale = str(cga["scale"].iloc[0])
            else:
                allx = np.concatenate([p.exposures for p in prepared]) if prepared \
                    else np.array([0.0, 1.0])
                xs = np.linspace(float(allx.min()), float(allx.max()), GRID_POINTS)
                ref = float(np.mean([p.exposures[0] for p in prepared])) if prepared else 0.0
                data_scale = ""
            _one_adjustment(analysis, adj, prepared, knots, data.get(adj, (knots, []))[1],
                            xs, ref, data_scale, groups_rows, fits_rows, curve_parts,
                            pooled_parts, het_rows, first=adj == adjustments[0])
    return {
        "published_groups": pd.DataFrame(groups_rows, columns=list(GROUPS_COLUMNS)),
        "published_fits": pd.DataFrame(fits_rows, columns=list(FITS_COLUMNS)),
        "published_curves": (pd.concat(curve_parts, ignore_index=True) if curve_parts
                             else pd.DataFrame(columns=list(CURVES_COLUMNS))),
        "pooled_curves_rows": (pd.concat(pooled_parts, ignore_index=True) if pooled_parts
                               else pd.DataFrame()),
        "heterogeneity_rows": pd.DataFrame(het_rows),
    }


def _study_fits(analysis: str, adj: str, p: PreparedStudy, knots: tuple[float, ...],
                xs: np.ndarray, ref: float, fits_rows: list[dict[str, Any]],
                curve_parts: list[pd.DataFrame]) -> dict[str, TrendFit]:
    """One published study's linear and spline GLS trends: their fit rows and curves."""
    s = p.study
    scale = s.scale_label
    base = dict(scale=scale, design=s.design, covariance_method=p.covariance.method,
                groups=len(s.groups))
    msg = ("independence approximation: the table gives neither cases nor group sizes, "
           "so the log ratios' correlation is ignored (last resort)"
           if p.covariance.method == "independence" else "")
    fits: dict[str, TrendFit] = {}
    for form in ("linear", "spline"):
        try:
            fits[form] = fit_trend(form, p.exposures, p.log_ratios, p.covariance.cov, knots)
            fits_rows.append(_fit_row(analysis, adj, s.name, EVIDENCE_TABLE, fits[form],
                                      message=msg, k=1, **base))
        except (ValueError, np.linalg.LinAlgError) as exc:
            fits_rows.append(_fit_row(analysis, adj, s.name, EVIDENCE_TABLE, None, form=form,
                                      status="failed", message=str(exc), **base))
            continue
        est, se = trend_curve(fits[form], xs, ref)
        curve_parts.append(_curve_rows(analysis, adj, s.name, EVIDENCE_TABLE, form, xs, ref,
                                       est, se, scale))
    return fits


def _group_rows(analysis: str, p: PreparedStudy, spline: TrendFit | None,
                ref: float) -> list[dict[str, Any]]:
    """One published study's ``published_groups`` rows; the plotted log ratios are shifted
    onto the study's spline at its reference exposure."""
    s = p.study
    shift = 0.0
    if spline is not None:
        at = trend_curve(spline, np.array([p.exposures[0]]), ref)[0][0]
        shift = float(at)
    ratios = np.concatenate([[0.0], p.log_ratios])
    fitted_a = p.covariance.cases
    fitted_o = p.covariance.other
    rows: list[dict[str, Any]] = []
    for pos, i in enumerate(p.order):
        g = s.groups[i]
        rows.append({
            "analysis": analysis, "study": s.name, "group": i + 1,
            "reference": i == s.reference, "lower": g.lower, "upper": g.upper,
            "assigned_exposure": p.assigned[i], "exposure_rule": p.rules[i],
            "ratio": g.ratio, "ratio_lower": g.ratio_lower, "ratio_upper": g.ratio_upper,
            "cases": g.cases, "other_count": g.other,
            "fitted_cases": float(fitted_a[pos]) if fitted_a.size else np.nan,
            "fitted_other": float(fitted_o[pos]) if fitted_o.size else np.nan,
            "covariance_method": p.covariance.method,
            "plotted_log_ratio": float(ratios[pos]) + shift})
    return rows


@dataclass(frozen=True)
class _PoolingGrid:
    """What every pooled set of one analysis and adjustment shares."""
    analysis: str
    adj: str
    knots: tuple[float, ...]
    xs: np.ndarray
    ref: float
    scale: str
    scale_note: str
    basis_g: np.ndarray  # the spline basis on the grid and at the reference
    basis_r: np.ndarray


def _pool_set(g: _PoolingGrid, key: str, label: str,
              contributors: list[tuple[str, str, np.ndarray, np.ndarray]],
              fits_rows: list[dict[str, Any]], curve_parts: list[pd.DataFrame],
              pooled_parts: list[pd.DataFrame], het_rows: list[dict[str, Any]],
              ) -> np.ndarray | None:
    """One pooled set (all, data only, published only): its fit row and curve, and for all
    contributors with a published table the pooled-curve and heterogeneity rows; the pooled
    curve, or None when there is nothing to pool."""
    analysis, adj, xs, ref = g.analysis, g.adj, g.xs, g.ref
    chosen = [c for c in contributors if key == "all"
              or (key == "data" and c[1] == EVIDENCE_DATA)
              or (key == "published" and c[1] == EVIDENCE_TABLE)]
    name = f"pooled: {label}"
    if len(chosen) < 2:
        if key == "all" or chosen:
            fits_rows.append(_fit_row(analysis, adj, name, EVIDENCE_POOLED, None,
                                      form="spline", k=len(chosen), status="single cohort",
                                      message="fewer than two contributors; nothing to pool"))
        return None
    try:
        mv = pool_multivariate(np.array([c[2] for c in chosen]),
                               np.array([c[3] for c in chosen]))
    except PoolingInputError as exc:
        fits_rows.append(_fit_row(analysis, adj, name, EVIDENCE_POOLED, None, form="spline",
                                  k=len(chosen), status="failed", message=str(exc)))
        return None
    est, se = pooled_curve(mv.re_mean, mv.re_cov, g.basis_g, g.basis_r)
    bn = mv.re_mean[1:]
    chi2 = float(bn @ np.linalg.solve(mv.re_cov[1:, 1:], bn)) if bn.size else np.nan
    pooled_fit = TrendFit("spline", mv.re_mean, mv.re_cov, mv.q, mv.q_df, mv.q_pvalue,
                          chi2, int(bn.size),
                          float(stats.chi2.sf(chi2, bn.size)) if bn.size else np.nan, g.knots)
    members = ", ".join(sorted(f"{c[0]} ({c[1]})" for c in chosen))
    note = f"; {g.scale_note}" if g.scale_note else ""
    fits_rows.append(_fit_row(analysis, adj, name, EVIDENCE_POOLED, pooled_fit,
                              scale=g.scale, k=len(chosen), i2=mv.i2,
                              message=f"multivariate random effects (method of moments) of "
                                      f"{members}" + note))
    curve_parts.append(_curve_rows(analysis, adj, name, EVIDENCE_POOLED, "spline", xs, ref,
                                   est, se, g.scale))
    if key == "all" and any(c[1] == EVIDENCE_TABLE for c in chosen):
        pooled_parts.append(pd.DataFrame({
            "analysis": analysis, "adjustment": adj, "form": "common_spline",
            "method": "multivariate random, with published tables", "x": xs,
            "x_reference": ref, "k": len(chosen), "estimate": est, "se": se,
            "lower": est - Z95 * se, "upper": est + Z95 * se, "pi_lower": np.nan,
            "pi_upper": np.nan, "tau2": np.nan, "tau2_method": "MM", "i2": mv.i2,
            "q": mv.q, "scale": g.scale}))
        het_rows.append({"analysis": analysis, "adjustment": adj,
                         "item": "common-knot spline (multivariate, with published tables)",
                         "k": len(chosen), "q": mv.q, "q_df": mv.q_df, "q_p": mv.q_pvalue,
                         "i2": mv.i2, "tau2": float(np.trace(mv.psi)), "tau2_method": "MM",
                         "status": "ok", "message": f"{mv.n_truncated} negative "
                                                    "eigenvalue(s) truncated at 0" + note})
    return est


def _one_adjustment(analysis: str, adj: str, prepared: list[PreparedStudy],
                    knots: tuple[float, ...], data_cohorts: list[tuple[str, np.ndarray,
                                                                        np.ndarray]],
                    xs: np.ndarray, ref: float, data_scale: str,
                    groups_rows: list[dict[str, Any]], fits_rows: list[dict[str, Any]],
                    curve_parts: list[pd.DataFrame], pooled_parts: list[pd.DataFrame],
                    het_rows: list[dict[str, Any]], first: bool) -> None:
    """Per study trends, the data cohorts' rows and the pooled sets of one analysis and
    adjustment, appended to the row lists (the groups rows only for the first adjustment)."""
    contributors: list[tuple[str, str, np.ndarray, np.ndarray]] = []
    scales = {data_scale} if data_scale else set()
    for p in prepared:
        scales.add(p.study.scale_label)
        fits = _study_fits(analysis, adj, p, knots, xs, ref, fits_rows, curve_parts)
        if "spline" in fits:
            contributors.append((p.study.name, EVIDENCE_TABLE, fits["spline"].coef,
                                 fits["spline"].cov))
        if first:
            groups_rows.extend(_group_rows(analysis, p, fits.get("spline"), ref))
    for cohort, b, V in data_cohorts:
        contributors.append((cohort, EVIDENCE_DATA, b, V))
        fits_rows.append(_fit_row(analysis, adj, cohort, EVIDENCE_DATA, None, form="spline",
                                  scale=data_scale, k=1,
                                  knots=", ".join(f"{v:.6g}" for v in knots),
                                  coefficients=json.dumps([float(v) for v in b])))
    mixed = len(scales) > 1
    scale_note = (f"mixed effect scales ({', '.join(sorted(scales))}) pooled as one log ratio; "
                  "read as approximate (rare outcome)" if mixed else "")
    grid = _PoolingGrid(analysis, adj, knots, xs, ref,
                        data_scale or (sorted(scales)[0] if scales else ""), scale_note,
                        trend_basis("spline", knots, xs),
                        trend_basis("spline", knots, np.array([ref]))[0])
    curves_by_set: dict[str, np.ndarray] = {}
    for key, label in POOLED_SETS:
        est = _pool_set(grid, key, label, contributors, fits_rows, curve_parts, pooled_parts,
                        het_rows)
        if est is not None:
            curves_by_set[key] = est
    if "all" in curves_by_set and "data" in curves_by_set:
        shift = float(np.max(np.abs(curves_by_set["all"] - curves_by_set["data"])))
        for r in fits_rows:
            if r["analysis"] == analysis and r["adjustment"] == adj \
                    and r["study"] == "pooled: all contributors":
                r["max_shift_without_published"] = shift
