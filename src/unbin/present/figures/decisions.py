"""Decisions on predicted risk: the exposure value at which each model's predicted risk crosses a
threshold, per level of the effect modifier and for patients whose other risk factors sit low,
middle or high (implied thresholds); and decision curves (net benefit over threshold
probabilities) of the legacy rules beside the risk rules.

Row selection (``select_thresholds``, ``middle_crossings``, ``select_net_benefit``,
``differing_range``), drawing (``draw_threshold_panel``, ``draw_rules``) and alt texts
(``thresholds_alt``, ``net_benefit_alt``); the ``draw_*`` kinds join them."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.lines import Line2D
from matplotlib.ticker import FuncFormatter

from .base import Context, Drawn, per_analysis
from .parts import row_axis, value_ticks
from .style import (
    FORM_COLOURS,
    FORM_LINES,
    FORM_MARKERS,
    GRID,
    INK,
    LEGACY,
    MUTED,
    NEUTRAL,
    fmt_number,
    new_figure,
    title,
)

MODEL_ORDER = ("spline", "fp", "linear", "legacy")
QUANTILE_MARKERS = {0.1: ("o", "white"), 0.5: ("o", None), 0.9: ("s", None)}
LEGACY_DASHES = ("-", (0, (5, 2)), (0, (1.5, 1.5)), (0, (6, 2, 1.5, 2)))
LEGACY_MARKERS = ("s", "v", "<", ">")
# Decision curves are drawn where the risk rules differ by more than this share of the largest
# net benefit (smaller differences do not show at the figure's scale) and one of them is useful.
VISIBLE_SHARE = 0.05
CAUTION = ("unbin supports statistical re-analysis; decisions follow local clinical guidelines "
           "and licensed practice.")


def _model_colour(model: str) -> str:
    return FORM_COLOURS.get(model.split(" x ")[0], NEUTRAL)


def _model_rank(model: str) -> tuple[int, int]:
    base = model.split(" x ")[0]
    return (MODEL_ORDER.index(base) if base in MODEL_ORDER else len(MODEL_ORDER),
            0 if " x " in model else 1)


def probability_scale(risk_label: str) -> bool:
    """Whether the analysis' risk is a probability (binary, survival) and reads as a percent."""
    return risk_label.startswith("Risk of")


def threshold_text(thr: float, percent: bool) -> str:
    """A threshold as its axis reads it: a probability in percent (0.07 -> '7%', 0.025 ->
    '2.5%'), any other risk as a plain number."""
    if not percent:
        return f"{thr:g}"
    return f"{thr:.0%}" if abs(thr * 100 - round(thr * 100)) < 1e-9 else f"{thr:.1%}"


# --------------------------------------------------------------------------- implied thresholds


@dataclass(frozen=True)
class ThresholdRows:
    rows: pd.DataFrame                 # status ok, level filled with 'all'
    thresholds: list[float]
    lines: list[tuple[str, str]]       # (model, level), top row first
    by: str | None
    x_range: tuple[float, float]

    def label(self, line: tuple[str, str]) -> str:
        return line[0] + (f" · {self.by} {line[1]}" if line[1] != "all" else "")


def select_thresholds(df: pd.DataFrame) -> ThresholdRows | None:
    """The thresholds table's rows for one analysis with status ok; None without any."""
    if df.empty or "status" not in df:
        return None
    df = df[df["status"] == "ok"]
    if df.empty:
        return None
    df = df.assign(level=df["level"].fillna("all").astype(str))
    lines = sorted({(str(m), str(lv)) for m, lv in zip(df["model"], df["level"], strict=True)},
                   key=lambda r: (_model_rank(r[0]), r[1]))
    by = str(df["by"].dropna().iloc[0]) if df["by"].notna().any() else None
    return ThresholdRows(df.reset_index(drop=True), sorted(df["threshold"].dropna().unique()),
                         lines, by, (float(df["range_lower"].min()),
                                     float(df["range_upper"].max())))


def middle_crossings(sel: ThresholdRows) -> list[tuple[float, str, str, list[float]]]:
    """(threshold, model, level, exposure values) where the curve at the middle risk profile
    (the rest of the risk score at its median) crosses each threshold."""
    rows = sel.rows
    mid = rows[(rows["position"] == "crossing")
               & np.isclose(rows["profile_quantile"].astype(float), 0.5)].dropna(
        subset=["exposure_value"])
    # The rows of each (threshold, model, level), in table order.
    groups = mid.groupby(["threshold", "model", "level"], sort=False).indices
    out = []
    for thr in sel.thresholds:
        for model, level in sel.lines:
            pos = groups.get((thr, model, level))
            if pos is not None:
                out.append((float(thr), model, level,
                            [float(v) for v in mid["exposure_value"].iloc[pos]]))
    return out


