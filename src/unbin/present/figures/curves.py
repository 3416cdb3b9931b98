"""The exposure's effect curve beside the legacy step function: one panel per continuous form
(spline, fractional polynomial, linear), each over the same legacy steps, on a shared effect
axis (log scale for ratios), with the exposure's binned distribution as a rug underneath."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import FuncFormatter, MaxNLocator

from .base import Context, Drawn
from .style import (
    BAND_ALPHA,
    FORM_COLOURS,
    FORM_LINES,
    FORM_NAMES,
    INK,
    LEGACY,
    LEGACY_HATCH,
    RUG,
    clipped_span,
    effect_axis,
    effect_label,
    fmt_number,
    fmt_ratio,
    is_ratio,
    new_figure,
    title,
)

PANEL_FORMS = ("spline", "fp", "linear")
ADJUSTMENT_ORDER = ("legacy", "continuous", "none")
ADJUSTMENT_TEXT = {"legacy": "adjusted as in the legacy analysis (grouped covariates)",
                   "continuous": "adjusted with continuous covariates",
                   "none": "unadjusted"}


def pick_adjustment(curves: pd.DataFrame) -> str | None:
    """The adjustment coding to draw: the legacy one (so only the exposure's coding differs from
    the legacy analysis), else the first with a continuous form."""
    for adj in ADJUSTMENT_ORDER:
        c = curves[curves["adjustment"] == adj]
        if c["form"].isin(PANEL_FORMS).any():
            return adj
    return None


def legacy_steps(legacy: pd.DataFrame, cuts: list[float]) -> list[dict[str, float]]:
    """The legacy step function as segments (x0, x1, effect, lower, upper) over the grid; a step
    changes at the legacy cut that lies between two grid points (midway when none is known)."""
    legacy = legacy.sort_values("x")
    xs = legacy["x"].to_numpy(float)
    if xs.size == 0:
        return []
    eff = legacy["effect"].to_numpy(float)
    lo = legacy["effect_lower"].to_numpy(float)
    hi = legacy["effect_upper"].to_numpy(float)
    change = np.flatnonzero(~np.isclose(eff[1:], eff[:-1], rtol=1e-9, atol=1e-12))
    bounds = [float(xs[0])]
    for i in change:
        inside = [c for c in cuts if xs[i] < c <= xs[i + 1]]
        bounds.append(inside[0] if inside else float((xs[i] + xs[i + 1]) / 2))
    bounds.append(float(xs[-1]))
    starts = [0, *(int(i) + 1 for i in change)]
    return [{"x0": bounds[j], "x1": bounds[j + 1], "effect": float(eff[s]),
             "lower": float(lo[s]), "upper": float(hi[s])} for j, s in enumerate(starts)]


def draw_rug(ax: Any, density: pd.DataFrame, xlim: tuple[float, float]) -> int:
    """Bars of the exposure's binned counts; suppressed bins (small counts) are not drawn.
    Returns the number of bins hidden."""
    hidden = 0
    if len(density):
        sup = density["suppressed"].fillna(False).astype(bool).to_numpy()
        counts = pd.to_numeric(density["count"], errors="coerce").to_numpy(float)
        show = ~sup & np.isfinite(counts) & (counts > 0)
        hidden = int(sup.sum())
        left = density["bin_left"].to_numpy(float)[show]
        width = (density["bin_right"].to_numpy(float) - density["bin_left"].to_numpy(float))[show]
        ax.bar(left, counts[show], width=width, align="edge", color=RUG, lw=0)
    ax.set_xlim(*xlim)
    ax.set_yticks([])
    ax.grid(False)
    ax.spines["left"].set_visible(False)
    return hidden


def _describe_curve(c: pd.DataFrame, scale: str, unit: str) -> str:
    ratio = is_ratio(scale)
    f = fmt_ratio if ratio else (lambda v: fmt_number(v, 2))
    xs, e = c["x"].to_numpy(float), c["effect"].to_numpy(float)
    lo_i, hi_i = int(np.nanargmin(e)), int(np.nanargmax(e))
    return (f"from {f(e[0])} at {fmt_number(xs[0])}{unit} to {f(e[-1])} at {fmt_number(xs[-1])}"
            f"{unit}, lowest {f(e[lo_i])} at {fmt_number(xs[lo_i])}, highest {f(e[hi_i])} at "
            f"{fmt_number(xs[hi_i])}")


def draw(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    assert cohort is not None and analysis is not None
    cur = ctx.rows("curves", cohort, analysis)
    if "status" in cur:
        cur = cur[cur["status"] == "ok"]
    cur = cur[np.isfinite(cur["effect"].astype(float))]
    if "in_range" in cur:
        # On a grid common to several cohorts, draw only this cohort's own 1st-99th percentiles.
        cur = cur[cur["in_range"].fillna(True).astype(bool)]
    if cur.empty:
        return None
    adj = pick_adjustment(cur)
    if adj is None:
        return None
    c = cur[cur["adjustment"] == adj]
    forms = [f for f in PANEL_FORMS if (c["form"] == f).any()]
    legacy = c[c["form"] == "legacy"]
    scale = str(c["scale"].iloc[0])
    x_ref = float(c["x_reference"].iloc[0])
    a = ctx.spec.analysis(analysis)
    info = ctx.spec.variables.get(a.exposure)
    unit = f" {info.unit}" if info and info.unit else ""
    xlabel = ctx.spec.label(a.exposure)
    short = info.label if info and info.label else a.exposure
    steps = legacy_steps(legacy, ctx.legacy_cuts(cohort, analysis))
    density = ctx.rows("density", cohort, analysis)
    x_lo, x_hi = float(c["x"].min()), float(c["x"].max())
    xlim = (x_lo - 0.01 * (x_hi - x_lo), x_hi + 0.01 * (x_hi - x_lo))

    panel = c[c["form"].isin([*forms, "legacy"])]
    y_lo, y_hi = clipped_span(panel["effect"].astype(float).tolist(),
                              [*panel["effect_lower"].astype(float),
                               *panel["effect_upper"].astype(float)], scale)
    footnote = (f"Bands (continuous) and hatching (legacy groups): pointwise 95% confidence "
                f"intervals, clipped at the panel edge. Effects relative to {short} "
                f"{fmt_number(x_ref)}{unit}; grid from the 1st to the 99th percentile.\nGrey bars: "
                f"rows per bin of {a.exposure}; bins with fewer than {ctx.spec.min_cell} rows are "
                f"not shown.")
    fig_, fig = new_figure(0.8 + 3.3 * len(forms), 4.6, footnote)
    gs = fig.add_gridspec(2, len(forms), height_ratios=[5, 1])
    hidden = 0
    for j, form in enumerate(forms):
        # No shared axes (their sibling sets iterate in memory order, which made the layout
        # differ in the last bits between processes): the same limits are set on each instead.
        ax = fig.add_subplot(gs[0, j])
        rug = fig.add_subplot(gs[1, j])
        colour = FORM_COLOURS[form]
        for s in steps:
            if s["upper"] > s["lower"]:
                ax.fill_between([s["x0"], s["x1"]], s["lower"], s["upper"], facecolor="none",
                                edgecolor=LEGACY, hatch=LEGACY_HATCH, lw=0, zorder=2)
            ax.plot([s["x0"], s["x1"]], [s["effect"]] * 2, color=LEGACY, lw=2.4, zorder=3,
                    solid_capstyle="butt")
        for s0, s1 in zip(steps, steps[1:], strict=False):
            ax.plot([s0["x1"]] * 2, [s0["effect"], s1["effect"]], color=LEGACY, lw=1,
                    ls=(0, (1, 1.5)), zorder=3)
        f = c[c["form"] == form].sort_values("x")
        ax.fill_between(f["x"], f["effect_lower"], f["effect_upper"], color=colour,
                        alpha=BAND_ALPHA, lw=0, zorder=2.5)
        ax.plot(f["x"], f["effect"], color=colour, lw=2.0, ls=FORM_LINES[form], zorder=4)
        ax.plot([x_ref], [1.0 if is_ratio(scale) else 0.0], marker="o", ms=5, mfc="white",
                mec=INK, mew=1.1, zorder=5, ls="none")
        detail = ctx.selected_detail(cohort, analysis, form, adj)
        name = FORM_NAMES[form]
        if form == "spline" and "knots" in detail:
            name = f"spline, {detail.rsplit(',', 1)[-1].strip()}"
        elif form == "fp" and detail.startswith("FP:"):
            name = f"fractional polynomial ({detail[3:].strip()})"
        elif form == "fp" and detail:
            name = f"fractional polynomial {detail}"
        ax.set_title(name, color=colour)
        effect_axis(ax, scale, y_lo, y_hi)
        ax.set_xlim(*xlim)
        ax.xaxis.set_major_locator(MaxNLocator(nbins=6, steps=[1, 2, 2.5, 5, 10]))
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
        ax.tick_params(labelbottom=False)
        if j == 0:
            ax.set_ylabel(f"{effect_label(scale, ctx.outcome_label(analysis))}\nvs {short} "
                          f"{fmt_number(x_ref)}{unit}")
        else:
            ax.tick_params(labelleft=False)
        hidden = draw_rug(rug, density, xlim)
        rug.xaxis.set_major_locator(MaxNLocator(nbins=6, steps=[1, 2, 2.5, 5, 10]))
        rug.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
        rug.set_xlabel(xlabel)
    handles: list[Any] = [(Patch(facecolor="none", edgecolor=LEGACY, hatch=LEGACY_HATCH, lw=0),
                Line2D([], [], color=LEGACY, lw=2.4)),
               *[(Patch(color=FORM_COLOURS[f], alpha=BAND_ALPHA, lw=0),
                  Line2D([], [], color=FORM_COLOURS[f], lw=2, ls=FORM_LINES[f])) for f in forms],
               Line2D([], [], marker="o", ms=5, mfc="white", mec=INK, ls="none")]
    labels = ["legacy groups", *[FORM_NAMES[f] for f in forms],
              f"reference ({short} {fmt_number(x_ref)}{unit})"]
    fig.legend(handles, labels, loc="outside lower left", ncols=len(labels))
    scale_name = scale[0].upper() + scale[1:]
    head = f"{analysis}: {scale} by {xlabel}"
    title(fig, head + ("" if len(ctx.spec.cohorts) == 1 else f" — {cohort}"))

    def one(v: float) -> str:
        return fmt_ratio(v) if is_ratio(scale) else fmt_number(v, 2)

    groups = "; ".join(f"{fmt_number(s['x0'])}–{fmt_number(s['x1'])}{unit}: {one(s['effect'])}"
                       + (f" ({one(s['lower'])} to {one(s['upper'])})"
                          if s["upper"] > s["lower"] else " (reference group)") for s in steps)
    curves_text = "; ".join(
        f"{FORM_NAMES[f]} {_describe_curve(c[c['form'] == f].sort_values('x'), scale, unit)}"
        for f in forms)
    alt = (f"{scale_name} of {ctx.outcome_label(analysis)} against {xlabel}, "
           f"{ADJUSTMENT_TEXT[adj]}, {len(forms)} panel(s), one per continuous form, each over "
           f"the legacy step function. Legacy groups: {groups}. Curves: {curves_text}. A bar "
           f"strip under each panel shows how many rows have each {a.exposure} value"
           + (f" ({hidden} small bin(s) hidden)." if hidden else "."))
    caption = (f"The legacy grouping's step function (ember, hatched interval) beside each "
               f"continuous form fitted to the same sample, {ADJUSTMENT_TEXT[adj]}. Where a "
               f"curve leaves a step's hatched interval, \"flat within the group\" misdescribes "
               f"the data.")
    if not math.isfinite(y_lo):
        return None
    return Drawn(fig_, head, alt, caption)
