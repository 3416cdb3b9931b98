"""Decisions on predicted risk: the exposure value at which each model's predicted risk crosses a
threshold, per level of the effect modifier and for patients whose other risk factors sit low,
middle or high (implied thresholds); and decision curves (net benefit over threshold
probabilities) of the legacy rules beside the risk rules."""

from __future__ import annotations

from typing import Any

import numpy as np
from matplotlib.lines import Line2D
from matplotlib.ticker import FuncFormatter, MaxNLocator

from .base import Context, Drawn
from .style import (
    FORM_COLOURS,
    GRID,
    INK,
    LEGACY,
    MUTED,
    NEUTRAL,
    SPLINE,
    fmt_number,
    new_figure,
    title,
)

MODEL_ORDER = ("spline", "fp", "linear", "legacy")
QUANTILE_MARKERS = {0.1: ("o", "white"), 0.5: ("o", None), 0.9: ("s", None)}
LEGACY_DASHES = ("-", (0, (5, 2)), (0, (1.5, 1.5)), (0, (6, 2, 1.5, 2)))


def _model_colour(model: str) -> str:
    return FORM_COLOURS.get(model.split(" x ")[0], NEUTRAL)


def _model_rank(model: str) -> tuple[int, int]:
    base = model.split(" x ")[0]
    return (MODEL_ORDER.index(base) if base in MODEL_ORDER else len(MODEL_ORDER),
            0 if " x " in model else 1)


def draw_thresholds(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    assert cohort is not None and analysis is not None
    df = ctx.rows("thresholds", cohort, analysis)
    if df.empty or "status" not in df:
        return None
    df = df[df["status"] == "ok"]
    if df.empty:
        return None
    thresholds = sorted(df["threshold"].dropna().unique())
    df = df.assign(level=df["level"].fillna("all").astype(str))
    rows = sorted({(str(m), str(lv)) for m, lv in zip(df["model"], df["level"], strict=True)},
                  key=lambda r: (_model_rank(r[0]), r[1]))
    by = df["by"].dropna().iloc[0] if df["by"].notna().any() else None
    a = ctx.spec.analysis(analysis)
    info = ctx.spec.variables.get(a.exposure)
    unit = f" {info.unit}" if info and info.unit else ""
    cuts = ctx.legacy_cuts(cohort, analysis)
    risk = str(df["risk_scale"].dropna().iloc[0]) if df["risk_scale"].notna().any() else "risk"
    footnote = ("Each mark: the exposure value where the model's predicted "
                f"{risk} reaches the threshold, with the rest of the risk score at its 10th "
                "(open circle), 50th (dot) or 90th (square) percentile among the level's rows; a "
                "non-monotone curve can cross more than once. Ember lines: the legacy cuts. Rows "
                "marked 'above'/'below' never cross inside the observed range.")
    fig_, fig = new_figure(4.2 * len(thresholds) + 2.2, 1.9 + 0.36 * len(rows), footnote)
    axes = fig.subplots(1, len(thresholds), squeeze=False)[0]
    ys = {r: i for i, r in enumerate(reversed(rows))}
    lo_x, hi_x = float(df["range_lower"].min()), float(df["range_upper"].max())
    alt_parts = []
    for ax, thr in zip(axes, thresholds, strict=True):
        t = df[df["threshold"] == thr]
        for c in cuts:
            ax.axvline(c, color=LEGACY, lw=1.6, zorder=1)
        for (model, level), y in ys.items():
            r = t[(t["model"] == model) & (t["level"] == level)]
            colour = _model_colour(model)
            cross = r[r["position"] == "crossing"].dropna(subset=["exposure_value"])
            for _, g in cross.groupby("crossing"):
                g = g.sort_values("profile_quantile")
                ax.plot(g["exposure_value"], [y] * len(g), color=colour, lw=1.2, zorder=2,
                        ls="--" if " x " in model else "-")
            for q, (marker, face) in QUANTILE_MARKERS.items():
                pts = cross[np.isclose(cross["profile_quantile"].astype(float), q)]
                ax.plot(pts["exposure_value"], [y] * len(pts), ls="none", marker=marker, ms=6,
                        color=colour, mfc=face or colour, mew=1.2, zorder=3)
            if cross.empty and len(r):
                where = ", ".join(sorted({str(p).replace("always ", "") for p in r["position"]}))
                ax.text(0.99, y, where, transform=ax.get_yaxis_transform(), ha="right",
                        va="center", fontsize=7.5, color=MUTED)
            mid = cross[np.isclose(cross["profile_quantile"].astype(float), 0.5)]
            if len(mid):
                alt_parts.append(f"threshold {thr:g}, {model}"
                                 + (f" ({by} {level})" if level != "all" else "") + ": "
                                 + ", ".join(fmt_number(v) for v in mid["exposure_value"]))
        ax.set_title(f"{risk} = {thr:g}", loc="left")
        ax.set_xlim(lo_x, hi_x)
        ax.xaxis.set_major_locator(MaxNLocator(nbins=6, steps=[1, 2, 2.5, 5, 10]))
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:g}"))
        ax.set_xlabel(ctx.spec.label(a.exposure))
        ax.grid(True, axis="x")
        ax.grid(False, axis="y")
        ax.tick_params(axis="y", length=0)
        ax.set_ylim(-0.7, len(rows) - 0.3)
        ax.set_yticks(list(ys.values()), [""] * len(ys))
    labels = {r: r[0] + (f" · {by} {r[1]}" if r[1] != "all" else "") for r in rows}
    axes[0].set_yticks(list(ys.values()), [labels[r] for r in ys])
    handles = [Line2D([], [], ls="none", marker=m, ms=6, color=INK, mfc=f or INK)
               for m, f in QUANTILE_MARKERS.values()]
    fig.legend(handles, ["rest of risk low (10th)", "middle (50th)", "high (90th)"],
               loc="outside lower left", ncols=3)
    head = f"{analysis}: the {a.exposure} value at which predicted risk crosses each threshold"
    title(fig, head + ("" if len(ctx.spec.cohorts) == 1 else f" — {cohort}"))
    alt = ("Dot chart, one panel per risk threshold, one row per model"
           + (f" and level of {by}" if by else "") + f"; x axis {ctx.spec.label(a.exposure)}, "
           f"legacy cut(s) at {', '.join(fmt_number(c) for c in cuts) or 'none'}{unit}. "
           "Crossing at the middle risk profile: " + ("; ".join(alt_parts) or "none") + ".")
    caption = ("A single legacy cut applies to everyone; the value at which predicted risk "
               "reaches a threshold moves with the patient's other risk factors and, with an "
               "effect modifier, between its levels. For re-analysis only, not for care.")
    return Drawn(fig_, head, alt, caption)