def draw_threshold_panel(ax: Any, sel: ThresholdRows, thr: float, cuts: list[float]) -> None:
    """One threshold: per (model, level) row the crossings at the three risk profiles, joined
    when they belong to one crossing; 'above'/'below' when the curve never crosses."""
    t = sel.rows[sel.rows["threshold"] == thr]
    # The rows of each (model, level), in table order.
    groups = t.groupby(["model", "level"], sort=False).indices
    for c in cuts:
        ax.axvline(c, color=LEGACY, lw=1.6, zorder=1)
    for y, (model, level) in zip(range(len(sel.lines))[::-1], sel.lines, strict=True):
        r = t.iloc[groups.get((model, level), [])]
        colour = _model_colour(model)
        cross = r[r["position"] == "crossing"].dropna(subset=["exposure_value"])
        for _, g in cross.groupby("crossing"):
            g = g.sort_values("profile_quantile")
            ax.plot(g["exposure_value"], [y] * len(g), color=colour, lw=1.2, zorder=2,
                    ls="--" if " x " in model else "-")
        for q, (marker, face) in QUANTILE_MARKERS.items():
            pts = cross[np.isclose(cross["profile_quantile"].astype(float), q)]
            ax.plot(pts["exposure_value"], [y] * len(pts), ls="none", marker=marker, ms=6,
                    color=colour, mfc=face or colour, mew=1.2, zorder=3)
        if cross.empty and len(r):
            where = ", ".join(sorted({str(p).replace("always ", "") for p in r["position"]}))
            ax.text(0.99, y, where, transform=ax.get_yaxis_transform(), ha="right",
                    va="center", fontsize=7.5, color=MUTED)
    ax.set_xlim(*sel.x_range)
    value_ticks(ax.xaxis)
    row_axis(ax, len(sel.lines), [""] * len(sel.lines))


def thresholds_alt(sel: ThresholdRows, exposure: str, cuts: list[float], unit: str,
                   risk: str) -> str:
    percent = probability_scale(risk)
    parts = [f"threshold {threshold_text(thr, percent)}, {model}"
             + (f" ({sel.by} {level})" if level != "all" else "") + ": "
             + ", ".join(fmt_number(v) for v in values)
             for thr, model, level, values in middle_crossings(sel)]
    return (f"Dot chart, one panel per threshold on the {risk[0].lower() + risk[1:]}, one row per "
            "model" + (f" and level of {sel.by}" if sel.by else "") + f"; x axis {exposure}, "
            f"legacy cut(s) at {', '.join(fmt_number(c) for c in cuts) or 'none'}{unit}. "
            "Crossing at the middle risk profile: " + ("; ".join(parts) or "none") + ".")


@per_analysis("thresholds", select_thresholds)
def draw_thresholds(ctx: Context, sel: ThresholdRows, cohort: str, analysis: str) -> Drawn | None:
    ex = ctx.exposure(analysis)
    risk = ctx.risk_label(analysis)
    cuts = ctx.legacy_cuts(cohort, analysis)
    footnote = (f"Each mark: the exposure value where the model's predicted "
                f"{risk[0].lower() + risk[1:]} reaches the threshold, with the rest of the risk "
                "score at its 10th (open circle), 50th (dot) or 90th (square) percentile among "
                "the level's rows; a non-monotone curve can cross more than once. Ember lines: "
                "the legacy cuts. Rows marked 'above'/'below' never cross inside the observed "
                f"range.\n{CAUTION}")
    fig_, fig = new_figure(4.2 * len(sel.thresholds) + 2.2, 2.0 + 0.36 * len(sel.lines),
                           footnote)
    axes = fig.subplots(1, len(sel.thresholds), squeeze=False)[0]
    for ax, thr in zip(axes, sel.thresholds, strict=True):
        draw_threshold_panel(ax, sel, thr, cuts)
        ax.set_title(f"{risk} reaches {threshold_text(thr, probability_scale(risk))}",
                     loc="left", fontsize=8.5)
        ax.set_xlabel(ex.label)
    axes[0].set_yticks(list(range(len(sel.lines)))[::-1], [sel.label(r) for r in sel.lines])
    handles = [Line2D([], [], ls="none", marker=m, ms=6, color=INK, mfc=f or INK)
               for m, f in QUANTILE_MARKERS.values()]
    fig.legend(handles, ["rest of risk low (10th)", "middle (50th)", "high (90th)"],
               loc="outside lower left", ncols=3)
    head = f"{analysis}: the {ex.name} value at which predicted risk crosses each threshold"
    title(fig, head + ctx.suffix(cohort))
    caption = ("A single legacy cut applies to everyone; the value at which predicted risk "
               "reaches a threshold moves with the patient's other risk factors and, with an "
               "effect modifier, between its levels. For re-analysis only, not for care.")
    return Drawn(fig_, head, thresholds_alt(sel, ex.label, cuts, ex.unit, risk), caption)


