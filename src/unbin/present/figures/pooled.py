"""Pooled curves: the common-knot spline pooled across cohorts (multivariate random effects:
one function, so it does not jump where a cohort's own range ends), with each cohort's own
curve drawn thinly behind it, the pooled legacy steps beside it, and underneath, the number of
cohorts that count at each exposure value in the pointwise pooling (k).

Row selection (``select_pooled``: the pooled and per-cohort tables to plain data), drawing
(``draw_pooled_panel``, ``draw_k_strip``) and alt text (``pooled_alt``); ``draw`` joins them."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.lines import Line2D

from .base import Context, Drawn, Exposure
from .curves import ADJUSTMENT_ORDER, ADJUSTMENT_TEXT, legacy_steps
from .parts import (
    draw_curve,
    draw_steps,
    effect_limits,
    effect_text,
    mark_reference,
    steps_handle,
    value_ticks,
)
from .style import INK, SPLINE, effect_axis, effect_label, fmt_number, new_figure, null_value, title

COHORT_LINE = "#8d9bb0"
CURVE_FORMS = ("common_spline", "spline")
# The primary curve: the multivariate pooled common-knot spline; pointwise random effects only
# when the bundles carry no coefficients.
PRIMARY_METHODS = ("multivariate random", "random")
METHOD_TEXT = {"multivariate random": "multivariate random-effects pooling of the common-knot "
                                      "spline", "random": "pointwise random effects"}


@dataclass(frozen=True)
class PooledRows:
    form: str
    adjustment: str
    method: str
    curve: pd.DataFrame      # the primary pooled curve, sorted by x
    k_along: pd.DataFrame    # x and k of the pointwise pooling
    legacy: pd.DataFrame     # pooled legacy rows (the reference group set to the null value)
    cohorts: pd.DataFrame    # each cohort's own curve rows (within its own range)
    scale: str

    @property
    def k(self) -> int:
        if "k" in self.curve:
            return int(self.curve["k"].max())
        return int(self.cohorts["cohort"].nunique())


def _first(pc: pd.DataFrame, column: str, options: tuple[str, ...]) -> str | None:
    return next((v for v in options if (pc[column] == v).any()), None)


def pooled_legacy(rows: pd.DataFrame, scale: str) -> pd.DataFrame:
    """The pooled legacy rows to draw. Inside the reference group every cohort's contrast is
    exactly null (no variance), so nothing is pooled there (k = 0): the pooled step is the null
    value itself."""
    legacy = rows.copy()
    if "k" in legacy:
        ref = (legacy["k"] == 0) & legacy["effect"].isna()
        legacy.loc[ref, ["effect", "effect_lower", "effect_upper"]] = null_value(scale)
    return legacy[np.isfinite(legacy["effect"].astype(float))]


def select_pooled(pc: pd.DataFrame, curves: pd.DataFrame, analysis: str) -> PooledRows | None:
    """The rows of the pooled-curves figure for one analysis, from the pooled_curves rows and
    the study's curves table (each cohort's own curve); None when there is no pooled curve."""
    if pc.empty:
        return None
    form = _first(pc, "form", CURVE_FORMS)
    adj = None if form is None else _first(pc[pc["form"] == form], "adjustment",
                                            ADJUSTMENT_ORDER)
    if form is None or adj is None:
        return None
    mine = pc[(pc["form"] == form) & (pc["adjustment"] == adj)]
    method = _first(mine, "method", PRIMARY_METHODS) or str(pc["method"].iloc[0])
    pointwise = "random" if (pc["method"] == "random").any() else method
    sel = pc[(pc["adjustment"] == adj) & (pc["method"] == pointwise)]
    curve = mine[(mine["method"] == method)
                 & np.isfinite(mine["effect"].astype(float))].sort_values("x")
    if curve.empty:
        return None
    scale = str(curve["scale"].iloc[0])
    per = curves[(curves["analysis"] == analysis) & (curves["form"] == form)
                 & (curves["adjustment"] == adj)] if len(curves) else curves
    if "in_range" in per:
        per = per[per["in_range"].astype("boolean").fillna(True).astype(bool)]
    return PooledRows(form, adj, method, curve.reset_index(drop=True),
                      sel[sel["form"] == form].sort_values("x")[["x", "k"]],
                      pooled_legacy(sel[sel["form"] == "legacy"], scale),
                      per.reset_index(drop=True), scale)


def draw_pooled_panel(ax: Any, sel: PooledRows, steps: list[dict[str, float]]) -> None:
    """Each cohort's curve thinly, the pooled legacy steps, the pooled curve over its band."""
    for _, g in (sel.cohorts.groupby("cohort", sort=True) if len(sel.cohorts) else []):
        g = g.sort_values("x")
        ax.plot(g["x"], g["effect"], color=COHORT_LINE, lw=1.0, zorder=2)
    draw_steps(ax, steps)
    draw_curve(ax, sel.curve, SPLINE, lw=2.4)
    mark_reference(ax, float(sel.curve["x_reference"].iloc[0]), sel.scale)
    extra = [*sel.cohorts["effect"].astype(float)] if len(sel.cohorts) else []
    lo, hi = effect_limits(sel.curve, sel.scale, [*extra, *(s["effect"] for s in steps)])
    effect_axis(ax, sel.scale, lo, hi)
    ax.set_xlim(float(sel.curve["x"].min()), float(sel.curve["x"].max()))
    value_ticks(ax.xaxis, 7)
    ax.tick_params(labelbottom=False)


