"""Per-level curves: the exposure's effect within each level of the analysis' effect modifier
``by``, from the spline x level interaction model (curves rows with ``by_level`` set), one panel
per level on the same effect axis, each level relative to its own reference value; the
interaction test (information table) in the footnote.

Row selection (``select_levels``, ``interaction_text``), drawing (``draw_level``) and alt text
(``levels_alt``); ``draw`` joins them."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .base import Context, Drawn, Exposure, finite, per_analysis
from .curves import ADJUSTMENT_TEXT, usable_rows
from .parts import draw_curve, effect_limits, effect_panel, effect_text, mark_reference, padded
from .style import INK, SPLINE, effect_label, fmt_number, new_figure, title

FORM = "spline x level"
ADJUSTMENTS = ("continuous", "legacy")  # the coding the implied thresholds use comes first


@dataclass(frozen=True)
class LevelRows:
    adjustment: str
    levels: list[str]
    rows: pd.DataFrame
    scale: str

    def level(self, level: str) -> pd.DataFrame:
        return self.rows[self.rows["by_level"] == level].sort_values("x")


def select_levels(curves: pd.DataFrame) -> LevelRows | None:
    """The per-level rows of one analysis' curves table (the first coding of ``ADJUSTMENTS``
    that has them); None without per-level rows."""
    if curves.empty or "by_level" not in curves:
        return None
    cur = usable_rows(curves[(curves["form"] == FORM) & (curves["by_level"].fillna("") != "")])
    adj = next((a for a in ADJUSTMENTS if (cur["adjustment"] == a).any()), None)
    if adj is None:
        return None
    c = cur[cur["adjustment"] == adj].reset_index(drop=True)
    return LevelRows(adj, [str(v) for v in dict.fromkeys(c["by_level"])], c,
                     str(c["scale"].iloc[0]))


def interaction_text(info: pd.DataFrame, adj: str) -> str:
    """The interaction test of the information table's row for ``adj`` in words."""
    row = info[info["adjustment"] == adj] if "adjustment" in info else info[:0]
    if row.empty or "interaction_lr" not in row or not finite(row["interaction_lr"].iloc[0]):
        return "interaction test not available"
    r = row.iloc[0]
    p = float(r["interaction_p"])
    p_text = "< 0.0001" if p < 1e-4 else f"{p:.2g}"
    return (f"interaction LR χ² {float(r['interaction_lr']):.1f} on "
            f"{int(r['interaction_df'])} df, p {'' if p < 1e-4 else '= '}{p_text}")


def draw_level(ax: Any, f: pd.DataFrame, scale: str, ylim: tuple[float, float],
               xlim: tuple[float, float]) -> None:
    draw_curve(ax, f, SPLINE)
    mark_reference(ax, float(f["x_reference"].iloc[0]), scale)
    effect_panel(ax, scale, ylim, xlim)


def levels_alt(sel: LevelRows, ex: Exposure, outcome: str, by_label: str, test: str) -> str:
    """The alt text: each level's reference and the curve's ends."""
    parts = []
    for level in sel.levels:
        f = sel.level(level)
        e, xs = f["effect"].to_numpy(float), f["x"].to_numpy(float)
        parts.append(f"{level} (reference {fmt_number(float(f['x_reference'].iloc[0]))}"
                     f"{ex.unit}): from {effect_text(e[0], sel.scale)} at {fmt_number(xs[0])}"
                     f"{ex.unit} to {effect_text(e[-1], sel.scale)} at {fmt_number(xs[-1])}"
                     f"{ex.unit}")
    return (f"{sel.scale[0].upper() + sel.scale[1:]} of {outcome} against {ex.label} in "
            f"{len(sel.levels)} panels, one per level of {by_label}, from the spline x level "
            f"interaction model {ADJUSTMENT_TEXT[sel.adjustment]}; {test}. "
            + "; ".join(parts) + ".")


@per_analysis("curves", select_levels)
def draw(ctx: Context, sel: LevelRows, cohort: str, analysis: str) -> Drawn | None:
    ex = ctx.exposure(analysis)
    by = ctx.spec.analysis(analysis).by or ""
    by_info = ctx.spec.variables.get(by)
    by_label = (by_info.label if by_info and by_info.label else by) or "level"
    test = interaction_text(ctx.rows("information", cohort, analysis), sel.adjustment)
    c = sel.rows
    ylim = effect_limits(c, sel.scale)
    if not all(np.isfinite(ylim)):
        return None
    xlim = padded(c["x"])
    footnote = (f"One panel per level of {by_label}, from one model with the spline of "
                f"{ex.name} times the level indicators and the level main effects, "
                f"{ADJUSTMENT_TEXT[sel.adjustment]}; {test}. Each level is relative to its own "
                f"reference (the median of the legacy reference group within the level, open "
                f"circle) and drawn over its own 1st–99th percentile range. Bands: pointwise 95% "
                f"confidence intervals, clipped at the panel edge.")
    fig_, fig = new_figure(0.8 + 3.0 * len(sel.levels), 3.9, footnote)
    gs = fig.add_gridspec(1, len(sel.levels))
    outcome = ctx.outcome_label(analysis)
    for j, level in enumerate(sel.levels):
        ax = fig.add_subplot(gs[0, j])
        draw_level(ax, sel.level(level), sel.scale, ylim, xlim)
        ax.set_title(f"{by_label}: {level}", color=INK)
        ax.set_xlabel(ex.label)
        if j == 0:
            ax.set_ylabel(f"{effect_label(sel.scale, outcome)}\nvs the level's reference")
        else:
            ax.tick_params(labelleft=False)
    head = f"{analysis}: {sel.scale} by {ex.label} within each level of {by_label}"
    title(fig, head + ctx.suffix(cohort))
    caption = (f"Does the association with {ex.label} differ by {by_label}? Curves that differ "
               f"in shape beyond their bands, with a small interaction p-value, say it does; a "
               f"shift of the whole risk between levels is the level's main effect and does not "
               f"show here.")
    return Drawn(fig_, head, levels_alt(sel, ex, outcome, by_label, test), caption)
