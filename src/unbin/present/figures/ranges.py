"""Range dependence: how far each estimate moves from its full-range value when the sample's
exposure range is trimmed (low tail, high tail, both), the legacy contrast of the extreme group
vs the reference group beside the continuous forms' contrast between two fixed exposure values
(the two groups' full-sample medians, the reference's second: "group vs reference")."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from matplotlib.lines import Line2D

from .base import Context, Drawn
from .style import (
    FORM_COLOURS,
    FORM_MARKERS,
    FORM_NAMES,
    GRID,
    MUTED,
    clipped_span,
    effect_axis,
    fmt_ratio,
    is_ratio,
    new_figure,
    title,
)

FORMS = ("legacy", "linear", "spline")
SIDE = {"lower": "low tail", "upper": "high tail", "both": "both tails"}


def scenarios(df: pd.DataFrame) -> list[tuple[str, float, float]]:
    """(trim, share_lower, share_upper) in display order: the full range, then by share."""
    keys = df[["trim", "share_lower", "share_upper"]].drop_duplicates()
    out = [("none", 0.0, 0.0)] if (keys["trim"] == "none").any() else []
    rest = keys[keys["trim"] != "none"].copy()
    rest["share"] = rest[["share_lower", "share_upper"]].max(axis=1)
    rest["side"] = rest["trim"].map({"lower": 0, "upper": 1, "both": 2}).fillna(3)
    for r in rest.sort_values(["share", "side"]).itertuples():
        out.append((str(r.trim), float(r.share_lower), float(r.share_upper)))
    return out


def draw(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    assert cohort is not None and analysis is not None
    df = ctx.rows("ranges", cohort, analysis)
    if df.empty or "trim" not in df or "form" not in df:
        return None  # not estimated: the report says why
    if "adjustment" in df and (df["adjustment"] == "legacy").any():
        df = df[df["adjustment"] == "legacy"]
    scale = str(df["scale"].iloc[0])
    ratio = is_ratio(scale)
    scen = scenarios(df)
    xpos = {(t, lo, hi): i for i, (t, lo, hi) in enumerate(scen)}
    a = ctx.spec.analysis(analysis)
    info = ctx.spec.variables.get(a.exposure)
    short = info.label if info and info.label else a.exposure
    unit = f" {info.unit}" if info and info.unit else ""
    forms = [f for f in FORMS if (df["form"] == f).any()]
    footnote = ("Contrasts read group vs reference (legacy reference group second). Each point: "
                "the estimate in the trimmed sample relative to the same model's "
                "estimate in the full sample, with its 95% interval shifted alike. Hollow: a fixed "
                "contrast value lies outside the trimmed range.\n× at the null line: the legacy "
                "contrast could not be estimated (a group was left with too few rows or events).")
    fig_, fig = new_figure(10.5, 4.4, footnote)
    ax = fig.subplots()
    ys: list[float] = []
    bounds: list[float] = []
    moves: dict[str, tuple[float, str]] = {}
    handles, labels = [], []
    for i, form in enumerate(forms):
        f = df[df["form"] == form]
        base = f[(f["trim"] == "none") & (f["status"] == "ok")]
        if base.empty:
            continue
        est0 = float(base["estimate"].iloc[0])
        contrast = str(base["contrast"].iloc[0])
        dx = (i - (len(forms) - 1) / 2) * 0.22
        colour = FORM_COLOURS[form]
        for r in f.itertuples():
            x = xpos[(str(r.trim), float(r.share_lower), float(r.share_upper))] + dx
            if r.status != "ok" or not math.isfinite(float(r.estimate)):
                ax.plot([x], [1.0 if ratio else 0.0], marker="x", ms=6, color=MUTED, mew=1.3,
                        ls="none", zorder=4)
                continue
            shift = np.array([float(r.estimate), float(r.lower), float(r.upper)]) - est0
            y, lo, hi = (np.exp(shift) if ratio else shift).tolist()
            hollow = bool(r.extrapolated) if r.extrapolated is not pd.NA else False
            ax.plot([x, x], [lo, hi], color=colour, lw=1.4, zorder=3)
            ax.plot([x], [y], marker=FORM_MARKERS[form], ms=6.5, color=colour,
                    mfc="white" if hollow else colour, mew=1.3, ls="none", zorder=4)
            ys.append(y)
            bounds += [lo, hi]
            if r.trim != "none" and not hollow:
                size = abs(math.log(y)) if ratio else abs(y)
                if size > moves.get(form, (-1.0, ""))[0]:
                    moves[form] = (size, _scenario_text(str(r.trim), float(r.share_lower),
                                                        float(r.share_upper)))
        handles.append(Line2D([], [], color=colour, marker=FORM_MARKERS[form], ms=6.5, lw=1.4))
        shown = contrast if form == "legacy" else f"{contrast}{unit}"
        labels.append(f"{FORM_NAMES[form]}: {shown}")
    if not ys:
        return None
    lo, hi = clipped_span(ys, bounds, scale)
    effect_axis(ax, scale, lo, hi)
    ax.set_xticks(range(len(scen)),
                  [_scenario_text(*s, two_lines=True) for s in scen])
    for k in range(1, len(scen)):
        if scen[k][1:] != scen[k - 1][1:] and max(scen[k][1:]) != max(scen[k - 1][1:]):
            ax.axvline(k - 0.5, color=GRID, lw=1.0, zorder=0)
    ax.set_xlim(-0.6, len(scen) - 0.4)
    ax.set_ylabel("Ratio to the full-range estimate (log scale)" if ratio
                  else "Change from the full-range estimate")
    ax.set_xlabel(f"Sample trimmed at quantiles of {short}")
    fig.legend(handles, labels, loc="outside lower left", ncols=len(labels))
    head = f"{analysis}: how the estimates move when the range of {short} is trimmed"
    title(fig, head + ("" if len(ctx.spec.cohorts) == 1 else f" — {cohort}"))

    def fmt(size: float) -> str:
        return f"×{fmt_ratio(math.exp(size))}" if ratio else f"±{size:.3g}"

    moved = "; ".join(f"{FORM_NAMES[f]} moves at most {fmt(moves[f][0])} ({moves[f][1]})"
                      for f in forms if f in moves)
    skipped = int((df["status"] == "skipped").sum())
    alt = (f"Dot-and-interval chart over {len(scen)} trimming scenarios of {short} (full range, "
           f"then the low tail, the high tail and both tails trimmed by increasing shares); for "
           f"each, the legacy contrast and the continuous forms' fixed contrast relative to their "
           f"full-range values. {moved}."
           + (f" {skipped} legacy estimate(s) could not be made." if skipped else ""))
    caption = ("The legacy contrast compares whoever ends up in the extreme groups, so it moves "
               "with the sample's range; a continuous contrast between two fixed values should "
               "stay near 1 (ratios) or 0 (differences).")
    return Drawn(fig_, head, alt, caption)


def _scenario_text(trim: str, lower: float, upper: float, two_lines: bool = False) -> str:
    if trim == "none":
        return "full\nrange" if two_lines else "full range"
    share = max(lower, upper)
    sep = "\n" if two_lines else " "
    return f"{SIDE.get(trim, trim)}{sep}{share:.0%}"
