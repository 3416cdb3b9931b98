"""Residual confounding: the exposure's effect crude, adjusted with the legacy grouped
confounders, and adjusted with continuous confounders, per exposure coding, with the share of the
confounding that the grouped adjustment leaves — on the table's primary marginal (standardised)
scale, or on the model scale for tables without marginal rows.

Row selection (``select_confounding``: the table to effects on the drawn scale), drawing
(``draw_panel``) and alt text (``confounding_alt``); ``draw`` joins them."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .base import Context, Drawn, finite, per_analysis
from .parts import effect_text, row_axis
from .style import (
    LEGACY,
    NEUTRAL,
    SPLINE,
    clipped_span,
    effect_axis,
    effect_label,
    is_ratio,
    new_figure,
    title,
)

# The normal distribution's 97.5th percentile, as ``refit.contrasts.Z95`` computes it (kept here
# so that drawing figures does not import the model code and scipy).
Z95 = 1.959963984540054

FORM_TITLES = {"linear": "exposure linear", "legacy": "exposure in legacy groups"}
Row = tuple[str, tuple[float, float, float], str]   # label, (effect, lower, upper), colour


@dataclass(frozen=True)
class Panel:
    form: str
    contrast: str
    rows: list[Row]          # effects on the drawn scale (ratios exponentiated)
    share: str               # the share left, in words

    @property
    def name(self) -> str:
        return FORM_TITLES.get(self.form, self.form)


@dataclass(frozen=True)
class ConfoundingRows:
    scale: str
    marginal: bool
    panels: list[Panel]
    largest: str             # the grouping that leaves the most ('' when not known)


def share_text(r: pd.Series) -> str:
    clear = r.get("confounding_clear")
    if clear is pd.NA or clear is None or not bool(clear) or not finite(r.get("share_left")):
        return "confounding not clearly ≠ 0: share not estimable"
    lo, hi = r.get("share_left_lower"), r.get("share_left_upper")
    ci = f" ({float(lo):.0%} to {float(hi):.0%})" if finite(lo) and finite(hi) else ""
    return f"share left by the grouped adjustment: {float(r['share_left']):.0%}{ci}"


def limits(r: pd.Series, what: str) -> tuple[float, float, float]:
    """(estimate, lower, upper) of one adjustment from the table (older tables without limits:
    the Wald interval from the standard error)."""
    est = float(r[f"estimate_{what}"])
    if f"lower_{what}" in r:
        return est, float(r[f"lower_{what}"]), float(r[f"upper_{what}"])
    se = float(r[f"se_{what}"])
    return est, est - Z95 * se, est + Z95 * se


def panel_rows(g: pd.DataFrame, ratio: bool) -> list[Row]:
    """(label, (effect, lower, upper), colour) from crude to continuous, one row per grouped
    confounder when there are several; ratios on the ratio scale."""
    tr = math.exp if ratio else (lambda v: v)
    allrow = g[g["scope"] == "all"]
    base = allrow.iloc[0] if len(allrow) else g.iloc[0]
    out = [("crude", limits(base, "crude"), NEUTRAL),
           ("grouped confounders", limits(base, "grouped"), LEGACY)]
    single = g[g["scope"] != "all"]
    if len(single) > 1:
        for _, r in single.iterrows():
            out.append((f"only {r['scope']} grouped", limits(r, "grouped"), LEGACY))
    out.append(("continuous confounders", limits(base, "continuous"), SPLINE))
    return [(lab, (tr(e), tr(lo), tr(hi)), colour) for lab, (e, lo, hi), colour in out]


def select_confounding(df: pd.DataFrame) -> ConfoundingRows | None:
    """The rows to draw: status ok, finite, the primary marginal contrast when the table has one
    (else the conditional, model-scale rows), one panel per exposure coding."""
    if df.empty or "exposure_form" not in df:
        return None
    if "status" in df:
        df = df[df["status"] == "ok"]
    df = df[np.isfinite(df["estimate_crude"].astype(float))]
    marginal = "primary" in df and bool(df["primary"].fillna(False).astype(bool).any())
    if marginal:  # the standardised contrast the table reads its share from
        df = df[df["primary"].fillna(False).astype(bool)]
    elif "scale_kind" in df:
        df = df[df["scale_kind"] == "conditional"]
    if df.empty:
        return None
    scale = str(df["scale"].iloc[0])
    forms = [f for f in ("linear", "legacy") if (df["exposure_form"] == f).any()]
    forms += [f for f in df["exposure_form"].unique() if f not in forms]
    panels = []
    for form in forms:
        g = df[df["exposure_form"] == form]
        allrow = g[g["scope"] == "all"]
        panels.append(Panel(form, str(g["contrast"].iloc[0]), panel_rows(g, is_ratio(scale)),
                            share_text(allrow.iloc[0] if len(allrow) else g.iloc[0])))
    largest = df[df["largest"].fillna(False).astype(bool)] if "largest" in df else df.iloc[:0]
    return ConfoundingRows(scale, marginal, panels,
                           str(largest["scope"].iloc[0]) if len(largest) else "")


def axis_label(sel: ConfoundingRows, outcome: str, risk: str) -> str:
    """The effect axis: the scale by name (standardised on the risk by the horizon when
    marginal), log scale said for ratios."""
    name = effect_label(sel.scale, outcome)
    if not sel.marginal:
        return name
    name = "Standardised " + name[0].lower() + name[1:]
    return name + (f"\n({risk[0].lower() + risk[1:]})" if is_ratio(sel.scale) or
                   "risk" in sel.scale else "")


def draw_panel(ax: Any, panel: Panel, scale: str, ylabels: bool) -> None:
    """One exposure coding: a dot and interval per adjustment, crude at the top."""
    ys = np.arange(len(panel.rows))[::-1]
    for y, (_label, (e, lo, hi), colour) in zip(ys, panel.rows, strict=True):
        ax.plot([lo, hi], [y, y], color=colour, lw=1.6, zorder=3)
        ax.plot([e], [y], marker="o", ms=7, color=colour, ls="none", zorder=4)
    span = clipped_span([r[1][0] for r in panel.rows],
                        [b for r in panel.rows for b in r[1][1:]], scale)
    effect_axis(ax, scale, *span, axis="x")
    row_axis(ax, len(panel.rows), [r[0] for r in panel.rows])
    if not ylabels:
        ax.tick_params(axis="y", labelleft=False)
    ax.set_title(f"{panel.name}: {panel.contrast}", loc="left")


def confounding_alt(sel: ConfoundingRows) -> str:
    """The alt text: per coding, crude, grouped and continuous effects and the share left."""
    parts = [f"{p.name} ({p.contrast}): crude {effect_text(p.rows[0][1][0], sel.scale, 3)}, "
             f"with grouped confounders {effect_text(p.rows[1][1][0], sel.scale, 3)}, with "
             f"continuous confounders {effect_text(p.rows[-1][1][0], sel.scale, 3)}; {p.share}"
             for p in sel.panels]
    most = f" The grouping that leaves the most: {sel.largest}." if sel.largest else ""
    return (f"Dot-and-interval chart of the exposure's {'standardised ' if sel.marginal else ''}"
            f"{sel.scale} per exposure coding, rows from crude to adjusted with continuous "
            "confounders. " + "; ".join(parts) + "." + most)


def _footnote(sel: ConfoundingRows) -> str:
    if sel.marginal:
        return (f"Points: the exposure's standardised {sel.scale} (each row's exposure set to "
                "each value, predictions averaged), 95% bootstrap intervals;\nrows from no "
                "adjustment (top) to continuous confounders (bottom). Share left = (grouped − "
                "continuous) / (crude − continuous) on this scale.")
    return (f"Points: the exposure's effect ({sel.scale}) with 95% Wald intervals, from no "
            "adjustment (top) to adjustment with continuous confounders (bottom).\n"
            "Share left = (grouped − continuous) / (crude − continuous) on the model "
            "scale, with its bootstrap interval.")


@per_analysis("confounding", select_confounding)
def draw(ctx: Context, sel: ConfoundingRows, cohort: str, analysis: str) -> Drawn | None:
    nrows = max(len(p.rows) for p in sel.panels)
    fig_, fig = new_figure(4.4 * len(sel.panels) + 1.4, 2.2 + 0.42 * nrows, _footnote(sel))
    same_rows = len({tuple(r[0] for r in p.rows) for p in sel.panels}) == 1
    axes = fig.subplots(1, len(sel.panels), squeeze=False)[0]
    label = axis_label(sel, ctx.outcome_label(analysis), ctx.risk_label(analysis))
    for i, (ax, panel) in enumerate(zip(axes, sel.panels, strict=True)):
        draw_panel(ax, panel, sel.scale, ylabels=i == 0 or not same_rows)
        ax.set_xlabel(f"{label}\n{panel.share}", fontsize=8)
    head = f"{analysis}: confounding left by grouped adjustment"
    title(fig, head + ctx.suffix(cohort))
    most = f" The grouping that leaves the most: {sel.largest}." if sel.largest else ""
    caption = ("If the grouped adjustment removed all confounding, its point would sit on the "
               "continuous one; the gap is confounding the legacy analysis left in its estimate."
               + most)
    return Drawn(fig_, head, confounding_alt(sel), caption)