def draw_k_strip(kax: Any, sel: PooledRows) -> None:
    """The number of cohorts counting at each exposure value in the pointwise pooling."""
    if len(sel.k_along):
        kv = sel.k_along["k"].to_numpy(float)
        kax.step(sel.k_along["x"], kv, where="mid", color=INK, lw=1.2)
        top = int(max(float(np.nanmax(kv)), 1.0))
        kax.set_ylim(0, top + 0.6)
        kax.set_yticks([0, top])
    kax.set_ylabel("cohorts (k)", rotation=0, ha="right", va="center", labelpad=6)
    kax.set_xlim(float(sel.curve["x"].min()), float(sel.curve["x"].max()))
    value_ticks(kax.xaxis, 7)


def pooled_alt(sel: PooledRows, ex: Exposure) -> str:
    """The alt text: the pooled curve's ends and extremes, the cohorts behind it, k along x."""
    e, xs = sel.curve["effect"].to_numpy(float), sel.curve["x"].to_numpy(float)

    def f(v: float) -> str:
        return effect_text(v, sel.scale, 3)

    kx = sel.k_along
    n_cohorts = sel.cohorts["cohort"].nunique() if len(sel.cohorts) else 0
    return (f"Line chart of the pooled {sel.scale} against {ex.label} "
            f"({ADJUSTMENT_TEXT[sel.adjustment]}, {METHOD_TEXT.get(sel.method, sel.method)} over "
            f"{sel.k} cohorts): from {f(e[0])} at {fmt_number(xs[0])} to {f(e[-1])} at "
            f"{fmt_number(xs[-1])}, lowest {f(e.min())} at {fmt_number(xs[int(np.argmin(e))])}, "
            f"highest {f(e.max())} at {fmt_number(xs[int(np.argmax(e))])}; {n_cohorts} cohort "
            "curve(s) behind it and the pooled legacy step function"
            + (f"; pointwise, {int(kx['k'].min())} to {int(kx['k'].max())} cohorts count "
               "along the axis." if len(kx) else "."))


def _footnote(sel: PooledRows, ref: str) -> str:
    i2 = sel.curve["i2"].astype(float) if "i2" in sel.curve else pd.Series(dtype=float)
    heterogeneity = ""
    if i2.notna().any():
        which = "Multivariate I²" if sel.method.startswith("multivariate") else \
            "Median I² over the grid"
        heterogeneity = f" {which}: {float(np.nanmedian(i2)):.0%}."
    return (f"Thick line and band: the curve pooled over {sel.k} cohort(s) "
            f"({METHOD_TEXT.get(sel.method, sel.method)}), 95% interval, relative to {ref}. "
            "Thin lines: each cohort's own curve on the same basis, within its own 1st–99th "
            "percentile. Ember steps: the legacy groups pooled (pointwise random effects). Strip "
            "below: cohorts counting at each value in the pointwise pooling (k)." + heterogeneity)


def draw(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    assert analysis is not None
    sel = select_pooled(ctx.rows("pooled_curves", None, analysis), ctx.table("curves"), analysis)
    if sel is None:
        return None
    ex = ctx.exposure(analysis)
    first = str(sel.cohorts["cohort"].iloc[0]) if len(sel.cohorts) else None
    cuts = ctx.legacy_cuts(first, analysis) if first is not None else []
    steps = legacy_steps(sel.legacy, cuts) if len(sel.legacy) else []
    ref = f"{ex.short} {fmt_number(float(sel.curve['x_reference'].iloc[0]))}{ex.unit}"
    fig_, fig = new_figure(8.0, 5.3, _footnote(sel, ref))
    ax, kax = fig.subplots(2, 1, height_ratios=[5, 0.8])
    draw_pooled_panel(ax, sel, steps)
    draw_k_strip(kax, sel)
    kax.set_xlabel(ex.label)
    ax.set_ylabel(f"{effect_label(sel.scale, ctx.outcome_label(analysis))}\nvs {ref}")
    handles: list[Any] = [Line2D([], [], color=SPLINE, lw=2.4),
                          Line2D([], [], color=COHORT_LINE, lw=1.0), steps_handle()]
    fig.legend(handles, ["pooled spline", "each cohort", "pooled legacy groups"],
               loc="outside lower left", ncols=3)
    head = f"{analysis}: {sel.scale} by {ex.label}, pooled over {sel.k} cohorts"
    title(fig, head)
    caption = ("Cohorts share one spline basis (common knots and reference), so their "
               "coefficients pool into one curve; where the thin lines fan out, the cohorts "
               "disagree.")
    return Drawn(fig_, head, pooled_alt(sel, ex), caption)
