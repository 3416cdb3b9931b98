"""What the two decision tables share: the risk scale, the thresholds, the effect modifier's
levels, the fitted models on the risk scale (built once per refit), the caution, the tables'
final shape and the terminal summary of both.

Decisions on predicted risk, not on input cut points: ``thresholds``
(:mod:`unbin.questions.thresholds`, implied exposure thresholds) and ``net_benefit``
(:mod:`unbin.questions.net_benefit`, decision curves); each row carries the same ``caution``
sentence (:data:`CAUTION`).
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ..refit.analysis import RISK_FORMS, Refit
from ..refit.interaction import SPLINE, level_models
from ..refit.modifier import Levels
from ..refit.risk import RiskFit, RiskScale, from_result, risk_fit, risk_scale
from ..refit.sampling_design import absolute_risk_reason
from ..spec import Analysis, Spec

TABLES = ("thresholds", "net_benefit")
CAUTION = ("These numbers support statistical re-analysis; clinical decisions follow local "
           "guidelines and licensed practice.")
CURVE_FORMS = RISK_FORMS  # the refit keeps these fits' linear predictors
EVENT_FAMILIES = frozenset({"binary", "survival"})


def design_not_used(outcome: Any, clusters: bool = True) -> str:
    """The note of a decision table that counts every row once: which of the analysis' weights
    (and, for tables with intervals, clusters) it does not use; "" when there are none."""
    parts = [f"{outcome.weight_kind} weights"] if outcome.weights is not None else []
    if clusters and outcome.cluster is not None:
        parts.append("clusters")
    if not parts:
        return ""
    return (f"the analysis' {' and '.join(parts)} are not used here: every row counts once, "
            "as an independent row (the models' fitted risks do use them)")


def thresholds_for(a: Analysis, spec: Spec) -> tuple[float, ...]:
    """The analysis' own thresholds, else the study's (binary and survival outcomes only)."""
    if a.risk_thresholds is not None:
        return a.risk_thresholds
    return tuple(spec.risk_thresholds) if a.family in EVENT_FAMILIES else ()


# --------------------------------------------------------------------------- effect modifier


def modifier_levels(r: Refit, spec: Spec | None = None) -> Levels:
    """The levels of the effect modifier (unbin.refit.modifier), as the refit's models enter it."""
    return level_models(r).levels


@dataclass(frozen=True)
class InteractionTest:
    lr: float = float("nan")
    df: int | None = None
    p: float = float("nan")
    status: str = "skipped"
    reason: str = ""


def interaction_model(r: Refit, levels: Levels,
                      scale: RiskScale) -> tuple[RiskFit | None, InteractionTest]:
    """The spline x level model with continuous adjustment (unbin.refit.interaction: fixed knots, the
    level main effects in it and in the model it is tested against) on the risk scale, and its
    LR test."""
    if not levels.active:
        return None, InteractionTest(reason=levels.note or "no effect modifier")
    if r.outcome.cause is not None:
        return None, InteractionTest(reason="with competing events the risk comes from "
                                            "Fine–Gray models; the spline x level model's is "
                                            "not computed")
    lm = level_models(r)
    m = lm.get(SPLINE, "continuous")
    if m is None:
        return None, InteractionTest(reason=lm.reason or "the interaction model with continuous "
                                                         "adjustment is not available")
    if not m.ok:
        return None, InteractionTest(df=m.df, status="failed", reason=m.reason)
    test = InteractionTest(m.lr, m.df, m.p, "ok", m.reason)
    coefs = np.vstack([m.level_coef(j)[0] for j in range(len(m.levels.labels))])
    term = m.term

    def curve(x: np.ndarray, level: int = 0) -> np.ndarray:
        return np.asarray(term.basis(np.atleast_1d(x)) @ coefs[level], dtype=float)

    B = np.asarray(term.basis(r.x), dtype=float)
    rows = np.einsum("ij,ij->i", B, coefs[m.levels.codes])
    rf = from_result(r, m.full, scale, curve, rows, f"spline x {m.levels.variable}",
                     "continuous", m.detail)
    return rf, test


