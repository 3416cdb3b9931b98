"""The exposure's effect curve beside the legacy step function: one panel per continuous form
(spline, fractional polynomial, linear), each over the same legacy steps, on a shared effect
axis (log scale for ratios), with the exposure's binned distribution as a counted strip
underneath.

Three parts: row selection (``select_curves``, ``legacy_steps``: tables to plain data), drawing
(``draw_panel``, ``draw_rug``) and the alt text (``curves_alt``); ``draw`` joins them."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from .base import Context, Drawn, Exposure, per_analysis
from .parts import (
    draw_curve,
    draw_steps,
    effect_limits,
    effect_panel,
    effect_text,
    mark_reference,
    padded,
    reference_handle,
    steps_handle,
    value_ticks,
)
from .style import (
    BAND_ALPHA,
    FORM_COLOURS,
    FORM_LINES,
    FORM_NAMES,
    RUG,
    effect_label,
    fmt_number,
    new_figure,
    title,
)

PANEL_FORMS = ("spline", "fp", "linear")
ADJUSTMENT_ORDER = ("legacy", "continuous", "none")
ADJUSTMENT_TEXT = {"legacy": "adjusted as in the legacy analysis (grouped covariates)",
                   "continuous": "adjusted with continuous covariates",
                   "none": "unadjusted"}
RUG_LABEL = "rows\nper bin"


@dataclass(frozen=True)
class CurveRows:
    """The curves one figure draws: one adjustment coding, its continuous forms and legacy rows."""

    adjustment: str
    forms: list[str]
    rows: pd.DataFrame       # every drawn row of the coding (continuous forms and legacy)
    scale: str
    x_reference: float

    def form(self, form: str) -> pd.DataFrame:
        return self.rows[self.rows["form"] == form].sort_values("x")


def pick_adjustment(curves: pd.DataFrame) -> str | None:
    """The adjustment coding to draw: the legacy one (so only the exposure's coding differs from
    the legacy analysis), else the first with a continuous form."""
    for adj in ADJUSTMENT_ORDER:
        c = curves[curves["adjustment"] == adj]
        if c["form"].isin(PANEL_FORMS).any():
            return adj
    return None


def usable_rows(cur: pd.DataFrame) -> pd.DataFrame:
    """Rows fitted without trouble, with a finite effect, inside the cohort's own 1st-99th
    percentiles (on a grid common to several cohorts)."""
    if "status" in cur:
        cur = cur[cur["status"] == "ok"]
    if "in_range" in cur:
        cur = cur[cur["in_range"].astype("boolean").fillna(True).astype(bool)]
    return cur[np.isfinite(cur["effect"].astype(float))]


def select_curves(curves: pd.DataFrame) -> CurveRows | None:
    """The rows of the curves figure from one analysis' curves table; None when no continuous
    form has a usable row."""
    cur = usable_rows(curves) if len(curves) else curves
    if cur.empty:
        return None
    adj = pick_adjustment(cur)
    if adj is None:
        return None
    c = cur[cur["adjustment"] == adj]
    forms = [f for f in PANEL_FORMS if (c["form"] == f).any()]
    c = c[c["form"].isin([*forms, "legacy"])]
    return CurveRows(adj, forms, c.reset_index(drop=True), str(c["scale"].iloc[0]),
                     float(c["x_reference"].iloc[0]))


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


def rug_bars(density: pd.DataFrame) -> tuple[pd.DataFrame, int]:
    """The bins a distribution strip draws (left, width, count; suppressed and empty bins left
    out) and how many bins the density table suppressed (small cells)."""
    if density.empty:
        return pd.DataFrame({"left": [], "width": [], "count": []}), 0
    sup = density["suppressed"].fillna(False).astype(bool).to_numpy()
    counts = pd.to_numeric(density["count"], errors="coerce").to_numpy(float)
    show = ~sup & np.isfinite(counts) & (counts > 0)
    left = density["bin_left"].to_numpy(float)
    width = density["bin_right"].to_numpy(float) - left
    return (pd.DataFrame({"left": left[show], "width": width[show], "count": counts[show]}),
            int(sup.sum()))


def draw_rug(ax: Any, density: pd.DataFrame, xlim: tuple[float, float],
             label: bool = True) -> int:
    """Bars of the exposure's binned counts on a count axis (0 and the largest count shown, on
    the first panel only); suppressed bins (small counts) and empty ones are not drawn. Adjacent
    bins are drawn as one shape (a tenth of the bytes of one shape per bar). Returns the
    number of bins hidden."""
    bars, hidden = rug_bars(density)
    for run in _runs(bars):
        edges = np.append(run["left"].to_numpy(float),
                          float(run["left"].iloc[-1] + run["width"].iloc[-1]))
        ax.stairs(run["count"].to_numpy(float), edges, fill=True, color=RUG, lw=0)
    ax.set_xlim(*xlim)
    top = float(bars["count"].max()) if len(bars) else 0.0
    if top > 0:
        ax.set_ylim(0, top * 1.08)
    if label:
        ax.set_yticks([0, top] if top > 0 else [0], ["0", f"{top:,.0f}"] if top > 0 else ["0"])
        ax.tick_params(axis="y", labelsize=7)
        ax.set_ylabel(RUG_LABEL, rotation=0, ha="right", va="center", fontsize=7.5)
    else:
        ax.set_yticks([])
    ax.grid(False)
    return hidden


def _runs(bars: pd.DataFrame) -> list[pd.DataFrame]:
    """The bars split where one bar's right edge is not the next one's left edge."""
    if bars.empty:
        return []
    right = (bars["left"] + bars["width"]).to_numpy(float)
    gap = ~np.isclose(bars["left"].to_numpy(float)[1:], right[:-1])
    starts = [0, *(np.flatnonzero(gap) + 1), len(bars)]
    return [bars.iloc[a:b] for a, b in zip(starts[:-1], starts[1:], strict=True)]


def form_title(form: str, detail: str) -> str:
    """A panel's title: the form's name with the selected fit's detail (knots, FP powers)."""
    if form == "spline" and "knots" in detail:
        return f"spline, {detail.rsplit(',', 1)[-1].strip()}"
    if form == "fp" and detail.startswith("FP:"):
        return f"fractional polynomial ({detail[3:].strip()})"
    if form == "fp" and detail:
        return f"fractional polynomial {detail}"
    return FORM_NAMES[form]


