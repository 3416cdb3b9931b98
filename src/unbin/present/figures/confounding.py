"""Residual confounding: the exposure's effect crude, adjusted with the legacy grouped
confounders, and adjusted with continuous confounders, per exposure coding, with the share of the
confounding that the grouped adjustment leaves — on the table's primary marginal (standardised)
scale, or on the model scale for tables without marginal rows."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from ...refit.contrasts import Z95
from .base import Context, Drawn, finite
from .style import (
    LEGACY,
    NEUTRAL,
    SPLINE,
    clipped_span,
    effect_axis,
    fmt_number,
    fmt_ratio,
    is_ratio,
    new_figure,
    title,
)

FORM_TITLES = {"linear": "exposure linear", "legacy": "exposure in legacy groups"}


def _share_text(r: pd.Series) -> str:
    clear = r.get("confounding_clear")
    if clear is pd.NA or clear is None or not bool(clear) or not finite(r.get("share_left")):
        return "confounding not clearly ≠ 0: share not estimable"
    lo, hi = r.get("share_left_lower"), r.get("share_left_upper")
    ci = f" ({float(lo):.0%} to {float(hi):.0%})" if finite(lo) and finite(hi) else ""
    return f"share left by the grouped adjustment: {float(r['share_left']):.0%}{ci}"


def _limits(r: pd.Series, what: str) -> tuple[float, float, float]:
    """(estimate, lower, upper) of one adjustment from the table (older tables without limits:
    the Wald interval from the standard error)."""
    est = float(r[f"estimate_{what}"])
    if f"lower_{what}" in r:
        return est, float(r[f"lower_{what}"]), float(r[f"upper_{what}"])
    se = float(r[f"se_{what}"])
    return est, est - Z95 * se, est + Z95 * se


def _rows(g: pd.DataFrame) -> list[tuple[str, tuple[float, float, float], str]]:
    """(label, (estimate, lower, upper), colour) from crude to continuous, one row per grouped
    confounder when there are several."""
    allrow = g[g["scope"] == "all"]
    base = allrow.iloc[0] if len(allrow) else g.iloc[0]
    out = [("crude", _limits(base, "crude"), NEUTRAL),
           ("grouped confounders", _limits(base, "grouped"), LEGACY)]
    single = g[g["scope"] != "all"]
    if len(single) > 1:
        for _, r in single.iterrows():
            out.append((f"only {r['scope']} grouped", _limits(r, "grouped"), LEGACY))
    out.append(("continuous confounders", _limits(base, "continuous"), SPLINE))
    return out


def draw(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    assert cohort is not None and analysis is not None
    df = ctx.rows("confounding", cohort, analysis)
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
    ratio = is_ratio(scale)
    tr = math.exp if ratio else (lambda v: v)
    forms = [f for f in ("linear", "legacy") if (df["exposure_form"] == f).any()]
    forms += [f for f in df["exposure_form"].unique() if f not in forms]
    panels = []
    for form in forms:
        g = df[df["exposure_form"] == form]
        rows = _rows(g)
        allrow = g[g["scope"] == "all"]
        panels.append((form, str(g["contrast"].iloc[0]), rows,
                       allrow.iloc[0] if len(allrow) else g.iloc[0]))
    nrows = max(len(p[2]) for p in panels)
    if marginal:
        footnote = (f"Points: the exposure's standardised {scale} (each row's exposure set to "
                    "each value, predictions averaged), 95% bootstrap intervals;\nrows from no "
                    "adjustment (top) to continuous confounders (bottom). Share left = (grouped − "
                    "continuous) / (crude − continuous) on this scale.")
    else:
        footnote = (f"Points: the exposure's effect ({scale}) with 95% Wald intervals, from no "
                    "adjustment (top) to adjustment with continuous confounders (bottom).\n"
                    "Share left = (grouped − continuous) / (crude − continuous) on the model "
                    "scale, with its bootstrap interval.")
    fig_, fig = new_figure(4.4 * len(panels) + 1.4, 1.9 + 0.42 * nrows, footnote)
    same_rows = len({tuple(r[0] for r in p[2]) for p in panels}) == 1
    axes = fig.subplots(1, len(panels), squeeze=False)[0]
    alt_parts = []
    for ax, (form, contrast, rows, allrow) in zip(axes, panels, strict=True):
        ys = np.arange(len(rows))[::-1]
        effs, bounds = [], []
        for y, (_label, (est, low, up), colour) in zip(ys, rows, strict=True):
            e, lo, hi = tr(est), tr(low), tr(up)
            ax.plot([lo, hi], [y, y], color=colour, lw=1.6, zorder=3)
            ax.plot([e], [y], marker="o", ms=7, color=colour, ls="none", zorder=4)
            effs.append(e)
            bounds += [lo, hi]
        lo, hi = clipped_span(effs, bounds, scale)
        effect_axis(ax, scale, lo, hi, axis="x")
        ax.set_yticks(ys, [r[0] for r in rows])
        if same_rows and ax is not axes[0]:
            ax.tick_params(axis="y", labelleft=False)
        ax.set_ylim(-0.7, len(rows) - 0.3)
        ax.grid(False, axis="y")
        ax.grid(True, axis="x")
        ax.tick_params(axis="y", length=0)
        name = FORM_TITLES.get(form, form)
        ax.set_title(f"{name}: {contrast}", loc="left")
        share = _share_text(allrow)
        ax.set_xlabel(share, fontsize=8)
        f = fmt_ratio if ratio else (lambda v: fmt_number(v, 3))
        alt_parts.append(f"{name} ({contrast}): crude {f(effs[0])}, with grouped confounders "
                         f"{f(effs[1])}, with continuous confounders {f(effs[-1])}; {share}")
    largest = df[df["largest"].fillna(False).astype(bool)] if "largest" in df else df.iloc[:0]
    head = f"{analysis}: confounding left by grouped adjustment"
    title(fig, head + ("" if len(ctx.spec.cohorts) == 1 else f" — {cohort}"))
    most = ""
    if len(largest):
        most = f" The grouping that leaves the most: {largest['scope'].iloc[0]}."
    alt = (f"Dot-and-interval chart of the exposure's {'standardised ' if marginal else ''}"
           f"{scale} per exposure coding, rows from crude to adjusted with continuous "
           "confounders. " + "; ".join(alt_parts) + "." + most)
    caption = ("If the grouped adjustment removed all confounding, its point would sit on the "
               "continuous one; the gap is confounding the legacy analysis left in its estimate."
               + most)
    return Drawn(fig_, head, alt, caption)
