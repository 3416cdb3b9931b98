"""The cut-point audit: where every legacy cut sits in the analysis sample (percentile), and, for a
cut chosen from the data, the split statistic over every candidate cut with the maximum, the
legacy cut, the naive 5% line and the bootstrap spread of the re-derived cut."""

from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.ticker import FuncFormatter, MaxNLocator
from scipy import stats

from .base import Context, Drawn, finite
from .style import GRID, INK, LEGACY, MUTED, NEUTRAL, SPLINE, fmt_number, new_figure, title


def _p(v: object) -> str:
    if not finite(v):
        return "–"
    f = float(v)  # type: ignore[arg-type]
    return "<0.001" if f < 0.001 else f"{f:.3f}"


def draw_positions(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    assert cohort is not None and analysis is not None
    df = ctx.rows("cutpoints", cohort, analysis)
    if df.empty or "row_type" not in df:
        return None
    cuts = df[(df["row_type"] == "cut") & df["percentile"].notna()]
    if cuts.empty:
        return None
    variables = list(dict.fromkeys(
        [*cuts.loc[cuts["role"] == "exposure", "variable"], *cuts["variable"]]))
    n = len(variables)
    footnote = ("Each cut at its percentile in the analysis sample (the share of rows below it); "
                "the sample median is at 50. Ember: the exposure's cuts; grey: cuts of grouped "
                "adjustment variables.")
    fig_, fig = new_figure(9.0, 1.5 + 0.55 * n, footnote)
    ax = fig.subplots()
    ys = np.arange(n)[::-1]
    alt_parts = []
    for y, var in zip(ys, variables, strict=True):
        v = cuts[cuts["variable"] == var].sort_values("cut")
        exposure = (v["role"] == "exposure").any()
        colour = LEGACY if exposure else NEUTRAL
        ax.plot([0, 100], [y, y], color=GRID, lw=5, solid_capstyle="round", zorder=1)
        ax.plot([50], [y], marker="|", ms=14, mew=1.5, color=INK, zorder=2)
        ax.plot(v["percentile"], [y] * len(v), marker="D", ms=7, color=colour, ls="none",
                zorder=3)
        for r in v.itertuples():
            ax.annotate(fmt_number(float(r.cut)), (float(r.percentile), y), xytext=(0, 7),
                        textcoords="offset points", ha="center", va="bottom", fontsize=7.5,
                        color=INK)
        alt_parts.append(f"{ctx.spec.label(var)}: " + ", ".join(
            f"{fmt_number(float(r.cut))} at the {float(r.percentile):.0f}th percentile"
            for r in v.itertuples()))
    ax.set_yticks(ys, [ctx.spec.label(v) + (" (exposure)" if (
        cuts.loc[cuts["variable"] == v, "role"] == "exposure").any() else "") for v in variables])
    ax.set_ylim(-0.7, n - 0.2)
    ax.set_xlim(-2, 102)
    ax.set_xticks([0, 10, 25, 50, 75, 90, 100])
    ax.set_xlabel("Percentile of the analysis sample")
    ax.grid(True, axis="x")
    ax.grid(False, axis="y")
    ax.tick_params(axis="y", length=0)
    head = f"{analysis}: where the legacy cuts sit"
    title(fig, head + ("" if len(ctx.spec.cohorts) == 1 else f" — {cohort}"))
    alt = ("Strip chart of percentiles 0 to 100, one row per grouped variable, a tick at the "
           "median. " + "; ".join(alt_parts) + ".")
    caption = ("Cuts far from the middle leave small extreme groups; cuts at round clinical "
               "values can sit anywhere in a particular sample's distribution.")
    return Drawn(fig_, head, alt, caption)


def draw_profile(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    assert cohort is not None and analysis is not None
    df = ctx.rows("cutpoints", cohort, analysis)
    if df.empty or "row_type" not in df:
        return None
    prof = df[df["row_type"] == "profile"].sort_values("cut")
    search = df[df["row_type"] == "search"]
    if prof.empty:
        return None
    s = search.iloc[0] if len(search) else pd.Series(dtype=object)
    var = str(prof["variable"].iloc[0])
    legacy_cuts = df[(df["row_type"] == "cut") & (df["variable"] == var)]["cut"].dropna()
    has_boot = finite(s.get("boot_cut_p2_5")) and finite(s.get("boot_cut_p97_5"))
    footnote = (f"Statistic: {s.get('statistic_name') or 'split statistic'}, over every "
                "candidate cut in the search range. Dashed: the naive 5% level of one test "
                "(χ², 1 df), which the maximum of many tests overstates.\n"
                + ("Bar below: the cut re-derived in bootstrap samples (thin 2.5–97.5th, thick "
                   "25–75th percentile, dot: median)." if has_boot else ""))
    fig_, fig = new_figure(9.0, 4.6, footnote)
    if has_boot:
        ax, boot = fig.subplots(2, 1, height_ratios=[5, 0.9])
    else:
        ax, boot = fig.subplots(), None
    ax.plot(prof["cut"], prof["statistic"], color=SPLINE, lw=1.6, marker="o", ms=3, zorder=3)
    crit = float(stats.chi2.ppf(0.95, 1))
    ax.axhline(crit, color=MUTED, lw=1.0, ls=(0, (5, 3)), zorder=2)
    ax.annotate("naive 5% level", (float(prof["cut"].min()), crit), xytext=(2, 3),
                textcoords="offset points", fontsize=7.5, color=MUTED)
    for c in legacy_cuts:
        ax.axvline(float(c), color=LEGACY, lw=2.0, zorder=2)
        ax.annotate(f"legacy cut {fmt_number(float(c))}", (float(c), 1.0), xycoords=(
            "data", "axes fraction"), xytext=(3, -3), textcoords="offset points", va="top",
            fontsize=7.5, color=INK)
    if finite(s.get("cut")) and finite(s.get("statistic")):
        ax.plot([float(s["cut"])], [float(s["statistic"])], marker="v", ms=9, color=INK,
                ls="none", zorder=4)
        ax.annotate(f"maximum {float(s['statistic']):.1f} at {fmt_number(float(s['cut']))}",
                    (float(s["cut"]), float(s["statistic"])), xytext=(6, 4),
                    textcoords="offset points", fontsize=7.5, color=INK)
    ax.set_ylim(0, float(np.nanmax(prof["statistic"].astype(float))) * 1.12)
    ax.set_ylabel("Split statistic (χ², 1 df)")
    ax.xaxis.set_major_locator(MaxNLocator(nbins=8, steps=[1, 2, 2.5, 5, 10]))
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:g}"))
    pvals = (f"naive p {_p(s.get('p_naive'))} · corrected p (Lausen–Schumacher) "
             f"{_p(s.get('p_lausen'))}" + (f" · Altman p {_p(s.get('p_altman'))}"
                                            if finite(s.get("p_altman")) else "")
             + (f" · permutation p {_p(s.get('p_permutation'))}"
                if finite(s.get("p_permutation")) else ""))
    ax.set_title(pvals, fontsize=8, fontweight="normal", color=INK)
    target = boot if boot is not None else ax
    if boot is not None:
        q = [float(s[k]) for k in ("boot_cut_p2_5", "boot_cut_p25", "boot_cut_p50",
                                   "boot_cut_p75", "boot_cut_p97_5")]
        boot.plot([q[0], q[4]], [0, 0], color=SPLINE, lw=1.4)
        boot.plot([q[1], q[3]], [0, 0], color=SPLINE, lw=6, solid_capstyle="butt")
        boot.plot([q[2]], [0], marker="o", ms=6, color="white", mec=SPLINE, mew=1.4)
        for c in legacy_cuts:
            boot.axvline(float(c), color=LEGACY, lw=2.0, zorder=0)
        boot.set_yticks([0], ["bootstrap"])
        boot.tick_params(axis="y", length=0)
        boot.set_ylim(-1, 1)
        boot.grid(False)
        boot.set_xlim(ax.get_xlim())
        boot.xaxis.set_major_locator(MaxNLocator(nbins=8, steps=[1, 2, 2.5, 5, 10]))
        boot.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:g}"))
        ax.tick_params(labelbottom=False)
    target.set_xlabel(ctx.spec.label(var))
    head = f"{analysis}: searching for the \"optimal\" cut of {var}"
    title(fig, head + ("" if len(ctx.spec.cohorts) == 1 else f" — {cohort}"))
    alt = (f"Line chart of the split statistic over {len(prof)} candidate cuts of "
           f"{ctx.spec.label(var)} from {fmt_number(float(prof['cut'].min()))} to "
           f"{fmt_number(float(prof['cut'].max()))}"
           + (f"; maximum {float(s['statistic']):.1f} at {fmt_number(float(s['cut']))}"
              if finite(s.get("cut")) and finite(s.get("statistic")) else "")
           + "; legacy cut(s) " + ", ".join(fmt_number(float(c)) for c in legacy_cuts)
           + f"; {pvals}"
           + (f"; bootstrap re-derived cut 2.5–97.5th percentile {fmt_number(q[0])} to "
              f"{fmt_number(q[4])}" if boot is not None else "") + ".")
    caption = ("A cut picked where this curve peaks looks more significant than it is: compare "
               "the naive p-value with the corrected ones, and see how far the re-derived cut "
               "wanders between bootstrap samples.")
    return Drawn(fig_, head, alt, caption)