def draw_panel(ax: Any, sel: CurveRows, form: str, steps: list[dict[str, float]],
               ylim: tuple[float, float], xlim: tuple[float, float]) -> None:
    """One continuous form over the legacy steps on the shared effect axis."""
    draw_steps(ax, steps, risers=True)
    draw_curve(ax, sel.form(form), FORM_COLOURS[form], FORM_LINES[form])
    mark_reference(ax, sel.x_reference, sel.scale)
    effect_panel(ax, sel.scale, ylim, xlim)
    ax.tick_params(labelbottom=False)


def describe_curve(c: pd.DataFrame, scale: str, unit: str) -> str:
    """A curve's ends, lowest and highest point in words."""
    xs, e = c["x"].to_numpy(float), c["effect"].to_numpy(float)
    lo_i, hi_i = int(np.nanargmin(e)), int(np.nanargmax(e))
    return (f"from {effect_text(e[0], scale)} at {fmt_number(xs[0])}{unit} to "
            f"{effect_text(e[-1], scale)} at {fmt_number(xs[-1])}{unit}, lowest "
            f"{effect_text(e[lo_i], scale)} at {fmt_number(xs[lo_i])}, highest "
            f"{effect_text(e[hi_i], scale)} at {fmt_number(xs[hi_i])}")


