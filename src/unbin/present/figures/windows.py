"""The exposure's effect by follow-up window, the windows side by side: one panel per window of
the ``windows`` table (survival analyses with ``follow_up_windows``), each with the test
spline's curve and its band and the legacy groups' estimates (at each group's median exposure,
with their intervals), on one hazard-ratio axis (log scale) with the same limits in every panel;
the change-over-follow-up test's p in the title.

Row selection (``select_windows``, ``window_label``), drawing (``draw_window``) and alt text
(``windows_alt``); ``draw`` joins them."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from .. import text
from .base import Context, Drawn, Exposure, finite
from .curves import ADJUSTMENT_ORDER, ADJUSTMENT_TEXT
from .parts import (
    draw_curve,
    effect_panel,
    effect_text,
    mark_reference,
    padded,
    reference_handle,
)
from .style import (
    BAND_ALPHA,
    FORM_MARKERS,
    LEGACY,
    SPLINE,
    clipped_span,
    effect_label,
    fmt_number,
    new_figure,
    title,
)

CURVE_FORM = "test_spline"
MAX_POINTS = 50
GROUP_FORM = "legacy"


@dataclass(frozen=True)
class Window:
    """One follow-up window's rows: the spline's curve (x, effect, effect_lower, effect_upper,
    sorted by x) and the legacy groups' contrasts (group, x, effect, effect_lower,
    effect_upper)."""

    label: str
    events: float          # NaN when suppressed or not given
    curve: pd.DataFrame
    groups: pd.DataFrame


@dataclass(frozen=True)
class WindowRows:
    adjustment: str
    scale: str
    x_reference: float
    windows: list[Window]
    p_curve: float         # the change test of the spline (NaN when not available)
    p_groups: float        # the change test of the legacy groups

    def all_rows(self) -> pd.DataFrame:
        return pd.concat([p for w in self.windows for p in (w.curve, w.groups)],
                         ignore_index=True)


def window_label(lower: float, upper: float, unit: str = "") -> str:
    """'0–1 years', '3+ years' (the time variable's unit; without one, '0–1', '3+')."""
    tail = f" {unit}" if unit else ""
    if not finite(upper) or np.isinf(float(upper)):
        return f"{float(lower):g}+{tail}"
    return f"{float(lower):g}–{float(upper):g}{tail}"


def _ok(rows: pd.DataFrame) -> pd.DataFrame:
    if "status" in rows:
        rows = rows[rows["status"] == "ok"]
    eff = pd.to_numeric(rows["effect"], errors="coerce").to_numpy(float)
    return rows[np.isfinite(eff) & (eff > 0)]


def _test_p(tab: pd.DataFrame, form: str, adjustment: str) -> float:
    t = tab[(tab["row_type"] == "test") & (tab["form"] == form)
            & (tab["adjustment"] == adjustment)]
    if "status" in t:
        t = t[t["status"] == "ok"]
    return float(t["p"].iloc[0]) if len(t) and finite(t["p"].iloc[0]) else float("nan")


def select_windows(tab: pd.DataFrame, unit: str = "") -> WindowRows | None:
    """The rows of the windows figure from one analysis' windows table: the first adjustment
    coding of the legacy, continuous, unadjusted order whose spline has usable curve rows in
    every window; None when there is none (no windows, or every fit failed)."""
    if tab.empty or "row_type" not in tab:
        return None
    curves = _ok(tab[(tab["row_type"] == "curve") & (tab["form"] == CURVE_FORM)])
    groups = _ok(tab[(tab["row_type"] == "group") & (tab["form"] == GROUP_FORM)])
    if "x" in groups:
        groups = groups[np.isfinite(pd.to_numeric(groups["x"], errors="coerce").to_numpy(float))]
    windows = (tab[tab["row_type"] != "test"][["window", "window_lower", "window_upper"]]
               .drop_duplicates("window").sort_values("window_lower"))
    for adj in ADJUSTMENT_ORDER:
        c = curves[curves["adjustment"] == adj]
        if c.empty or set(c["window"]) != set(windows["window"]):
            continue
        g = groups[groups["adjustment"] == adj]
        out = []
        for _, w in windows.iterrows():
            cw = c[c["window"] == w["window"]].sort_values("x")
            gw = g[g["window"] == w["window"]].sort_values("x")
            ev = cw["events"].iloc[0] if "events" in cw else np.nan
            out.append(Window(window_label(w["window_lower"], w["window_upper"], unit),
                              float(ev) if finite(ev) else float("nan"),
                              cw[["x", "effect", "effect_lower", "effect_upper"]]
                              .reset_index(drop=True),
                              gw[["group", "x", "effect", "effect_lower", "effect_upper"]]
                              .reset_index(drop=True)))
        return WindowRows(adj, str(c["scale"].iloc[0]), float(c["x_reference"].iloc[0]), out,
                          _test_p(tab, CURVE_FORM, adj), _test_p(tab, GROUP_FORM, adj))
    return None


def p_text(p: float) -> str:
    return "p not available" if not finite(p) else (
        "p < 0.001" if p < 0.001 else f"p = {text.pvalue(p)}")


def draw_window(ax: Any, sel: WindowRows, w: Window, ylim: tuple[float, float],
                xlim: tuple[float, float]) -> None:
    """One window: the spline's curve over its band (at most ``MAX_POINTS`` of its grid
    points: a smooth curve, and a light report), the legacy groups' estimates with their
    intervals, the reference value on the null line."""
    keep = np.unique(np.linspace(0, len(w.curve) - 1, min(len(w.curve), MAX_POINTS))
                     .round().astype(int))
    draw_curve(ax, w.curve.iloc[keep], SPLINE)
    if len(w.groups):
        e = w.groups["effect"].to_numpy(float)
        lo = np.minimum(w.groups["effect_lower"].to_numpy(float), e)
        hi = np.maximum(w.groups["effect_upper"].to_numpy(float), e)
        ax.errorbar(w.groups["x"].to_numpy(float), e, yerr=[e - lo, hi - e], fmt="none",
                    ecolor=LEGACY, elinewidth=1.6, capsize=0, zorder=4.5)
        ax.plot(w.groups["x"].to_numpy(float), e, ls="none", marker=FORM_MARKERS["legacy"],
                ms=5, mfc=LEGACY, mec="white", mew=0.6, zorder=5)
    mark_reference(ax, sel.x_reference, sel.scale)
    effect_panel(ax, sel.scale, ylim, xlim)


def windows_alt(sel: WindowRows, ex: Exposure, outcome: str) -> str:
    """What is plotted, per window its events, the curve's ends and extremes and every group's
    estimate, and the change tests."""
    scale = sel.scale
    parts = []
    for w in sel.windows:
        c = w.curve
        xs, e = c["x"].to_numpy(float), c["effect"].to_numpy(float)
        lo_i, hi_i = int(np.argmin(e)), int(np.argmax(e))
        events = f", {text.count(w.events)} events" if finite(w.events) else ""
        groups = "; ".join(
            f"{g['group']} {effect_text(g['effect'], scale)} ({effect_text(g['effect_lower'], scale)}"
            f" to {effect_text(g['effect_upper'], scale)})" for _, g in w.groups.iterrows())
        parts.append(
            f"{w.label}{events}: spline from {effect_text(e[0], scale)} at {fmt_number(xs[0])}"
            f"{ex.unit} to {effect_text(e[-1], scale)} at {fmt_number(xs[-1])}{ex.unit}, lowest "
            f"{effect_text(e[lo_i], scale)} at {fmt_number(xs[lo_i])}, highest "
            f"{effect_text(e[hi_i], scale)} at {fmt_number(xs[hi_i])}"
            + (f"; legacy groups {groups}" if groups else ""))
    return (f"{scale[0].upper() + scale[1:]} of {outcome} against {ex.label} in each window of "
            f"follow-up, {ADJUSTMENT_TEXT[sel.adjustment]}, relative to "
            f"{fmt_number(sel.x_reference)}{ex.unit}; {len(sel.windows)} panels with the same "
            f"axis. {'. '.join(parts)}. Test that the effect is the same in every window: spline "
            f"{p_text(sel.p_curve)}, legacy groups {p_text(sel.p_groups)}.")


def draw(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    assert cohort is not None and analysis is not None
    o = ctx.spec.analysis(analysis).outcome
    info = ctx.spec.variables.get(o.time or "")
    sel = select_windows(ctx.rows("windows", cohort, analysis),
                         info.unit if info and info.unit else "")
    if sel is None:
        return None
    ex = ctx.exposure(analysis)
    outcome = ctx.outcome_label(analysis)
    rows = sel.all_rows()
    xlim = padded(rows["x"].astype(float))
    ylim = clipped_span(list(rows["effect"].astype(float)),
                        [*rows["effect_lower"].astype(float), *rows["effect_upper"].astype(float)],
                        sel.scale)
    if not all(np.isfinite(ylim)):
        return None
    n = len(sel.windows)
    ref = f"{ex.short} {fmt_number(sel.x_reference)}{ex.unit}"
    footnote = (f"Band: pointwise 95% confidence interval of the spline (clipped at the panel "
                f"edge); squares: legacy groups at their median {ex.short}, with 95% intervals. "
                f"Effects relative to {ref}, {ADJUSTMENT_TEXT[sel.adjustment]}; adjusters "
                f"common to all windows. Events per window below {ctx.spec.min_cell} are not "
                f"shown.")
    fig_, fig = new_figure(min(0.8 + 2.9 * n, 14.0), 3.9, footnote)
    gs = fig.add_gridspec(1, n)
    for j, w in enumerate(sel.windows):
        ax = fig.add_subplot(gs[0, j])
        draw_window(ax, sel, w, ylim, xlim)
        events = f" · {text.count(w.events)} events" if finite(w.events) else ""
        ax.set_title(w.label + events)
        ax.set_xlabel(ex.label)
        if j == 0:
            ax.set_ylabel(f"{effect_label(sel.scale, outcome)}\nvs {ref}")
        else:
            ax.tick_params(labelleft=False)
    handles: list[Any] = [(Patch(color=SPLINE, alpha=BAND_ALPHA, lw=0),
                           Line2D([], [], color=SPLINE, lw=2)),
                          Line2D([], [], color=LEGACY, marker=FORM_MARKERS["legacy"], ms=5,
                                 mec="white", lw=1.6),
                          reference_handle()]
    fig.legend(handles, ["spline", "legacy groups", f"reference ({ref})"],
               loc="outside lower left", ncols=3)
    head = f"{analysis}: {sel.scale} by follow-up window"
    tests = f"Same effect in every window: spline {p_text(sel.p_curve)}"
    if finite(sel.p_groups):
        tests += f", groups {p_text(sel.p_groups)}"
    title(fig, f"{head}{ctx.suffix(cohort)}\n{tests}")
    caption = ("The exposure's effect refitted in each window of follow-up (the sample split at "
               "the window cuts). Curves that differ between panels beyond their bands mean one "
               "hazard ratio over all of follow-up averages over an effect that changes with "
               "time since entry; the p-values test that the effect is the same in every "
               "window.")
    return Drawn(fig_, head, windows_alt(sel, ex, outcome), caption)
