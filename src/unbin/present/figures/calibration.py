"""Calibration of the decision models: one panel per model, observed against predicted risk
(risk tenths with their 95% limits, the flexible calibration curve with its pointwise band, the
line of perfect calibration), from the ``calibration`` table; the optimism-corrected slope
from ``decision_resampling`` when that table has it."""

from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.ticker import FuncFormatter

from .base import Context, Drawn
from .style import (
    BAND_ALPHA,
    FORM_COLOURS,
    FORM_MARKERS,
    GRID,
    INK,
    MUTED,
    NEUTRAL,
    new_figure,
    title,
)

MODEL_ORDER = ("legacy", "linear", "spline", "fp")
CAUTION = ("unbin supports statistical re-analysis; decisions follow local clinical guidelines "
           "and licensed practice.")


def _rank(model: str) -> tuple[int, str]:
    base = model.split(" x ")[0]
    return (MODEL_ORDER.index(base) if base in MODEL_ORDER else len(MODEL_ORDER), model)


def corrected_slopes(df: pd.DataFrame) -> dict[str, float]:
    """The optimism-corrected calibration slope per model, from ``decision_resampling`` rows."""
    if df.empty or "quantity" not in df:
        return {}
    rows = df[(df["quantity"] == "calibration slope") & (df["status"] == "ok")]
    return {str(m): float(v) for m, v in zip(rows["model"], rows["corrected"], strict=True)
            if np.isfinite(v)}


def calibration_alt(models: list[str], df: pd.DataFrame, slopes: dict[str, float],
                    risk: str) -> str:
    """What the figure plots, with the largest gap between a tenth's observed and mean
    predicted risk per model."""
    parts = []
    for m in models:
        t = df[(df["model"] == m) & (df["row_kind"] == "tenth")].dropna(subset=["observed"])
        gap = (t["observed"] - t["mean_predicted"]).abs()
        text = f"{m}: largest gap {gap.max():.1%}" if len(gap) else f"{m}: tenths withheld"
        if m in slopes:
            text += f", optimism-corrected slope {slopes[m]:.2f}"
        parts.append(text)
    return (f"Observed against predicted {risk[0].lower() + risk[1:]}, one panel per model: "
            "risk tenths with 95% limits and a flexible calibration curve; the diagonal is "
            "perfect calibration. " + "; ".join(parts) + ".")


def draw(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    assert cohort is not None and analysis is not None
    df = ctx.rows("calibration", cohort, analysis)
    if df.empty or "row_kind" not in df:
        return None
    df = df[(df["status"] == "ok") & df["row_kind"].isin(["tenth", "smooth"])]
    if df.empty:
        return None
    models = sorted(df["model"].unique(), key=_rank)
    slopes = corrected_slopes(ctx.rows("decision_resampling", cohort, analysis))
    vals = pd.concat([df["mean_predicted"], df["observed_upper"], df["observed"]]).dropna()
    top = float(min(1.0, max(0.05, vals.max() * 1.05)))
    risk = ctx.risk_label(analysis)
    fig_, fig = new_figure(3.0 * len(models) + 0.6, 3.9, (
        "Points: rows in tenths of predicted risk (tied risks together), observed risk with 95% "
        "limits (binary: events/n, Wilson; survival: 1 − Kaplan-Meier at the horizon). Line and "
        "band: a flexible calibration curve (a 3-knot spline of the predicted risk's link). "
        "Tenths whose counts small-cell suppression withholds are not drawn. Judged on the rows "
        "the models were fitted to; the corrected slope, when shown, is "
        f"Harrell's bootstrap optimism correction.\n{CAUTION}"))
    axes = fig.subplots(1, len(models), squeeze=False)[0]
    for ax, m in zip(axes, models, strict=True):
        colour = FORM_COLOURS.get(m.split(" x ")[0], NEUTRAL)
        ax.plot([0, top], [0, top], color=GRID, lw=1.4, zorder=0)
        sm = df[(df["model"] == m) & (df["row_kind"] == "smooth")].sort_values("mean_predicted")
        if len(sm):
            ax.fill_between(sm["mean_predicted"], sm["observed_lower"], sm["observed_upper"],
                            color=colour, alpha=BAND_ALPHA, lw=0)
            ax.plot(sm["mean_predicted"], sm["observed"], color=colour, lw=1.6)
        t = df[(df["model"] == m) & (df["row_kind"] == "tenth")].dropna(subset=["observed"])
        if len(t):
            err = np.vstack([(t["observed"] - t["observed_lower"]).clip(lower=0),
                             (t["observed_upper"] - t["observed"]).clip(lower=0)])
            ax.errorbar(t["mean_predicted"], t["observed"], yerr=err, fmt="none",
                        ecolor=INK, elinewidth=0.8, capsize=0)
            ax.plot(t["mean_predicted"], t["observed"], ls="none", color=INK,
                    marker=FORM_MARKERS.get(m.split(" x ")[0], "o"), ms=4.5, mfc="white")
        ax.set_xlim(0, top)
        ax.set_ylim(0, top)
        ax.set_aspect("equal")
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:.0%}"))
        ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:.0%}"))
        head = m + (f"\ncorrected slope {slopes[m]:.2f}" if m in slopes else "")
        ax.set_title(head, fontsize=9, color=INK if m in slopes else MUTED, loc="left")
        ax.set_xlabel("Predicted risk")
    axes[0].set_ylabel("Observed risk")
    text = f"{analysis}: calibration of the risk models"
    title(fig, text + ctx.suffix(cohort))
    caption = (f"{risk}. Points on the diagonal: the model's predicted risks match what was "
               "observed in those rows. For re-analysis only, not for care.")
    return Drawn(fig_, text, calibration_alt(models, df, slopes, risk), caption)