def curves_alt(sel: CurveRows, steps: list[dict[str, float]], ex: Exposure, outcome: str,
               bars: pd.DataFrame, hidden: int) -> str:
    """The alt text: what is plotted, every legacy group's effect and each curve's key values,
    and what the distribution strip counts."""
    scale = sel.scale

    def step(s: dict[str, float]) -> str:
        head = f"{fmt_number(s['x0'])}–{fmt_number(s['x1'])}{ex.unit}: {effect_text(s['effect'], scale)}"
        if s["upper"] > s["lower"]:
            return head + f" ({effect_text(s['lower'], scale)} to {effect_text(s['upper'], scale)})"
        return head + " (reference group)"

    curves = "; ".join(f"{FORM_NAMES[f]} {describe_curve(sel.form(f), scale, ex.unit)}"
                       for f in sel.forms)
    strip = (f" A bar strip under each panel counts the rows in each bin of {ex.name} (largest "
             f"bar {bars['count'].max():,.0f} rows)" if len(bars) else "")
    strip += (f"; {hidden} small bin(s) hidden." if hidden else ".") if strip else ""
    return (f"{scale[0].upper() + scale[1:]} of {outcome} against {ex.label}, "
            f"{ADJUSTMENT_TEXT[sel.adjustment]}, {len(sel.forms)} panel(s), one per continuous "
            f"form, each over the legacy step function. Legacy groups: "
            f"{'; '.join(step(s) for s in steps)}. Curves: {curves}.{strip}")


@per_analysis("curves", select_curves)
def draw(ctx: Context, sel: CurveRows, cohort: str, analysis: str) -> Drawn | None:
    ex = ctx.exposure(analysis)
    outcome = ctx.outcome_label(analysis)
    steps = legacy_steps(sel.form("legacy"), ctx.legacy_cuts(cohort, analysis))
    density = ctx.rows("density", cohort, analysis)
    xlim = padded(sel.rows["x"])
    ylim = effect_limits(sel.rows, sel.scale)
    if not all(np.isfinite(ylim)):
        return None
    ref = f"{ex.short} {fmt_number(sel.x_reference)}{ex.unit}"
    footnote = (f"Bands (continuous) and hatching (legacy groups): pointwise 95% confidence "
                f"intervals, clipped at the panel edge. Effects relative to {ref}; grid from the "
                f"1st to the 99th percentile.\nGrey bars: rows per bin of {ex.name} (count axis "
                f"at the left); bins with fewer than {ctx.spec.min_cell} rows are not shown.")
    fig_, fig = new_figure(0.8 + 3.3 * len(sel.forms), 4.6, footnote)
    gs = fig.add_gridspec(2, len(sel.forms), height_ratios=[5, 1])
    for j, form in enumerate(sel.forms):
        # No shared axes (their sibling sets iterate in memory order, which made the layout
        # differ in the last bits between processes): the same limits are set on each instead.
        ax, rug = fig.add_subplot(gs[0, j]), fig.add_subplot(gs[1, j])
        draw_panel(ax, sel, form, steps, ylim, xlim)
        ax.set_title(form_title(form, ctx.selected_detail(cohort, analysis, form,
                                                          sel.adjustment)),
                     color=FORM_COLOURS[form])
        if j == 0:
            ax.set_ylabel(f"{effect_label(sel.scale, outcome)}\nvs {ref}")
        else:
            ax.tick_params(labelleft=False)
        draw_rug(rug, density, xlim, label=j == 0)
        value_ticks(rug.xaxis)
        rug.set_xlabel(ex.label)
    _legend(fig, sel.forms, ref)
    head = f"{analysis}: {sel.scale} by {ex.label}"
    title(fig, head + ctx.suffix(cohort))
    bars, hidden = rug_bars(density)
    caption = (f"The legacy grouping's step function (ember, hatched interval) beside each "
               f"continuous form fitted to the same sample, {ADJUSTMENT_TEXT[sel.adjustment]}. "
               f"Where a curve leaves a step's hatched interval, \"flat within the group\" "
               f"misdescribes the data.")
    return Drawn(fig_, head, curves_alt(sel, steps, ex, outcome, bars, hidden), caption)


def _legend(fig: Any, forms: list[str], ref: str) -> None:
    handles: list[Any] = [steps_handle(),
                          *[(Patch(color=FORM_COLOURS[f], alpha=BAND_ALPHA, lw=0),
                             Line2D([], [], color=FORM_COLOURS[f], lw=2, ls=FORM_LINES[f]))
                            for f in forms],
                          reference_handle()]
    labels = ["legacy groups", *[FORM_NAMES[f] for f in forms], f"reference ({ref})"]
    fig.legend(handles, labels, loc="outside lower left", ncols=len(labels))