# --------------------------------------------------------------------------- decision curves


@dataclass(frozen=True)
class Rule:
    name: str
    kind: str                # 'reference', 'legacy' or 'model'
    model: str
    curve: pd.DataFrame      # threshold, net_benefit, sorted by threshold


@dataclass(frozen=True)
class NetBenefitRows:
    rows: pd.DataFrame
    rules: list[Rule]        # treat none left out (it is the zero line)
    x_range: tuple[float, float]
    differing: bool          # the range is where the risk rules differ (else: where useful)
    note: str


def differing_range(df: pd.DataFrame, marks: list[float]) -> tuple[tuple[float, float], bool]:
    """The threshold range to draw: where the risk rules' net benefits differ by more than
    ``VISIBLE_SHARE`` of the largest net benefit and one of them is above that share, widened
    to the study's decision thresholds ``marks`` and by one grid step on each side. Without such
    thresholds, where any risk rule beats treating no one; without that, the whole grid. The
    flag says whether the first rule applied."""
    grid = np.sort(df["threshold"].astype(float).unique())
    step = float(np.min(np.diff(grid))) if grid.size > 1 else 0.01
    model = df[df["rule_type"] == "model"]
    nb = model.pivot_table(index="threshold", columns="rule", values="net_benefit")
    differing = False
    if nb.shape[1] >= 2:
        tol = VISIBLE_SHARE * max(float(np.nanmax(nb.to_numpy())), 0.0)
        wide = nb.max(axis=1) - nb.min(axis=1)
        keep = nb.index[(wide > tol) & (nb.max(axis=1) > tol)]
        differing = len(keep) > 0 and tol > 0
    else:
        keep = nb.index[:0]
    if not differing:
        keep = nb.index[nb.max(axis=1) > 0] if nb.shape[1] else nb.index
    pts = [*map(float, keep), *marks] or [float(grid[0]), float(grid[-1])]
    lo = max(float(grid[0]) - step, min(pts) - step, 0.0)
    hi = min(float(grid[-1]) + step, max(pts) + step, 1.0)
    return (lo, hi), differing


def select_net_benefit(df: pd.DataFrame, marks: list[float]) -> NetBenefitRows | None:
    """The net_benefit rows of one analysis with status ok, one curve per rule, and the range
    to draw."""
    if df.empty or "status" not in df:
        return None
    df = df[(df["status"] == "ok") & df["net_benefit"].notna()]
    if df.empty:
        return None
    rules = [Rule(str(rule), str(g["rule_type"].iloc[0]), str(g["model"].iloc[0] or ""),
                  g.sort_values("threshold")[["threshold", "net_benefit"]].reset_index(drop=True))
             for rule, g in df.groupby("rule", sort=False)
             if not (str(g["rule_type"].iloc[0]) == "reference" and "none" in str(rule))]
    notes = df["note"].dropna().astype(str) if "note" in df else pd.Series(dtype=str)
    note = next((n for n in notes if n), "Apparent: evaluated on the rows the models were "
                                         "fitted to.")
    note = note[0].upper() + note[1:] + ("" if note.endswith(".") else ".")
    x_range, differing = differing_range(df, marks)
    return NetBenefitRows(df.reset_index(drop=True), rules, x_range, differing, note)


def rule_style(rule: Rule, n_legacy: int) -> dict[str, Any]:
    """Colour, line style and marker of one rule: forms apart by all three."""
    if rule.kind == "reference":
        return {"color": NEUTRAL, "lw": 1.2, "ls": "-", "marker": "X"}
    if rule.kind == "legacy":
        return {"color": LEGACY, "lw": 2.2, "ls": LEGACY_DASHES[n_legacy % len(LEGACY_DASHES)],
                "marker": LEGACY_MARKERS[n_legacy % len(LEGACY_MARKERS)]}
    base = rule.model.split(" x ")[0]
    ls: Any = "--" if " x " in rule.model else FORM_LINES.get(base, "-")
    if base == "legacy":
        ls = (0, (6, 1.5, 1.5, 1.5))
    return {"color": _model_colour(rule.model), "lw": 1.8, "ls": ls,
            "marker": FORM_MARKERS.get(base, "o"), "mfc": "white" if " x " in rule.model else None}


