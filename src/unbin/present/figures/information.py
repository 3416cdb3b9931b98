"""What each legacy grouping keeps: per analysis, the share of the exposure's information the
groups keep (LR chi-square of the groups over that of groups + spline), and the exposure's LR
chi-square in every form on one log axis."""

from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.lines import Line2D
from matplotlib.ticker import FixedLocator, FuncFormatter, NullLocator

from .base import Context, Drawn, finite
from .style import (
    FORM_COLOURS,
    FORM_MARKERS,
    FORM_NAMES,
    GRID,
    INK,
    LEGACY,
    MUTED,
    new_figure,
    ratio_ticks,
    title,
)

LR_FORMS = ("legacy", "linear", "spline", "fp", "legacy_plus_spline")
ADJUSTMENT = "legacy"


def _rows(ctx: Context) -> pd.DataFrame:
    info = ctx.table("information")
    if info.empty or "adjustment" not in info:
        return info
    info = info[info["adjustment"] == ADJUSTMENT]
    order = {key: i for i, key in enumerate(ctx.jobs())}
    keys = list(zip(info["cohort"], info["analysis"], strict=True))
    info = info.assign(_order=[order.get(k, len(order)) for k in keys])
    return info.sort_values("_order").reset_index(drop=True)


def draw(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    info = _rows(ctx)
    if info.empty:
        return None
    many = len(ctx.spec.cohorts) > 1
    labels = [f"{r.analysis}" + (f" · {r.cohort}" if many else "") for r in info.itertuples()]
    n = len(info)
    footnote = ("Left: LR χ²(legacy groups) / LR χ²(groups + spline) — the share of what the "
                "exposure tells about the outcome that survives the grouping.\nRight: LR χ² of the "
                "exposure in each form, adjusted as in the legacy analysis (log axis).")
    fig_, fig = new_figure(10.5, 1.7 + 0.42 * n, footnote)
    left, right = fig.subplots(1, 2, width_ratios=[1, 1.25])
    ys = np.arange(n)[::-1]
    kept = info["info_kept"].astype(float).to_numpy() if "info_kept" in info else np.full(n, np.nan)
    shown = np.where(np.isfinite(kept), np.clip(kept, 0, 1), 0)
    left.barh(ys, np.ones(n), height=0.56, color="none", edgecolor=GRID, lw=1.0)
    left.barh(ys, shown, height=0.56, color=LEGACY, lw=0)
    for y, k in zip(ys, kept, strict=True):
        text = f"{k:.0%}" if np.isfinite(k) else "not estimable"
        left.text(min(max(k, 0), 1) + 0.015 if np.isfinite(k) else 0.015, y, text,
                  va="center", ha="left", fontsize=8, color=INK)
    left.set_xlim(0, 1.18)
    left.xaxis.set_major_locator(FixedLocator([0, 0.25, 0.5, 0.75, 1]))
    left.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:.0%}"))
    left.set_yticks(ys, labels)
    left.grid(False)
    left.set_title("Information kept by the legacy groups")
    left.tick_params(axis="y", length=0)

    values: list[float] = []
    present = [f for f in LR_FORMS if f"lr_{f}" in info and info[f"lr_{f}"].notna().any()]
    for i, form in enumerate(present):
        col = f"lr_{form}"
        offset = (i - (len(present) - 1) / 2) * 0.13   # forms side by side, never hidden
        key = "legacy+spline" if form == "legacy_plus_spline" else form
        v = info[col].astype(float).to_numpy()
        ok = np.isfinite(v) & (v > 0)
        values += v[ok].tolist()
        right.scatter(v[ok], ys[ok] - offset, s=34, marker=FORM_MARKERS[key], color=FORM_COLOURS[key],
                      zorder=3, lw=0.8,
                      facecolors="white" if key == "legacy+spline" else FORM_COLOURS[key])
    for y, row in zip(ys, info.itertuples(), strict=True):
        vals = [float(getattr(row, f"lr_{f}")) for f in present
                if finite(getattr(row, f"lr_{f}", None)) and float(getattr(row, f"lr_{f}")) > 0]
        if vals:
            right.plot([min(vals), max(vals)], [y, y], color=GRID, lw=2.2, zorder=2)
    if values:
        lo, hi = min(values) / 1.6, max(values) * 1.6
        right.set_xscale("log")
        right.set_xlim(lo, hi)
        right.xaxis.set_major_locator(FixedLocator(ratio_ticks(lo, hi, most=7)))
        right.xaxis.set_minor_locator(NullLocator())
        right.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:g}"))
    right.grid(True, axis="x")
    right.grid(False, axis="y")
    for ax in (left, right):
        ax.set_ylim(-0.6, n - 0.4)
    right.set_yticks(ys, [""] * n)
    right.set_title("Exposure LR χ², by form")
    right.set_xlabel("LR χ² (log scale)")
    right.tick_params(axis="y", length=0)
    handles = [Line2D([], [], ls="none", marker=FORM_MARKERS[k], ms=6, color=FORM_COLOURS[k],
                      mfc="white" if k == "legacy+spline" else FORM_COLOURS[k])
               for k in ("legacy+spline" if f == "legacy_plus_spline" else f for f in present)]
    names = [FORM_NAMES["legacy+spline" if f == "legacy_plus_spline" else f] for f in present]
    fig.legend(handles, names, loc="outside lower right", ncols=len(names))
    head = "What the legacy groupings keep"
    title(fig, head)
    parts = []
    for lab, row in zip(labels, info.itertuples(), strict=True):
        k = float(row.info_kept) if finite(getattr(row, "info_kept", None)) else float("nan")
        lrs = ", ".join(f"{FORM_NAMES['legacy+spline' if f == 'legacy_plus_spline' else f]} "
                        f"{float(getattr(row, f'lr_{f}')):.1f}" for f in present
                        if finite(getattr(row, f"lr_{f}", None)))
        parts.append(f"{lab}: groups keep {k:.0%} of the information (LR χ² {lrs})"
                     if np.isfinite(k) else f"{lab}: not estimable")
    alt = ("Two-panel chart, one row per analysis. Left: bars of the share of the exposure's "
           "information kept by the legacy grouping. Right: the exposure's likelihood-ratio "
           "chi-square in each form on a log axis. " + "; ".join(parts) + ".")
    caption = ("A share near 100% means the grouping lost little; the right panel shows how much "
               "more the continuous forms explain than the groups. Adjusted as in the legacy "
               "analysis.")
    _ = MUTED
    return Drawn(fig_, head, alt, caption)
