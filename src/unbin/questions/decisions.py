"""Decisions on predicted risk, not on input cut points.

Two tables per analysis, each row carrying the same ``caution`` sentence (:data:`CAUTION`).

``thresholds`` — implied exposure thresholds. For every risk threshold (the analysis'
``risk_thresholds``, else the study's for binary and survival outcomes; on the rate or mean scale
for count and continuous outcomes, which need their own list), every fitted curve (linear, spline
and fractional polynomial with continuous adjustment; with an effect modifier ``by`` also the
spline x level interaction model) and every level of ``by``: the exposure values at which the
predicted risk (:mod:`unbin.refit.risk`) crosses the threshold, within the level's observed exposure
range, with the rest of the linear predictor (everything but the exposure: intercept or log
baseline hazard, adjustment, the level's main effect) held at its 10th, 50th and 90th percentile
among the level's rows — the cut a risk rule implies moves with the patient's other risk
factors. Crossings are found on a grid of :data:`SEARCH_POINTS` points and refined by Brent's
method (``scipy.optimize.brentq``), so the risk at a reported value equals the threshold to
rounding; every crossing of a non-monotone curve is reported (``crossing`` 1, 2, ...), a curve
that stays on one side is reported once with ``position`` "always above"/"always below". A
crossing between two grid points that touches the threshold without crossing it is not found.
Each value is compared with the nearest legacy cut. The interaction model
(:mod:`unbin.refit.interaction`: a spline with knots fixed before the outcome is seen, the level main
effects in the model and in the one it is tested against) and its likelihood-ratio test against
the same spline without interaction (same continuous adjustment) are on every row
(``lr_interaction``, ``df_interaction``, ``p_interaction``).

``net_benefit`` — decision curves (Vickers & Elkin 2006, Med Decis Making 26:565) over the
threshold probabilities in :data:`NB_GRID` for treat-all, treat-none, the legacy rules (exposure
beyond the legacy cut(s), on the side away from the reference group) and the risk rules of the
fitted models (treat when the predicted risk is at least the threshold). Binary outcomes:
NB = TP/n - FP/n * p_t/(1-p_t). Survival outcomes, at the horizon, with Kaplan-Meier estimates
(Vickers, Cronin, Elkin & Gonen 2008, BMC Med Inform Decis Mak 8:53):
NB = (1 - S(h | positive)) P(positive) - S(h | positive) P(positive) p_t/(1-p_t); the
Kaplan-Meier estimate honours delayed entry and ignores strata. Count and continuous outcomes
have no event probability, so no net benefit (a row says so). The risk rules are evaluated on
the rows their models were fitted to: apparent net benefit, optimistic for a fitted model.
"""

from __future__ import annotations

import weakref
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy import optimize

from ..refit.analysis import Refit
from ..refit.interaction import SPLINE, level_models
from ..refit.modifier import Levels
from ..refit.risk import RiskFit, RiskScale, from_result, link, risk_fit, risk_scale
from ..spec import Analysis, Spec
from ..terms import GroupedTerm

TABLES = ("thresholds", "net_benefit")
CAUTION = ("These numbers support statistical re-analysis; clinical decisions follow local "
           "guidelines and licensed practice.")
PROFILE_QUANTILES = (0.10, 0.50, 0.90)
SEARCH_POINTS = 512
NB_GRID = np.arange(1, 100) / 100.0
CURVE_FORMS = ("linear", "spline", "fp")
EVENT_FAMILIES = frozenset({"binary", "survival"})
APPARENT = ("apparent: the model was fitted to these rows, so its net benefit is optimistic "
            "(no validation)")


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
        curves.append(risk_fit(r, f, scale))
    inter, test = interaction_model(r, levels, scale)
    if inter is not None:
        curves.append(inter)
    elif test.status == "failed":
        failed.append((f"spline x {levels.variable}", "continuous", test.reason))
    lf = r.get("legacy", "legacy")
    legacy = risk_fit(r, lf, scale) if lf is not None and lf.result.ok else None
    if lf is not None and legacy is None:
        failed.append(("legacy", "legacy", lf.result.message))
    return Decisions(scale, thresholds, levels, tuple(curves), legacy, tuple(failed), test)


# --------------------------------------------------------------------------- crossings