def draw_rules(ax: Any, sel: NetBenefitRows) -> list[Line2D]:
    """Every rule's curve over the drawn range, a few markers on each (staggered so that
    curves lying on each other still show theirs)."""
    lo, hi = sel.x_range
    lines, n_legacy = [], 0
    for i, rule in enumerate(sel.rules):
        style = rule_style(rule, n_legacy)
        n_legacy += rule.kind == "legacy"
        c = rule.curve[(rule.curve["threshold"] >= lo) & (rule.curve["threshold"] <= hi)]
        every = max(1, len(c) // 5)
        (line,) = ax.plot(c["threshold"], c["net_benefit"], zorder=3, color=style["color"],
                          lw=style["lw"], ls=style["ls"], marker=style["marker"], ms=5,
                          mfc=style.get("mfc") or style["color"], mec=style["color"],
                          markevery=(i % every, every))
        lines.append(line)
    return lines


def net_benefit_alt(sel: NetBenefitRows, marks: list[float], risk: str) -> str:
    parts = []
    for t in marks:
        at = sel.rows[np.isclose(sel.rows["threshold"].astype(float), t)]
        if len(at):
            parts.append(f"at {t:.0%}: " + ", ".join(
                f"{r.rule} {r.net_benefit:.3f}" for r in at.itertuples()))
    lo, hi = sel.x_range
    return (f"Decision curves: net benefit against the threshold {risk[0].lower() + risk[1:]} "
            f"from {lo:.0%} to {hi:.0%} for treat all, treat none, the legacy rule(s) and the "
            "risk rules. " + "; ".join(parts) + ".")


def draw_net_benefit(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    assert cohort is not None and analysis is not None
    own = ctx.spec.analysis(analysis).risk_thresholds
    marks = [float(t) for t in (own if own is not None else ctx.spec.risk_thresholds)]
    sel = select_net_benefit(ctx.rows("net_benefit", cohort, analysis), marks)
    if sel is None:
        return None
    risk = ctx.risk_label(analysis)
    lo, hi = sel.x_range
    rule = (f"Drawn from {lo:.0%} to {hi:.0%}: where the risk rules' net benefits differ by "
            f"more than {VISIBLE_SHARE:.0%} of the largest, and the study's thresholds; outside "
            "it they coincide." if sel.differing else
            f"Drawn from {lo:.0%} to {hi:.0%}: where a risk rule beats treating no one.")
    fig_, fig = new_figure(9.0, 5.2, (
        "Net benefit = true positives/n − false positives/n × pt/(1 − pt) at threshold pt (per "
        "patient). Risk rules treat when the model's predicted risk is at least pt; legacy rules "
        f"treat the groups away from the reference. {sel.note} {rule}\n{CAUTION}"))
    ax = fig.subplots()
    ax.axhline(0, color=INK, lw=0.9, zorder=1)
    for t in marks:
        ax.axvline(t, color=GRID, lw=1.4, zorder=0)
    lines = draw_rules(ax, sel)
    shown = sel.rows[(sel.rows["threshold"] >= lo) & (sel.rows["threshold"] <= hi)]
    top = float(shown["net_benefit"].max())
    ax.set_xlim(lo, hi)
    ax.set_ylim(-0.15 * top if top > 0 else -0.05, top * 1.1 if top > 0 else 0.05)
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:.0%}"))
    ax.set_xlabel(f"Threshold: {risk[0].lower() + risk[1:]} at which to treat")
    ax.set_ylabel("Net benefit (per patient)")
    fig.legend([*lines, Line2D([], [], color=INK, lw=0.9)],
               [*(r.name for r in sel.rules), "treat none"], loc="outside lower left", ncols=3)
    head = f"{analysis}: net benefit of the legacy rule and of risk rules"
    title(fig, head + ctx.suffix(cohort))
    caption = ("Where a risk rule's curve lies above the legacy rule's, using the model's "
               "predicted risk would have classified these patients better at that threshold. "
               "For re-analysis only, not for care.")
    return Drawn(fig_, head, net_benefit_alt(sel, marks, risk), caption)