def draw_net_benefit(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    assert cohort is not None and analysis is not None
    df = ctx.rows("net_benefit", cohort, analysis)
    if df.empty or "status" not in df:
        return None
    df = df[(df["status"] == "ok") & df["net_benefit"].notna()]
    if df.empty:
        return None
    fig_, fig = new_figure(9.0, 5.0, (
        "Net benefit = true positives/n − false positives/n × pt/(1 − pt) at threshold "
        "probability pt (per patient). Risk rules treat when the model's predicted risk is at "
        "least pt; legacy rules treat the groups away from the reference. "
        + (str(df["note"].dropna().iloc[0]) if "note" in df and df["note"].dropna().any()
           and str(df["note"].dropna().iloc[0]) else "Apparent: evaluated on the rows the "
           "models were fitted to.")))
    ax = fig.subplots()
    ax.axhline(0, color=INK, lw=0.9, zorder=1)
    thresholds = [t for t in ctx.spec.risk_thresholds]
    for t in thresholds:
        ax.axvline(t, color=GRID, lw=1.4, zorder=0)
    model_nb = df[df["rule_type"] != "reference"]
    useful = model_nb[model_nb["net_benefit"] > 0]["threshold"]
    x_max = float(useful.max()) + 0.05 if len(useful) else 0.5
    x_max = min(1.0, max(x_max, 1.5 * max(thresholds, default=0.2)))
    shown = df[df["threshold"] <= x_max]
    top = float(shown["net_benefit"].max())
    handles, labels = [], []
    n_legacy = 0
    for rule, g in df.groupby("rule", sort=False):
        g = g.sort_values("threshold")
        kind = str(g["rule_type"].iloc[0])
        model = str(g["model"].iloc[0] or "")
        if kind == "reference":
            if "none" in str(rule):
                continue
            style: dict[str, Any] = {"color": NEUTRAL, "lw": 1.2, "ls": "-"}
        elif kind == "legacy":
            style = {"color": LEGACY, "lw": 2.2,
                     "ls": LEGACY_DASHES[n_legacy % len(LEGACY_DASHES)]}
            n_legacy += 1
        else:
            style = {"color": _model_colour(model) if model != "legacy" else LEGACY,
                     "lw": 1.8, "ls": (0, (6, 1.5, 1.5, 1.5)) if model == "legacy"
                     else ("--" if " x " in model else "-")}
            if model == "spline":
                style["color"] = SPLINE
        (line,) = ax.plot(g["threshold"], g["net_benefit"], zorder=3, color=style["color"],
                          lw=style["lw"], ls=style["ls"])
        handles.append(line)
        labels.append(str(rule))
    handles.append(Line2D([], [], color=INK, lw=0.9))
    labels.append("treat none")
    ax.set_xlim(0, x_max)
    ax.set_ylim(-0.15 * top if top > 0 else -0.05, top * 1.1 if top > 0 else 0.05)
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:.0%}"))
    ax.set_xlabel("Threshold probability")
    ax.set_ylabel("Net benefit (per patient)")
    fig.legend(handles, labels, loc="outside lower left", ncols=3)
    head = f"{analysis}: net benefit of the legacy rule and of risk rules"
    title(fig, head + ("" if len(ctx.spec.cohorts) == 1 else f" — {cohort}"))
    alt_parts = []
    for t in thresholds:
        at = df[np.isclose(df["threshold"], t)]
        if len(at):
            alt_parts.append(f"at {t:.0%}: " + ", ".join(
                f"{r.rule} {r.net_benefit:.3f}" for r in at.itertuples()))
    alt = ("Decision curves: net benefit against threshold probability from 0 to "
           f"{x_max:.0%} for treat all, treat none, the legacy rule(s) and the risk rules. "
           + "; ".join(alt_parts) + ".")
    caption = ("Where a risk rule's curve lies above the legacy rule's, using the model's "
               "predicted risk would have classified these patients better at that threshold. "
               "For re-analysis only, not for care.")
    return Drawn(fig_, head, alt, caption)