def crossings(curve: Callable[[np.ndarray], np.ndarray], lo: float, hi: float, target: float,
              points: int = SEARCH_POINTS) -> tuple[list[tuple[float, str]], str]:
    """Every x in [lo, hi] where ``curve(x) = target``: the sign changes of curve - target on a
    grid of ``points`` values, each refined by Brent's method. Returns [(x, "rising" |
    "falling")] and the position: "crossing", "always above" (curve >= target on the whole grid)
    or "always below"."""
    grid = np.linspace(lo, hi, points)
    h = np.asarray(curve(grid), dtype=float) - target
    above = h >= 0
    found: list[tuple[float, str]] = []
    for i in np.flatnonzero(above[1:] != above[:-1]):
        def g(v: float) -> float:
            return float(curve(np.array([v]))[0] - target)

        root = float(optimize.brentq(g, grid[i], grid[i + 1], xtol=1e-13, maxiter=200))
        direction = "rising" if above[i + 1] else "falling"
        if found and abs(root - found[-1][0]) <= 1e-9 * max(hi - lo, 1.0):
            continue  # the grid point itself is the root: counted once
        found.append((root, direction))
    if found:
        return found, "crossing"
    return [], "always above" if above.all() else "always below"


THRESHOLD_COLUMNS = [
    "model", "adjustment", "detail", "by", "level", "threshold", "risk_scale", "horizon",
    "profile_quantile", "rest_lp", "crossing", "position", "exposure_value", "direction",
    "risk_at_value", "share_below", "nearest_cut", "shift_from_cut", "range_lower",
    "range_upper", "lr_interaction", "df_interaction", "p_interaction", "status", "reason",
    "note", "caution"]


def thresholds_table(r: Refit, spec: Spec) -> pd.DataFrame:
    """Implied exposure thresholds (module docstring)."""
    d = decision_models(r, spec)
    base: dict[str, Any] = {
        "by": d.levels.variable, "risk_scale": d.scale.label, "horizon": d.scale.horizon,
        "lr_interaction": d.interaction.lr, "df_interaction": d.interaction.df,
        "p_interaction": d.interaction.p}
    rows: list[dict[str, Any]] = []
    if d.reason or not d.thresholds:
        reason = d.reason or (
            "no risk thresholds in the spec" if r.family in EVENT_FAMILIES else
            f"no thresholds on this outcome's scale ({d.scale.label}); give "
            "analyses[].risk_thresholds")
        rows.append({**base, "status": "skipped", "reason": reason})
        return _finish(rows, THRESHOLD_COLUMNS)
    for model, adjustment, message in d.failed:
        rows.append({**base, "model": model, "adjustment": adjustment, "status": "failed",
                     "reason": message})
    cuts = np.asarray(r.legacy.cuts, dtype=float)
    for rf in d.curves:
        per_level = rf.model.startswith("spline x ")
        note = " | ".join(v for v in (rf.note, d.levels.note) if v)
        if per_level and d.interaction.reason:
            note = " | ".join(v for v in (note, d.interaction.reason) if v)
        for j, label in enumerate(d.levels.labels):
            inside = d.levels.codes == j
            xs, rest = r.x[inside], rf.rest[inside]
            common = {**base, "model": rf.model, "adjustment": rf.adjustment,
                      "detail": rf.detail, "level": label, "note": note}
            if np.unique(xs).size < 2:
                rows.append({**common, "status": "skipped",
                             "reason": "fewer than two distinct exposure values in this level"})
                continue
            lo, hi = float(xs.min()), float(xs.max())
            common.update(range_lower=lo, range_upper=hi)
            if not np.all(np.isfinite(rest)):
                rows.append({**common, "status": "failed",
                             "reason": "the predicted risk is 0 for some rows (no event before "
                                       "the horizon); choose a later horizon"})
                continue
            profiles = np.quantile(rest, PROFILE_QUANTILES)

            def curve(v: np.ndarray, j: int = j, rf: RiskFit = rf) -> np.ndarray:
                return rf.curve(v, j)

            for t in d.thresholds:
                z_t = float(link(rf.family, t))
                for q, rest_q in zip(PROFILE_QUANTILES, profiles, strict=True):
                    row = {**common, "threshold": t, "profile_quantile": q,
                           "rest_lp": float(rest_q), "status": "ok", "reason": ""}
                    found, position = crossings(curve, lo, hi, z_t - float(rest_q))
                    if not found:
                        rows.append({**row, "crossing": 0, "position": position,
                                     "direction": ""})
                        continue
                    for k, (xv, direction) in enumerate(found, start=1):
                        near = float(cuts[np.argmin(np.abs(cuts - xv))]) if cuts.size else np.nan
                        rows.append({
                            **row, "crossing": k, "position": "crossing", "exposure_value": xv,
                            "direction": direction,
                            "risk_at_value": float(rf.risk_at(xv, float(rest_q), j)[0]),
                            "share_below": float(np.mean(xs < xv)), "nearest_cut": near,
                            "shift_from_cut": xv - near})
    return _finish(rows, THRESHOLD_COLUMNS)


