"""Pooled curves: the common-knot spline pooled across cohorts (multivariate random effects:
one function, so it does not jump where a cohort's own range ends), with each cohort's own
curve drawn thinly behind it, the pooled legacy steps beside it, and underneath, the number of
cohorts that count at each exposure value in the pointwise pooling (k)."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import FuncFormatter, MaxNLocator

from .base import Context, Drawn
from .curves import ADJUSTMENT_ORDER, ADJUSTMENT_TEXT, legacy_steps
from .style import (
    BAND_ALPHA,
    INK,
    LEGACY,
    LEGACY_HATCH,
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

COHORT_LINE = "#8d9bb0"
CURVE_FORMS = ("common_spline", "spline")
# The primary curve: the multivariate pooled common-knot spline; pointwise random effects only
# when the bundles carry no coefficients.
PRIMARY_METHODS = ("multivariate random", "random")
METHOD_TEXT = {"multivariate random": "multivariate random-effects pooling of the common-knot "
                                      "spline", "random": "pointwise random effects"}


def draw(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    assert analysis is not None
    pc = ctx.rows("pooled_curves", None, analysis)
    if pc.empty:
        return None
    form = next((f for f in CURVE_FORMS if (pc["form"] == f).any()), None)
    if form is None:
        return None
    adj = next((a for a in ADJUSTMENT_ORDER
                if ((pc["form"] == form) & (pc["adjustment"] == a)).any()), None)
    if adj is None:
        return None
    method = next((m for m in PRIMARY_METHODS
                   if ((pc["method"] == m) & (pc["form"] == form)
                       & (pc["adjustment"] == adj)).any()), str(pc["method"].iloc[0]))
    pointwise = "random" if (pc["method"] == "random").any() else method
    sel = pc[(pc["adjustment"] == adj) & (pc["method"] == pointwise)]
    curve = pc[(pc["adjustment"] == adj) & (pc["method"] == method) & (pc["form"] == form)
               & np.isfinite(pc["effect"].astype(float))].sort_values("x")
    if curve.empty:
        return None
    kx = sel[sel["form"] == form].sort_values("x")[["x", "k"]]
    scale = str(curve["scale"].iloc[0])
    legacy = sel[sel["form"] == "legacy"].copy()
    if "k" in legacy:
        # Inside the reference group every cohort's contrast is exactly null (no variance), so
        # nothing is pooled there (k = 0): the pooled step is the null value itself.
        ref = (legacy["k"] == 0) & legacy["effect"].isna()
        null = 1.0 if is_ratio(scale) else 0.0
        legacy.loc[ref, ["effect", "effect_lower", "effect_upper"]] = null
    legacy = legacy[np.isfinite(legacy["effect"].astype(float))]
    x_ref = float(curve["x_reference"].iloc[0])
    a = ctx.spec.analysis(analysis)
    info = ctx.spec.variables.get(a.exposure)
    unit = f" {info.unit}" if info and info.unit else ""
    short = info.label if info and info.label else a.exposure
    cur = ctx.table("curves")
    per = cur[(cur["analysis"] == analysis) & (cur["form"] == form)
              & (cur["adjustment"] == adj)] if len(cur) else cur
    k = int(curve["k"].max()) if "k" in curve else per["cohort"].nunique()
    cuts = ctx.legacy_cuts(str(per["cohort"].iloc[0]), analysis) if len(per) else []
    steps = legacy_steps(legacy, cuts) if len(legacy) else []
    i2 = curve["i2"].astype(float) if "i2" in curve else pd.Series(dtype=float)
    footnote = (f"Thick line and band: the curve pooled over {k} cohort(s) "
                f"({METHOD_TEXT.get(method, method)}), 95% interval, relative to {short} "
                f"{fmt_number(x_ref)}{unit}. Thin lines: each cohort's own curve on the same "
                "basis, within its own 1st–99th percentile. Ember steps: the legacy groups "
                "pooled (pointwise random effects). Strip below: cohorts counting at each value "
                "in the pointwise pooling (k)."
                + ((f" Multivariate I²: {float(np.nanmedian(i2)):.0%}."
                    if method.startswith("multivariate")
                    else f" Median I² over the grid: {float(np.nanmedian(i2)):.0%}.")
                   if i2.notna().any() else ""))
    fig_, fig = new_figure(8.0, 5.3, footnote)
    ax, kax = fig.subplots(2, 1, height_ratios=[5, 0.8])
    ys = [*curve["effect"].astype(float)]
    bounds = [*curve["effect_lower"].astype(float), *curve["effect_upper"].astype(float)]
    for _, g in (per.groupby("cohort", sort=True) if len(per) else []):
        g = g.sort_values("x")
        if "in_range" in g:
            g = g[g["in_range"].fillna(True).astype(bool)]
        ax.plot(g["x"], g["effect"], color=COHORT_LINE, lw=1.0, zorder=2)
        ys += g["effect"].astype(float).tolist()
    for s in steps:
        if s["upper"] > s["lower"]:
            ax.fill_between([s["x0"], s["x1"]], s["lower"], s["upper"], facecolor="none",
                            edgecolor=LEGACY, hatch=LEGACY_HATCH, lw=0, zorder=2)
        ax.plot([s["x0"], s["x1"]], [s["effect"]] * 2, color=LEGACY, lw=2.4, zorder=3)
        ys.append(s["effect"])
    ax.fill_between(curve["x"], curve["effect_lower"], curve["effect_upper"], color=SPLINE,
                    alpha=BAND_ALPHA, lw=0, zorder=2.5)
    ax.plot(curve["x"], curve["effect"], color=SPLINE, lw=2.4, zorder=4)
    ax.plot([x_ref], [1.0 if is_ratio(scale) else 0.0], marker="o", ms=5, mfc="white", mec=INK,
            mew=1.1, ls="none", zorder=5)
    lo, hi = clipped_span(ys, bounds, scale)
    effect_axis(ax, scale, lo, hi)
    ax.set_xlim(float(curve["x"].min()), float(curve["x"].max()))
    ax.xaxis.set_major_locator(MaxNLocator(nbins=7, steps=[1, 2, 2.5, 5, 10]))
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:g}"))
    if len(kx):
        kv = kx["k"].to_numpy(float)
        kax.step(kx["x"], kv, where="mid", color=INK, lw=1.2)
        top = int(max(float(np.nanmax(kv)), 1.0))
        kax.set_ylim(0, top + 0.6)
        kax.set_yticks([0, top])
    kax.set_ylabel("cohorts (k)", rotation=0, ha="right", va="center", labelpad=6)
    kax.set_xlim(float(curve["x"].min()), float(curve["x"].max()))
    kax.xaxis.set_major_locator(MaxNLocator(nbins=7, steps=[1, 2, 2.5, 5, 10]))
    kax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:g}"))
    ax.tick_params(labelbottom=False)
    kax.set_xlabel(ctx.spec.label(a.exposure))
    ax.set_ylabel(f"{effect_label(scale, ctx.outcome_label(analysis))}\nvs {short} "
                  f"{fmt_number(x_ref)}{unit}")
    handles: list[Any] = [Line2D([], [], color=SPLINE, lw=2.4), Line2D([], [], color=COHORT_LINE, lw=1.0),
               (Patch(facecolor="none", edgecolor=LEGACY, hatch=LEGACY_HATCH, lw=0),
                Line2D([], [], color=LEGACY, lw=2.4))]
    fig.legend(handles, ["pooled spline", "each cohort", "pooled legacy groups"],
               loc="outside lower left", ncols=3)
    head = f"{analysis}: {scale} by {ctx.spec.label(a.exposure)}, pooled over {k} cohorts"
    title(fig, head)
    f = fmt_ratio if is_ratio(scale) else (lambda v: fmt_number(v, 3))
    e = curve["effect"].to_numpy(float)
    xs = curve["x"].to_numpy(float)
    alt = (f"Line chart of the pooled {scale} against {ctx.spec.label(a.exposure)} "
           f"({ADJUSTMENT_TEXT[adj]}, {METHOD_TEXT.get(method, method)} over {k} cohorts): "
           f"from {f(e[0])} at "
           f"{fmt_number(xs[0])} to {f(e[-1])} at {fmt_number(xs[-1])}, lowest {f(e.min())} at "
           f"{fmt_number(xs[int(np.argmin(e))])}, highest {f(e.max())} at "
           f"{fmt_number(xs[int(np.argmax(e))])}; "
           f"{per['cohort'].nunique() if len(per) else 0} cohort curve(s) "
           "behind it and the pooled legacy step function"
           + (f"; pointwise, {int(kx['k'].min())} to {int(kx['k'].max())} cohorts count "
              "along the axis." if len(kx) else "."))
    caption = ("Cohorts share one spline basis (common knots and reference), so their "
               "coefficients pool into one curve; where the thin lines fan out, the cohorts "
               "disagree.")
    return Drawn(fig_, head, alt, caption)