# --------------------------------------------------------------------------- the models


@dataclass(frozen=True)
class Decisions:
    """What both tables read: the risk scale, thresholds, levels and the fitted models on the
    risk scale. ``reason`` is set when the analysis cannot give decisions at all."""

    scale: RiskScale
    thresholds: tuple[float, ...]
    levels: Levels
    curves: tuple[RiskFit, ...]
    legacy: RiskFit | None
    failed: tuple[tuple[str, str, str], ...]
    interaction: InteractionTest
    reason: str = ""


_CACHE: list[tuple[weakref.ref[Refit], Spec, Decisions]] = []


def decision_models(r: Refit, spec: Spec) -> Decisions:
    """Build (once per refit and spec; both tables share it) every model on the risk scale."""
    for ref, s, d in _CACHE:
        if ref() is r and s is spec:
            return d
    d = _build(r, spec)
    _CACHE[:] = [(weakref.ref(r), spec, d)]
    return d


def _build(r: Refit, spec: Spec) -> Decisions:
    a = r.analysis
    scale = risk_scale(a, spec)
    levels = modifier_levels(r, spec)
    thresholds = thresholds_for(a, spec)
    design_reason = absolute_risk_reason(a)
    if design_reason:
        return Decisions(scale, thresholds, levels, (), None, (), InteractionTest(), design_reason)
    if scale.family == "survival" and scale.horizon is None:
        return Decisions(scale, thresholds, levels, (), None, (), InteractionTest(),
                         "no horizon for the survival risk: give outcome.horizon or the "
                         "study-level horizon")
    curves: list[RiskFit] = []
    failed: list[tuple[str, str, str]] = []
    for form in CURVE_FORMS:
        f = r.get(form, "continuous")
        if f is None:
            continue
        if not f.result.ok:
            failed.append((form, "continuous", f.result.message))
            continue
        try:
            curves.append(risk_fit(r, f, scale))
        except ValueError as exc:  # a competing-risks (Fine–Gray) model that did not fit
            failed.append((form, "continuous", str(exc)))
    inter, test = interaction_model(r, levels, scale)
    if inter is not None:
        curves.append(inter)
    elif test.status == "failed":
        failed.append((f"spline x {levels.variable}", "continuous", test.reason))
    lf = r.get("legacy", "legacy")
    legacy, message = None, lf.result.message if lf is not None else ""
    if lf is not None and lf.result.ok:
        try:
            legacy = risk_fit(r, lf, scale)
        except ValueError as exc:
            message = str(exc)
    if lf is not None and legacy is None:
        failed.append(("legacy", "legacy", message))
    return Decisions(scale, thresholds, levels, tuple(curves), legacy, tuple(failed), test)


def finish(rows: list[dict[str, Any]] | pd.DataFrame, columns: tuple[str, ...]) -> pd.DataFrame:
    """The rows in ``columns`` order, missing columns as NaN, the caution on every row, and
    each column's dtype (counts Int64, text str, the rest float)."""
    out = rows if isinstance(rows, pd.DataFrame) else pd.DataFrame(rows)
    for c in columns:
        if c not in out:
            out[c] = np.nan
    out = out[list(columns)].copy()
    out["caution"] = CAUTION
    for c in out.columns:
        if c in ("crossing", "df_interaction", "n"):
            out[c] = pd.array(out[c], dtype="Int64")
        elif c in ("model", "adjustment", "detail", "by", "level", "risk_scale", "position",
                   "direction", "status", "reason", "note", "rule", "rule_type", "method",
                   "caution"):
            out[c] = out[c].fillna("").astype(str)
        else:
            out[c] = out[c].astype(float)
    return out


# --------------------------------------------------------------------------- summary


def _key_columns(df: pd.DataFrame) -> list[str]:
    """Group rows by analysis, and by cohort too when the tables hold several."""
    several = "cohort" in df and df["cohort"].nunique() > 1
    return ["cohort", "analysis"] if several else ["analysis"]