def _finish(rows: list[dict[str, Any]] | pd.DataFrame, columns: list[str]) -> pd.DataFrame:
    out = rows if isinstance(rows, pd.DataFrame) else pd.DataFrame(rows)
    for c in columns:
        if c not in out:
            out[c] = np.nan
    out = out[columns].copy()
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


# --------------------------------------------------------------------------- net benefit


def net_benefit_counts(y: np.ndarray, positive: np.ndarray,
                       thresholds: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Binary outcome: (NB, TP/n, FP/n) per threshold, for ``positive`` of shape (n,) (one rule
    at every threshold) or (thresholds, n). Vickers & Elkin 2006."""
    y = np.asarray(y, dtype=float)
    pos = np.broadcast_to(np.asarray(positive, dtype=float), (len(thresholds), len(y)))
    n = len(y)
    tp = pos @ y / n
    fp = pos @ (1.0 - y) / n
    return tp - fp * thresholds / (1.0 - thresholds), tp, fp


def net_benefit_risk(y: np.ndarray, risk: np.ndarray,
                     thresholds: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``net_benefit_counts`` of the rules "treat when risk >= p_t" at every threshold, from
    the sorted risks of the events and of the others (no thresholds x n matrix: counting the
    risks at or above p_t is ``len - searchsorted(sorted, p_t, 'left')``)."""
    y = np.asarray(y, dtype=float) > 0
    risk = np.asarray(risk, dtype=float)
    n = len(y)
    ev, non = np.sort(risk[y]), np.sort(risk[~y])
    tp = (ev.size - np.searchsorted(ev, thresholds, side="left")) / n
    fp = (non.size - np.searchsorted(non, thresholds, side="left")) / n
    return tp - fp * thresholds / (1.0 - thresholds), tp, fp


def km_survival(time: np.ndarray, event: np.ndarray, horizon: float,
                entry: np.ndarray | None = None) -> float:
    """Kaplan-Meier estimate of S(horizon): the product over event times u <= horizon of
    1 - d_u / n_u, with n_u the rows at risk (entry < u <= time). 1 before the first event."""
    t = np.asarray(time, dtype=float)
    e = np.asarray(event, dtype=float) > 0
    if t.size == 0:
        return float("nan")
    u, d = np.unique(t[e & (t <= horizon)], return_counts=True)
    if u.size == 0:
        return 1.0
    exited = np.searchsorted(np.sort(t), u, side="left")  # rows with time < u
    if entry is None:
        entered = np.full(u.size, t.size)
    else:
        entered = np.searchsorted(np.sort(np.asarray(entry, dtype=float)), u, side="left")
    at_risk = entered - exited
    return float(np.prod(1.0 - d / at_risk))


def net_benefit_km(time: np.ndarray, event: np.ndarray, entry: np.ndarray | None,
                   positive: np.ndarray, horizon: float,
                   thresholds: np.ndarray, risk: np.ndarray | None = None,
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Survival outcome at ``horizon``: (NB, (1 - S+) P+, S+ P+) per threshold (Vickers et al.
    2008), ``positive`` of shape (n,) or (thresholds, n); with ``risk`` (n,), the rules "treat
    when risk >= p_t" instead (``positive`` is then ignored; one row mask at a time). A rule
    treating nobody has NB 0."""
    pos = np.broadcast_to(np.asarray(positive, dtype=bool), (len(thresholds), len(time)))
    tp = np.zeros(len(thresholds))
    fp = np.zeros(len(thresholds))
    cache: dict[bytes, tuple[float, float]] = {}
    for g in range(len(thresholds)):
        mask = pos[g] if risk is None else risk >= thresholds[g]
        share = float(mask.mean())
        if share == 0:
            continue
        key = np.packbits(mask).tobytes()
        if key not in cache:
            s = km_survival(time[mask], event[mask], horizon,
                            None if entry is None else entry[mask])
            cache[key] = ((1.0 - s) * share, s * share)
        tp[g], fp[g] = cache[key]
    return tp - fp * thresholds / (1.0 - thresholds), tp, fp


def legacy_rules(term: GroupedTerm, x: np.ndarray) -> list[tuple[str, np.ndarray]]:
    """Rules that treat exposure beyond the legacy cut(s), on the side away from the reference
    group: one for the reference group's complement, and one per cut when there are several."""
    codes = term.codes(x)
    ref, cuts, v = term.reference, term.cuts, term.variable
    low, high = ("<", ">=") if term.closed == "left" else ("<=", ">")

    def side(j: int) -> tuple[str, np.ndarray]:
        if ref <= j:
            return f"{v} {high} {cuts[j]:g}", codes > j
        return f"{v} {low} {cuts[j]:g}", codes <= j

    parts = [side(j) for j in (ref - 1, ref) if 0 <= j < len(cuts)]
    rules = [("legacy: " + " or ".join(p[0] for p in parts), codes != ref)]
    if len(cuts) > 1:
        rules += [(f"legacy: {name}", mask) for name, mask in map(side, range(len(cuts)))
                  if not np.array_equal(mask, rules[0][1])]
    return rules


NB_COLUMNS = ["rule", "rule_type", "model", "adjustment", "threshold", "net_benefit", "treated",
              "true_positive", "false_positive", "risk_scale", "horizon", "method", "n", "status",
              "reason", "note", "caution"]


def net_benefit_table(r: Refit, spec: Spec) -> pd.DataFrame:
    """Decision curves (module docstring)."""
    d = decision_models(r, spec)
    base: dict[str, Any] = {"risk_scale": d.scale.label, "horizon": d.scale.horizon,
                            "n": len(r.x)}
    if r.family not in EVENT_FAMILIES:
        return _finish([{**base, "status": "skipped", "reason":
                         f"net benefit needs the probability of an event (binary or survival "
                         f"outcome); a {r.family} outcome has none ({d.scale.label})"}],
                       NB_COLUMNS)
    if d.reason:
        return _finish([{**base, "status": "skipped", "reason": d.reason}], NB_COLUMNS)
    pt = NB_GRID
    o = r.outcome
    held = ""
    y = np.asarray(o.y, dtype=float)
    if r.family == "binary":
        method = "events/n"

        def nb(positive: np.ndarray, risk: np.ndarray | None = None,
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
            if risk is not None:
                return net_benefit_risk(y, risk, pt)
            return net_benefit_counts(y, positive, pt)
    else:
        assert o.time is not None and d.scale.horizon is not None
        method = f"Kaplan-Meier at {d.scale.horizon:g}"
        h = d.scale.horizon
        time, entry = np.asarray(o.time, dtype=float), o.entry
        if h > time.max():
            held = (f"the horizon {h:g} is past the longest follow-up ({time.max():g}): "
                    "Kaplan-Meier held at its last value")

        def nb(positive: np.ndarray, risk: np.ndarray | None = None,
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
            return net_benefit_km(time, y, entry, positive, h, pt, risk)

    # (rule, kind, model, adjustment, who is treated: a row mask, or the risk of each row for
    # the rules "treat when risk >= p_t" at every p_t, note)
    rules: list[tuple[str, str, str, str, np.ndarray, np.ndarray | None, str]] = [
        ("treat all", "reference", "", "", np.ones(len(y), dtype=bool), None, held),
        ("treat none", "reference", "", "", np.zeros(len(y), dtype=bool), None, "")]
    rules += [(name, "legacy", "", "", mask, None, held)
              for name, mask in legacy_rules(r.legacy, r.x)]
    fits = ([d.legacy] if d.legacy is not None else []) + list(d.curves)
    none = np.zeros(len(y), dtype=bool)
    for rf in fits:
        note = " | ".join(v for v in (APPARENT, rf.note, held) if v)
        rules.append((f"risk: {rf.model}", "model", rf.model, rf.adjustment, none,
                      np.asarray(rf.risk, dtype=float), note))
    rows: list[dict[str, Any]] = []
    for model, adjustment, message in d.failed:
        rows.append({**base, "rule": f"risk: {model}", "rule_type": "model", "model": model,
                     "adjustment": adjustment, "method": method, "status": "failed",
                     "reason": message})
    parts = [_finish(rows, NB_COLUMNS)] if rows else []
    for name, kind, model, adjustment, positive, risk, note in rules:
        value, tp, fp = nb(positive, risk)
        if risk is None:
            treated = positive.mean() * np.ones(len(pt))
        else:
            srt = np.sort(risk)
            treated = (srt.size - np.searchsorted(srt, pt, side="left")) / srt.size
        part = pd.DataFrame({**base, "rule": name, "rule_type": kind, "model": model,
                             "adjustment": adjustment, "threshold": pt, "net_benefit": value,
                             "treated": treated, "true_positive": tp, "false_positive": fp,
                             "method": method, "status": "ok", "reason": "", "note": note})
        parts.append(_finish(part, NB_COLUMNS))
    return pd.concat(parts, ignore_index=True)


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
