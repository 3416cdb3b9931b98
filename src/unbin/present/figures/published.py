"""Published tables beside the data cohorts: each published-only study's fitted spline (thin,
its own marker) with its groups' published ratios at their assigned exposures, and the curve
pooled over all contributors (thick, with band) against the one pooled from the individual data
only (dashed). Reads ``published_curves`` and ``published_groups``; computes nothing."""

from __future__ import annotations

from typing import Any

import numpy as np
from matplotlib.lines import Line2D

from .base import Context, Drawn
from .curves import ADJUSTMENT_ORDER
from .parts import draw_curve, effect_limits, effect_text, mark_reference, value_ticks
from .style import (
    INK,
    LEGACY,
    LINEAR,
    SPLINE,
    effect_axis,
    effect_label,
    fmt_number,
    is_ratio,
    new_figure,
    title,
)

ALL = "pooled: all contributors"
DATA = "pooled: individual data only"
MARKERS = ("s", "^", "D", "v", "P", "X")


def draw(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    assert analysis is not None
    cur = ctx.rows("published_curves", None, analysis)
    if cur.empty:
        return None
    adj = next((a for a in ADJUSTMENT_ORDER if (cur["adjustment"] == a).any()),
               str(cur["adjustment"].iloc[0]))
    cur = cur[(cur["adjustment"] == adj) & (cur["form"] == "spline")]
    pooled = cur[cur["curve"] == ALL].sort_values("x")
    if pooled.empty:
        return None
    data_only = cur[cur["curve"] == DATA].sort_values("x")
    studies = sorted(cur.loc[cur["evidence"] == "published table", "curve"].unique())
    groups = ctx.rows("published_groups", None, analysis)
    scale = str(pooled["scale"].iloc[0])
    ratio = is_ratio(scale)
    ex = ctx.exposure(analysis)
    ref = f"{ex.short} {fmt_number(float(pooled['x_reference'].iloc[0]))}{ex.unit}"
    fig_, fig = new_figure(8.0, 5.0, (
        "Thick line and band: the common-knot spline pooled over every contributor (data "
        "cohorts and published tables; multivariate random effects), 95% interval, relative to "
        f"{ref}. Dashed: pooled over the individual data only. Thin lines: each published "
        "study's GLS spline over its own groups; markers: its published ratios at the groups' "
        "assigned exposures, moved onto its curve's reference."))
    ax = fig.subplots(1, 1)
    handles: list[Any] = []
    labels: list[str] = []
    extra: list[float] = []
    for i, name in enumerate(studies):
        s = cur[cur["curve"] == name].sort_values("x")
        m = MARKERS[i % len(MARKERS)]
        pts = groups[groups["study"] == name] if len(groups) else groups
        if len(pts):  # the study's curve over its own assigned exposures only
            xa = pts["assigned_exposure"].astype(float)
            s = s[(s["x"] >= xa.min()) & (s["x"] <= xa.max())]
        ax.plot(s["x"], s["effect"], color=LINEAR, lw=1.0, zorder=3)
        if len(pts):
            y = pts["plotted_log_ratio"].to_numpy(float)
            yv = np.exp(y) if ratio else y
            ax.plot(pts["assigned_exposure"], yv, marker=m, ms=5, ls="none", mfc="white",
                    mec=LEGACY, mew=1.2, zorder=5)
            extra += [float(v) for v in yv]
        handles.append(Line2D([], [], color=LINEAR, lw=1.0, marker=m, mfc="white", mec=LEGACY))
        labels.append(name)
    if len(data_only):
        ax.plot(data_only["x"], data_only["effect"], color=INK, lw=1.4, ls="--", zorder=4)
        handles.append(Line2D([], [], color=INK, lw=1.4, ls="--"))
        labels.append("pooled, individual data only")
        extra += [float(v) for v in data_only["effect"]]
    draw_curve(ax, pooled, SPLINE, lw=2.4)
    handles.insert(0, Line2D([], [], color=SPLINE, lw=2.4))
    labels.insert(0, "pooled, all contributors")
    mark_reference(ax, float(pooled["x_reference"].iloc[0]), scale)
    lo, hi = effect_limits(pooled, scale, extra)
    effect_axis(ax, scale, lo, hi)
    ax.set_xlim(float(pooled["x"].min()), float(pooled["x"].max()))
    value_ticks(ax.xaxis, 7)
    ax.set_xlabel(ex.label)
    ax.set_ylabel(f"{effect_label(scale, ctx.outcome_label(analysis))}\nvs {ref}")
    fig.legend(handles, labels, loc="outside lower left", ncols=min(len(labels), 4))
    head = f"{analysis}: published tables beside the data cohorts"
    title(fig, head)
    e, xs = pooled["effect"].to_numpy(float), pooled["x"].to_numpy(float)
    shift = ""
    if len(data_only):
        d = np.abs(pooled["estimate"].to_numpy(float) - data_only["estimate"].to_numpy(float)) \
            if len(data_only) == len(pooled) else np.array([np.nan])
        if np.isfinite(d).any():
            top = fmt_number(float(np.nanmax(d)), 3)
            shift = f"; the largest log-scale shift from adding them is {top}"
    alt = (f"Line chart of the {scale} against {ex.label}: the curve pooled over all "
           f"contributors runs from {effect_text(e[0], scale, 3)} at {fmt_number(xs[0])} to "
           f"{effect_text(e[-1], scale, 3)} at {fmt_number(xs[-1])}; {len(studies)} published "
           f"stud{'y' if len(studies) == 1 else 'ies'} ({', '.join(studies)}) drawn with their "
           f"published group ratios{shift}.")
    caption = ("Published-only studies enter through their grouped tables (assigned exposures, "
               "reconstructed covariance, GLS spline on the common knots); where the thick and "
               "dashed curves part, the published tables move the pooled answer.")
    return Drawn(fig_, head, alt, caption)
