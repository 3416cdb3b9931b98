"""Per-level curves: the exposure's effect within each level of the analysis' effect modifier
``by``, from the spline x level interaction model (curves rows with ``by_level`` set), one panel
per level on the same effect axis, each level relative to its own reference value; the
interaction test (information table) in the footnote."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from matplotlib.ticker import FuncFormatter, MaxNLocator

from .base import Context, Drawn, finite
from .curves import ADJUSTMENT_TEXT
from .style import (
    BAND_ALPHA,
    INK,
    SPLINE,
    clipped_span,
    effect_axis,
    effect_label,
    fmt_number,
    fmt_ratio,
    is_ratio,
    new_figure,
    title,
)

FORM = "spline x level"
ADJUSTMENTS = ("continuous", "legacy")  # the coding the implied thresholds use comes first


def _interaction_text(info: pd.DataFrame, adj: str) -> str:
    row = info[info["adjustment"] == adj] if "adjustment" in info else info[:0]
    if row.empty or "interaction_lr" not in row or not finite(row["interaction_lr"].iloc[0]):
        return "interaction test not available"
    r = row.iloc[0]
    p = float(r["interaction_p"])
    p_text = "< 0.0001" if p < 1e-4 else f"{p:.2g}"
    return (f"interaction LR χ² {float(r['interaction_lr']):.1f} on "
            f"{int(r['interaction_df'])} df, p {'' if p < 1e-4 else '= '}{p_text}")


def draw(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    assert cohort is not None and analysis is not None
    cur = ctx.rows("curves", cohort, analysis)
    if cur.empty or "by_level" not in cur:
        return None
    cur = cur[(cur["form"] == FORM) & (cur["by_level"].fillna("") != "")]
    if "status" in cur:
        cur = cur[cur["status"] == "ok"]
    if "in_range" in cur:
        cur = cur[cur["in_range"].fillna(True).astype(bool)]
    cur = cur[np.isfinite(cur["effect"].astype(float))]
    adj = next((a for a in ADJUSTMENTS if (cur["adjustment"] == a).any()), None)
    if adj is None:
        return None
    c = cur[cur["adjustment"] == adj]
    levels = list(dict.fromkeys(c["by_level"]))
    a = ctx.spec.analysis(analysis)
    by = a.by or ""
    scale = str(c["scale"].iloc[0])
    info = ctx.spec.variables.get(a.exposure)
    unit = f" {info.unit}" if info and info.unit else ""
    xlabel = ctx.spec.label(a.exposure)
    by_info = ctx.spec.variables.get(by)
    by_label = (by_info.label if by_info and by_info.label else by) or "level"
    test = _interaction_text(ctx.rows("information", cohort, analysis), adj)
    y_lo, y_hi = clipped_span(c["effect"].astype(float).tolist(),
                              [*c["effect_lower"].astype(float), *c["effect_upper"].astype(float)],
                              scale)
    if not (math.isfinite(y_lo) and math.isfinite(y_hi)):
        return None
    x_lo, x_hi = float(c["x"].min()), float(c["x"].max())
    xlim = (x_lo - 0.01 * (x_hi - x_lo), x_hi + 0.01 * (x_hi - x_lo))
    footnote = (f"One panel per level of {by_label}, from one model with the spline of "
                f"{a.exposure} times the level indicators and the level main effects, "
                f"{ADJUSTMENT_TEXT[adj]}; {test}. Each level is relative to its own reference "
                f"(the median of the legacy reference group within the level, open circle) and "
                f"drawn over its own 1st–99th percentile range. Bands: pointwise 95% confidence "
                f"intervals, clipped at the panel edge.")
    fig_, fig = new_figure(0.8 + 3.0 * len(levels), 3.9, footnote)
    gs = fig.add_gridspec(1, len(levels))
    null = 1.0 if is_ratio(scale) else 0.0

    def one(v: float) -> str:
        return fmt_ratio(v) if is_ratio(scale) else fmt_number(v, 2)

    described = []
    for j, level in enumerate(levels):
        ax = fig.add_subplot(gs[0, j])
        f = c[c["by_level"] == level].sort_values("x")
        x_ref = float(f["x_reference"].iloc[0])
        ax.fill_between(f["x"], f["effect_lower"], f["effect_upper"], color=SPLINE,
                        alpha=BAND_ALPHA, lw=0, zorder=2.5)
        ax.plot(f["x"], f["effect"], color=SPLINE, lw=2.0, zorder=4)
        ax.plot([x_ref], [null], marker="o", ms=5, mfc="white", mec=INK, mew=1.1, zorder=5,
                ls="none")
        ax.set_title(f"{by_label}: {level}", color=INK)
        effect_axis(ax, scale, y_lo, y_hi)
        ax.set_xlim(*xlim)
        ax.xaxis.set_major_locator(MaxNLocator(nbins=6, steps=[1, 2, 2.5, 5, 10]))
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
        ax.set_xlabel(xlabel)
        if j == 0:
            ax.set_ylabel(f"{effect_label(scale, ctx.outcome_label(analysis))}\nvs the level's "
                          "reference")
        else:
            ax.tick_params(labelleft=False)
        e, xs = f["effect"].to_numpy(float), f["x"].to_numpy(float)
        described.append(
            f"{level} (reference {fmt_number(x_ref)}{unit}): from {one(e[0])} at "
            f"{fmt_number(xs[0])}{unit} to {one(e[-1])} at {fmt_number(xs[-1])}{unit}")
    head = f"{analysis}: {scale} by {xlabel} within each level of {by_label}"
    title(fig, head + ("" if len(ctx.spec.cohorts) == 1 else f" — {cohort}"))
    alt = (f"{scale[0].upper() + scale[1:]} of {ctx.outcome_label(analysis)} against {xlabel} "
           f"in {len(levels)} panels, one per level of {by_label}, from the spline x level "
           f"interaction model {ADJUSTMENT_TEXT[adj]}; {test}. " + "; ".join(described) + ".")
    caption = (f"Does the association with {xlabel} differ by {by_label}? Curves that differ in "
               f"shape beyond their bands, with a small interaction p-value, say it does; a "
               f"shift of the whole risk between levels is the level's main effect and does not "
               f"show here.")
    return Drawn(fig_, head, alt, caption)
