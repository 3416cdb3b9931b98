"""Range dependence: how far each estimate moves from its full-range value when the sample's
exposure range is trimmed (low tail, high tail, both), the legacy contrast of the extreme group
vs the reference group beside the continuous forms' contrast between two fixed exposure values
(the two groups' full-sample medians, the reference's second: "group vs reference").

Row selection (``select_ranges``, ``range_points``, ``largest_moves``), drawing
(``draw_points``) and alt text (``ranges_alt``); ``draw`` joins them."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.lines import Line2D

from .base import Context, Drawn, per_analysis
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
    null_value,
    title,
)

FORMS = ("legacy", "linear", "spline")
SIDE = {"lower": "low tail", "upper": "high tail", "both": "both tails"}
Scenario = tuple[str, float, float]


@dataclass(frozen=True)
class RangeRows:
    scale: str
    forms: list[str]
    scenarios: list[Scenario]
    points: pd.DataFrame     # range_points
    contrasts: dict[str, str]  # form -> its contrast as the table states it
    skipped: int             # legacy estimates that could not be made

    @property
    def ratio(self) -> bool:
        return is_ratio(self.scale)


def scenarios(df: pd.DataFrame) -> list[Scenario]:
    """(trim, share_lower, share_upper) in display order: the full range, then by share."""
    keys = df[["trim", "share_lower", "share_upper"]].drop_duplicates()
    out = [("none", 0.0, 0.0)] if (keys["trim"] == "none").any() else []
    rest = keys[keys["trim"] != "none"].copy()
    rest["share"] = rest[["share_lower", "share_upper"]].max(axis=1)
    rest["side"] = rest["trim"].map({"lower": 0, "upper": 1, "both": 2}).fillna(3)
    for r in rest.sort_values(["share", "side"]).itertuples():
        out.append((str(r.trim), float(r.share_lower), float(r.share_upper)))
    return out


def range_points(df: pd.DataFrame, forms: list[str], scen: list[Scenario]) -> pd.DataFrame:
    """One point per form and scenario relative to the form's full-range estimate (a ratio for
    ratio scales, a difference otherwise): form, slot (the scenario's position, offset per
    form), scenario, y, lower, upper, hollow (a fixed contrast value outside the trimmed range),
    failed (no estimate: drawn at the null line)."""
    ratio = is_ratio(str(df["scale"].iloc[0]))
    slot = {s: i for i, s in enumerate(scen)}
    out: list[dict[str, Any]] = []
    for i, form in enumerate(forms):
        f = df[df["form"] == form]
        base = f[(f["trim"] == "none") & (f["status"] == "ok")]
        if base.empty:
            continue
        est0 = float(base["estimate"].iloc[0])
        dx = (i - (len(forms) - 1) / 2) * 0.22
        for r in f.itertuples():
            key = (str(r.trim), float(r.share_lower), float(r.share_upper))
            row: dict[str, Any] = {"form": form, "slot": slot[key] + dx, "scenario": key,
                                   "failed": r.status != "ok" or not math.isfinite(
                                       float(r.estimate))}
            if row["failed"]:
                row.update(y=null_value(str(r.scale)), lower=np.nan, upper=np.nan, hollow=False)
            else:
                shift = np.array([float(r.estimate), float(r.lower), float(r.upper)]) - est0
                y, lo, hi = (np.exp(shift) if ratio else shift).tolist()
                hollow = bool(r.extrapolated) if r.extrapolated is not pd.NA else False
                row.update(y=y, lower=lo, upper=hi, hollow=hollow)
            out.append(row)
    return pd.DataFrame(out, columns=["form", "slot", "scenario", "failed", "y", "lower",
                                      "upper", "hollow"])


def select_ranges(df: pd.DataFrame) -> RangeRows | None:
    """The ranges figure's rows for one analysis (the legacy adjustment when present)."""
    if df.empty or "trim" not in df or "form" not in df:
        return None  # not estimated: the report says why
    if "adjustment" in df and (df["adjustment"] == "legacy").any():
        df = df[df["adjustment"] == "legacy"]
    forms = [f for f in FORMS if (df["form"] == f).any()]
    scen = scenarios(df)
    points = range_points(df, forms, scen)
    if not (~points["failed"]).any():
        return None
    contrasts = {f: str(df.loc[df["form"] == f, "contrast"].iloc[0]) for f in forms
                 if f in set(points["form"])}
    return RangeRows(str(df["scale"].iloc[0]), [f for f in forms if f in contrasts], scen,
                     points, contrasts, int((df["status"] == "skipped").sum()))


def largest_moves(sel: RangeRows) -> dict[str, tuple[float, Scenario]]:
    """Per form, the largest move from the full-range value (|log ratio| or |difference|) over
    the trimmed scenarios whose contrast values stay inside the range, and where it happens."""
    moves: dict[str, tuple[float, Scenario]] = {}
    ok = sel.points[~sel.points["failed"] & ~sel.points["hollow"].astype(bool)]
    for r in ok.itertuples():
        if r.scenario[0] == "none":
            continue
        size = abs(math.log(r.y)) if sel.ratio else abs(r.y)
        if size > moves.get(str(r.form), (-1.0, ("", 0.0, 0.0)))[0]:
            moves[str(r.form)] = (size, r.scenario)
    return moves