def _name(key: Any) -> str:
    return "/".join(map(str, key)) if isinstance(key, tuple) else str(key)


def summary_lines(thresholds: pd.DataFrame, net_benefit: pd.DataFrame) -> list[str]:
    """Terminal summary: the spline's implied thresholds at the median risk profile per level
    (the nearest legacy cut beside them), the net benefit of the legacy rule and of the spline's
    risk rule at the spec's thresholds, and the caution."""
    lines = []
    parts = []
    ok = thresholds[thresholds["status"] == "ok"] if "status" in thresholds else thresholds[:0]
    ok = ok[(ok["model"] == "spline") & np.isclose(ok["profile_quantile"], 0.5)] if len(ok) else ok
    for key, g in (ok.groupby(_key_columns(ok), sort=False) if len(ok) else []):
        bits = []
        for t, gt in g.groupby("threshold", sort=True):
            per = []
            for level, gl in gt.groupby("level", sort=False):
                vals = gl["exposure_value"].dropna()
                text = (" & ".join(f"{v:.4g}" for v in vals) if len(vals)
                        else str(gl["position"].iloc[0]))
                per.append(text if level == "all" else f"{gl['by'].iloc[0]}={level}: {text}")
            bits.append(f"{t:g} → " + ", ".join(per))
        cuts = g["nearest_cut"].dropna().unique()
        cut_text = f" (legacy cut {', '.join(f'{c:g}' for c in sorted(cuts))})" if len(cuts) else ""
        parts.append(f"{_name(key)} " + "; ".join(bits) + cut_text)
    if parts:
        lines.append("Implied thresholds (spline, median risk profile; risk → exposure): "
                     + " | ".join(parts))
    nb_parts = []
    nb = net_benefit[net_benefit["status"] == "ok"] if "status" in net_benefit else net_benefit[:0]
    wanted = sorted(set(thresholds["threshold"].dropna())) if "threshold" in thresholds else []
    for key, g in (nb.groupby(_key_columns(nb), sort=False) if len(nb) else []):
        for t in wanted:
            at = g[np.isclose(g["threshold"], t)]
            legacy = at[at["rule_type"] == "legacy"]
            spline = at[at["rule"] == "risk: spline"]
            treat_all = at[at["rule"] == "treat all"]
            if legacy.empty or spline.empty or treat_all.empty:
                continue
            nb_parts.append(
                f"{_name(key)} at {t:g}: legacy {legacy['net_benefit'].iloc[0]:.3f}, spline "
                f"risk {spline['net_benefit'].iloc[0]:.3f}, treat all "
                f"{treat_all['net_benefit'].iloc[0]:.3f}")
    if nb_parts:
        lines.append("Net benefit (apparent, in the fitted rows; per patient): "
                     + "; ".join(nb_parts))
    lines.append("Caution: " + CAUTION)
    return lines


def typed_table(rows: list[dict[str, Any]], columns: tuple[str, ...], text: tuple[str, ...],
                counts: tuple[str, ...], flags: tuple[str, ...] = ()) -> pd.DataFrame:
    """The rows in ``columns`` order with the patient-care caution: ``text`` columns as str,
    ``counts`` as Int64, ``flags`` as nullable booleans, the rest as float."""
    out = pd.DataFrame(rows)
    for c in columns:
        if c not in out:
            out[c] = np.nan
    out = out[list(columns)].copy()
    out["caution"] = CAUTION
    for c in columns:
        if c in text:
            out[c] = out[c].fillna("").astype(str)
        elif c in counts:
            out[c] = pd.array([None if v is None or pd.isna(v) else int(v) for v in out[c]],
                              dtype="Int64")
        elif c in flags:
            out[c] = pd.array([None if pd.isna(v) else bool(v) for v in out[c]],
                              dtype="boolean")
        else:
            out[c] = out[c].astype(float)
    return out
