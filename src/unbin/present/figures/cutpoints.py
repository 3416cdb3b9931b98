"""The cut-point audit: where every legacy cut sits in the analysis sample (percentile), and, for a
cut chosen from the data, the split statistic over every candidate cut with the maximum, the
legacy cut, the naive 5% line and the bootstrap spread of the re-derived cut.

Row selection (``select_positions``, ``select_profile``), drawing (``draw_statistic``,
``draw_bootstrap``) and alt texts (``positions_alt``, ``profile_alt``); the ``draw_*`` kinds
join them."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .base import Context, Drawn, finite, per_analysis
from .parts import row_axis, value_ticks
from .style import GRID, INK, LEGACY, MUTED, NEUTRAL, SPLINE, fmt_number, new_figure, title

BOOT_QUANTILES = ("boot_cut_p2_5", "boot_cut_p25", "boot_cut_p50", "boot_cut_p75",
                  "boot_cut_p97_5")


def _p(v: object) -> str:
    if not finite(v):
        return "–"
    f = float(v)  # type: ignore[arg-type]
    return "<0.001" if f < 0.001 else f"{f:.3f}"


# --------------------------------------------------------------------------- cut positions


def select_positions(df: pd.DataFrame) -> dict[str, pd.DataFrame] | None:
    """Per grouped variable (the exposure's first), its cut rows with a percentile, by cut;
    None when no cut has a percentile."""
    if df.empty or "row_type" not in df:
        return None
    cuts = df[(df["row_type"] == "cut") & df["percentile"].notna()]
    variables = dict.fromkeys([*cuts.loc[cuts["role"] == "exposure", "variable"],
                               *cuts["variable"]])
    return {str(v): cuts[cuts["variable"] == v].sort_values("cut") for v in variables} or None


def positions_alt(rows: dict[str, pd.DataFrame], label: Any) -> str:
    parts = [f"{label(var)}: " + ", ".join(
        f"{fmt_number(float(r.cut))} at the {float(r.percentile):.0f}th percentile"
        for r in v.itertuples()) for var, v in rows.items()]
    return ("Strip chart of percentiles 0 to 100, one row per grouped variable, a tick at the "
            "median. " + "; ".join(parts) + ".")


@per_analysis("cutpoints", select_positions)
def draw_positions(ctx: Context, rows: dict[str, pd.DataFrame], cohort: str, analysis: str) -> Drawn | None:
    weights = ctx.spec.analysis(analysis).weights  # a row stands for w persons: count persons
    footnote = ("Each cut at its percentile in the analysis sample (the share of "
                f"{'persons' if weights and weights.kind == 'frequency' else 'rows'} below it); "
                "the sample median is at 50. Ember: the exposure's cuts; grey: cuts of grouped "
                "adjustment variables.")
    fig_, fig = new_figure(9.0, 1.5 + 0.55 * len(rows), footnote)
    ax = fig.subplots()
    for y, v in zip(np.arange(len(rows))[::-1], rows.values(), strict=True):
        colour = LEGACY if (v["role"] == "exposure").any() else NEUTRAL
        ax.plot([0, 100], [y, y], color=GRID, lw=5, solid_capstyle="round", zorder=1)
        ax.plot([50], [y], marker="|", ms=14, mew=1.5, color=INK, zorder=2)
        ax.plot(v["percentile"], [y] * len(v), marker="D", ms=7, color=colour, ls="none",
                zorder=3)
        for r in v.itertuples():
            ax.annotate(fmt_number(float(r.cut)), (float(r.percentile), y), xytext=(0, 7),
                        textcoords="offset points", ha="center", va="bottom", fontsize=7.5,
                        color=INK)
    row_axis(ax, len(rows), [ctx.spec.label(var) + (" (exposure)" if (v["role"] == "exposure")
                                                    .any() else "") for var, v in rows.items()],
             high=0.2)
    ax.set_xlim(-2, 102)
    ax.set_xticks([0, 10, 25, 50, 75, 90, 100])
    ax.set_xlabel("Percentile of the analysis sample")
    head = f"{analysis}: where the legacy cuts sit"
    title(fig, head + ctx.suffix(cohort))
    caption = ("Cuts far from the middle leave small extreme groups; cuts at round clinical "
               "values can sit anywhere in a particular sample's distribution.")
    return Drawn(fig_, head, positions_alt(rows, ctx.spec.label), caption)


# --------------------------------------------------------------------------- cut search profile


@dataclass(frozen=True)
class ProfileRows:
    variable: str
    profile: pd.DataFrame          # cut, statistic over the candidate cuts, by cut
    search: dict[str, Any]         # the search row (empty when none)
    legacy_cuts: list[float]
    boot: list[float] | None       # the re-derived cut's 2.5, 25, 50, 75, 97.5th percentiles

    @property
    def maximum(self) -> tuple[float, float] | None:
        """(cut, statistic) at the maximum, when the search row has it."""
        s = self.search
        if finite(s.get("cut")) and finite(s.get("statistic")):
            return float(s["cut"]), float(s["statistic"])
        return None

    def pvalues(self) -> str:
        s = self.search
        return (f"naive p {_p(s.get('p_naive'))} · corrected p (Lausen–Schumacher) "
                f"{_p(s.get('p_lausen'))}"
                + (f" · Altman p {_p(s.get('p_altman'))}" if finite(s.get("p_altman")) else "")
                + (f" · permutation p {_p(s.get('p_permutation'))}"
                   if finite(s.get("p_permutation")) else ""))


def select_profile(df: pd.DataFrame) -> ProfileRows | None:
    """The cut search of one analysis' cutpoints table; None without profile rows."""
    if df.empty or "row_type" not in df:
        return None
    prof = df[df["row_type"] == "profile"].sort_values("cut")
    if prof.empty:
        return None
    search = df[df["row_type"] == "search"]
    s = search.iloc[0].to_dict() if len(search) else {}
    var = str(prof["variable"].iloc[0])
    legacy = df[(df["row_type"] == "cut") & (df["variable"] == var)]["cut"].dropna()
    boot = ([float(s[k]) for k in BOOT_QUANTILES]
            if all(finite(s.get(k)) for k in BOOT_QUANTILES) else None)
    return ProfileRows(var, prof.reset_index(drop=True), s, [float(c) for c in legacy], boot)


# The 95th percentile of chi-squared on 1 df (scipy.stats.chi2.ppf(0.95, 1)), kept as a number so
# that drawing figures does not import scipy.
CHI2_1_95 = 3.841458820694124


def draw_statistic(ax: Any, sel: ProfileRows) -> None:
    """The split statistic over the candidate cuts, the naive 5% line, the legacy cuts and the
    maximum."""
    prof = sel.profile
    ax.plot(prof["cut"], prof["statistic"], color=SPLINE, lw=1.6, marker="o", ms=3, zorder=3)
    crit = CHI2_1_95
    ax.axhline(crit, color=MUTED, lw=1.0, ls=(0, (5, 3)), zorder=2)
    ax.annotate("naive 5% level", (float(prof["cut"].min()), crit), xytext=(2, 3),
                textcoords="offset points", fontsize=7.5, color=MUTED)
    for c in sel.legacy_cuts:
        ax.axvline(c, color=LEGACY, lw=2.0, zorder=2)
        ax.annotate(f"legacy cut {fmt_number(c)}", (c, 1.0), xycoords=("data", "axes fraction"),
                    xytext=(3, -3), textcoords="offset points", va="top", fontsize=7.5, color=INK)
    if sel.maximum is not None:
        cut, stat = sel.maximum
        ax.plot([cut], [stat], marker="v", ms=9, color=INK, ls="none", zorder=4)
        ax.annotate(f"maximum {stat:.1f} at {fmt_number(cut)}", (cut, stat), xytext=(6, 4),
                    textcoords="offset points", fontsize=7.5, color=INK)
    ax.set_ylim(0, float(np.nanmax(prof["statistic"].astype(float))) * 1.12)
    ax.set_ylabel("Split statistic (χ², 1 df)")
    value_ticks(ax.xaxis, 8)
    ax.set_title(sel.pvalues(), fontsize=8, fontweight="normal", color=INK)


def draw_bootstrap(boot: Any, sel: ProfileRows, xlim: tuple[float, float]) -> None:
    """The re-derived cut's bootstrap percentiles as a bar under the profile."""
    assert sel.boot is not None
    q = sel.boot
    boot.plot([q[0], q[4]], [0, 0], color=SPLINE, lw=1.4)
    boot.plot([q[1], q[3]], [0, 0], color=SPLINE, lw=6, solid_capstyle="butt")
    boot.plot([q[2]], [0], marker="o", ms=6, color="white", mec=SPLINE, mew=1.4)
    for c in sel.legacy_cuts:
        boot.axvline(c, color=LEGACY, lw=2.0, zorder=0)
    boot.set_yticks([0], ["bootstrap"])
    boot.tick_params(axis="y", length=0)
    boot.set_ylim(-1, 1)
    boot.grid(False)
    boot.set_xlim(xlim)
    value_ticks(boot.xaxis, 8)


def profile_alt(sel: ProfileRows, label: str) -> str:
    prof = sel.profile
    top = sel.maximum
    return (f"Line chart of the split statistic over {len(prof)} candidate cuts of {label} from "
            f"{fmt_number(float(prof['cut'].min()))} to {fmt_number(float(prof['cut'].max()))}"
            + (f"; maximum {top[1]:.1f} at {fmt_number(top[0])}" if top is not None else "")
            + "; legacy cut(s) " + ", ".join(fmt_number(c) for c in sel.legacy_cuts)
            + f"; {sel.pvalues()}"
            + (f"; bootstrap re-derived cut 2.5–97.5th percentile {fmt_number(sel.boot[0])} to "
               f"{fmt_number(sel.boot[4])}" if sel.boot is not None else "") + ".")


@per_analysis("cutpoints", select_profile)
def draw_profile(ctx: Context, sel: ProfileRows, cohort: str, analysis: str) -> Drawn | None:
    footnote = (f"Statistic: {sel.search.get('statistic_name') or 'split statistic'}, over every "
                "candidate cut in the search range. Dashed: the naive 5% level of one test "
                "(χ², 1 df), which the maximum of many tests overstates.\n"
                + ("Bar below: the cut re-derived in bootstrap samples (thin 2.5–97.5th, thick "
                   "25–75th percentile, dot: median)." if sel.boot is not None else ""))
    fig_, fig = new_figure(9.0, 4.6, footnote)
    ax, boot = (fig.subplots(2, 1, height_ratios=[5, 0.9]) if sel.boot is not None
                else (fig.subplots(), None))
    draw_statistic(ax, sel)
    if boot is not None:
        draw_bootstrap(boot, sel, ax.get_xlim())
        ax.tick_params(labelbottom=False)
    (boot if boot is not None else ax).set_xlabel(ctx.spec.label(sel.variable))
    head = f"{analysis}: searching for the \"optimal\" cut of {sel.variable}"
    title(fig, head + ctx.suffix(cohort))
    caption = ("A cut picked where this curve peaks looks more significant than it is: compare "
               "the naive p-value with the corrected ones, and see how far the re-derived cut "
               "wanders between bootstrap samples.")
    return Drawn(fig_, head, profile_alt(sel, ctx.spec.label(sel.variable)), caption)