def draw_points(ax: Any, sel: RangeRows) -> None:
    for r in sel.points.itertuples():
        colour = FORM_COLOURS[str(r.form)]
        if r.failed:
            ax.plot([r.slot], [r.y], marker="x", ms=6, color=MUTED, mew=1.3, ls="none", zorder=4)
            continue
        ax.plot([r.slot, r.slot], [r.lower, r.upper], color=colour, lw=1.4, zorder=3)
        ax.plot([r.slot], [r.y], marker=FORM_MARKERS[str(r.form)], ms=6.5, color=colour,
                mfc="white" if r.hollow else colour, mew=1.3, ls="none", zorder=4)
    ok = sel.points[~sel.points["failed"]]
    lo, hi = clipped_span(ok["y"].tolist(), [*ok["lower"], *ok["upper"]], sel.scale)
    effect_axis(ax, sel.scale, lo, hi)
    scen = sel.scenarios
    ax.set_xticks(range(len(scen)), [scenario_text(*s, two_lines=True) for s in scen])
    for k in range(1, len(scen)):
        if scen[k][1:] != scen[k - 1][1:] and max(scen[k][1:]) != max(scen[k - 1][1:]):
            ax.axvline(k - 0.5, color=GRID, lw=1.0, zorder=0)
    ax.set_xlim(-0.6, len(scen) - 0.4)


def move_axis_label(scale: str, outcome: str) -> str:
    """The y axis: the move on the outcome's own scale."""
    if is_ratio(scale):
        return f"{scale[0].upper() + scale[1:]}, trimmed / full range\n(log scale)"
    return f"Difference in mean {outcome},\ntrimmed − full range"


def ranges_alt(sel: RangeRows, short: str) -> str:
    """The alt text: per form, the largest move and where it happens."""
    def size_text(size: float) -> str:
        return f"×{fmt_ratio(math.exp(size))}" if sel.ratio else f"±{size:.3g}"

    moves = largest_moves(sel)
    moved = "; ".join(f"{FORM_NAMES[f]} moves at most {size_text(moves[f][0])} "
                      f"({scenario_text(*moves[f][1])})" for f in sel.forms if f in moves)
    return (f"Dot-and-interval chart over {len(sel.scenarios)} trimming scenarios of {short} "
            f"(full range, then the low tail, the high tail and both tails trimmed by increasing "
            f"shares); for each, the legacy contrast and the continuous forms' fixed contrast "
            f"({sel.scale}) relative to their full-range values. {moved}."
            + (f" {sel.skipped} legacy estimate(s) could not be made." if sel.skipped else ""))


@per_analysis("ranges", select_ranges)
def draw(ctx: Context, sel: RangeRows, cohort: str, analysis: str) -> Drawn | None:
    ex = ctx.exposure(analysis)
    footnote = ("Contrasts read group vs reference (legacy reference group second). Each point: "
                "the estimate in the trimmed sample relative to the same model's "
                "estimate in the full sample, with its 95% interval shifted alike. Hollow: a fixed "
                "contrast value lies outside the trimmed range.\n× at the null line: the legacy "
                "contrast could not be estimated (a group was left with too few rows or events).")
    fig_, fig = new_figure(10.5, 4.4, footnote)
    ax = fig.subplots()
    draw_points(ax, sel)
    ax.set_ylabel(move_axis_label(sel.scale, ctx.outcome_label(analysis)))
    ax.set_xlabel(f"Sample trimmed at quantiles of {ex.short}")
    handles = [Line2D([], [], color=FORM_COLOURS[f], marker=FORM_MARKERS[f], ms=6.5, lw=1.4)
               for f in sel.forms]
    labels = [f"{FORM_NAMES[f]}: {sel.contrasts[f]}{'' if f == 'legacy' else ex.unit}"
              for f in sel.forms]
    fig.legend(handles, labels, loc="outside lower left", ncols=len(labels))
    head = f"{analysis}: how the estimates move when the range of {ex.short} is trimmed"
    title(fig, head + ctx.suffix(cohort))
    caption = ("The legacy contrast compares whoever ends up in the extreme groups, so it moves "
               "with the sample's range; a continuous contrast between two fixed values should "
               "stay near 1 (ratios) or 0 (differences).")
    return Drawn(fig_, head, ranges_alt(sel, ex.short), caption)


def scenario_text(trim: str, lower: float, upper: float, two_lines: bool = False) -> str:
    if trim == "none":
        return "full\nrange" if two_lines else "full range"
    share = max(lower, upper)
    sep = "\n" if two_lines else " "
    return f"{SIDE.get(trim, trim)}{sep}{share:.0%}"
