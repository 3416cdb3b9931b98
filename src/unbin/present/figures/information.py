"""What each legacy grouping keeps: per analysis, the share of the exposure's information the
groups keep (LR chi-square of the groups over that of groups + spline), with its bootstrap
interval when the study-level table ``information_bootstrap`` has one, and the exposure's LR
chi-square in every form on one log axis.

Row selection (``select_information``), drawing (``draw_kept``, ``draw_lr``) and alt text
(``information_alt``); ``draw`` joins them."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from matplotlib.lines import Line2D
from matplotlib.ticker import FixedLocator, FuncFormatter, NullLocator

from .base import Context, Drawn
from .style import (
    FORM_COLOURS,
    FORM_MARKERS,
    FORM_NAMES,
    GRID,
    INK,
    LEGACY,
    new_figure,
    ratio_ticks,
    title,
)

LR_FORMS = ("legacy", "linear", "spline", "fp", "legacy_plus_spline")
ADJUSTMENT = "legacy"
BOOTSTRAP = "information_bootstrap"
KEYS = ["cohort", "analysis", "adjustment"]


def form_key(form: str) -> str:
    """The palette's name of an LR column's form."""
    return "legacy+spline" if form == "legacy_plus_spline" else form


def select_information(info: pd.DataFrame, boot: pd.DataFrame,
                       jobs: list[tuple[str, str]]) -> pd.DataFrame:
    """One row per (cohort, analysis) with the legacy adjustment, in spec order: the information
    table's columns, plus ``kept_lower``, ``kept_upper``, ``level``, ``replicates`` and
    ``replicates_used`` from the bootstrap table's rows with status 'ok' whose own
    ``info_kept`` is the information table's (NaN without one: an interval of another
    quantity, e.g. a resampled share beside a share combined over imputed sets, is never drawn
    beside the point; as ``unbin.present.summary.kept_interval``)."""
    extra = ["kept_lower", "kept_upper", "level", "replicates", "replicates_used"]
    if info.empty:
        return info
    if "adjustment" in info:
        info = info[info["adjustment"] == ADJUSTMENT]
    order = {key: i for i, key in enumerate(jobs)}
    jobs_of = list(zip(info["cohort"], info["analysis"], strict=True))
    info = info.assign(_order=[order.get(k, len(order)) for k in jobs_of])
    info = info.sort_values("_order").drop(columns="_order").reset_index(drop=True)
    if boot.empty or not set(KEYS) <= set(boot.columns) or "info_kept_lower" not in boot:
        return info.assign(**{c: np.nan for c in extra})
    ok = boot[boot["status"] == "ok"] if "status" in boot else boot
    ok = ok.rename(columns={"info_kept_lower": "kept_lower", "info_kept_upper": "kept_upper"})
    if "adjustment" in info:
        keys = KEYS
    else:  # an information table from before adjustment codings: its rows are the legacy one
        keys, ok = KEYS[:2], ok[ok["adjustment"] == ADJUSTMENT]
    own = ["info_kept"] if "info_kept" in ok else []
    ok = ok.drop_duplicates(keys)[[*keys, *own, *[c for c in extra if c in ok]]]
    merged = info.merge(ok.rename(columns={"info_kept": "_boot_kept"}), on=keys, how="left")
    merged = merged.assign(**{c: np.nan for c in extra if c not in merged})
    point = (merged["info_kept"].astype(float).to_numpy() if "info_kept" in merged
             else np.full(len(merged), np.nan))
    theirs = (merged.pop("_boot_kept").astype(float).to_numpy() if own
              else np.full(len(merged), np.nan))
    same = np.isclose(theirs, point, rtol=1e-9, atol=1e-12)  # NaN on either side: not the same
    merged.loc[~same, extra] = np.nan
    return merged


def lr_forms(rows: pd.DataFrame) -> list[str]:
    return [f for f in LR_FORMS if f"lr_{f}" in rows and rows[f"lr_{f}"].notna().any()]


def draw_kept(ax: Any, rows: pd.DataFrame, labels: list[str]) -> None:
    """Bars of the share kept (grey frame: 100%), the bootstrap interval as a whisker."""
    n = len(rows)
    ys = np.arange(n)[::-1]
    kept = rows["info_kept"].astype(float).to_numpy() if "info_kept" in rows else np.full(n, np.nan)
    ax.barh(ys, np.ones(n), height=0.56, color="none", edgecolor=GRID, lw=1.0)
    ax.barh(ys, np.where(np.isfinite(kept), np.clip(kept, 0, 1), 0), height=0.56, color=LEGACY,
            lw=0)
    lo, hi = rows["kept_lower"].astype(float).to_numpy(), rows["kept_upper"].astype(float).to_numpy()
    has = np.isfinite(lo) & np.isfinite(hi)
    if has.any():
        ax.errorbar(np.clip(kept[has], 0, 1), ys[has],
                    xerr=[np.clip(kept[has] - lo[has], 0, None), np.clip(hi[has] - kept[has], 0,
                                                                        None)],
                    fmt="none", ecolor=INK, elinewidth=1.1, capsize=3, zorder=3)
    for y, k, top in zip(ys, kept, np.where(has, hi, kept), strict=True):
        text = f"{k:.0%}" if np.isfinite(k) else "not estimable"
        at = min(max(top, 0), 1) + 0.015 if np.isfinite(k) else 0.015
        ax.text(at, y, text, va="center", ha="left", fontsize=8, color=INK)
    ax.set_xlim(0, 1.18)
    ax.xaxis.set_major_locator(FixedLocator([0, 0.25, 0.5, 0.75, 1]))
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:.0%}"))
    ax.set_yticks(ys, labels)
    ax.grid(False)
    ax.set_title("Information kept by the legacy groups")
    ax.set_xlabel("Share of the exposure's LR χ² kept")
    ax.tick_params(axis="y", length=0)
    ax.set_ylim(-0.6, n - 0.4)


def draw_lr(ax: Any, rows: pd.DataFrame, forms: list[str]) -> None:
    """Each form's LR chi-square on a log axis, forms side by side in each row."""
    n = len(rows)
    ys = np.arange(n)[::-1]
    values: list[float] = []
    for i, form in enumerate(forms):
        offset = (i - (len(forms) - 1) / 2) * 0.13   # forms side by side, never hidden
        key = form_key(form)
        v = rows[f"lr_{form}"].astype(float).to_numpy()
        ok = np.isfinite(v) & (v > 0)
        values += v[ok].tolist()
        ax.scatter(v[ok], ys[ok] - offset, s=34, marker=FORM_MARKERS[key],
                   color=FORM_COLOURS[key], zorder=3, lw=0.8,
                   facecolors="white" if key == "legacy+spline" else FORM_COLOURS[key])
    for y, (_, row) in zip(ys, rows.iterrows(), strict=True):
        vals = [float(row[f"lr_{f}"]) for f in forms
                if np.isfinite(float(row[f"lr_{f}"])) and float(row[f"lr_{f}"]) > 0]
        if vals:
            ax.plot([min(vals), max(vals)], [y, y], color=GRID, lw=2.2, zorder=2)
    if values:
        lo, hi = min(values) / 1.6, max(values) * 1.6
        ax.set_xscale("log")
        ax.set_xlim(lo, hi)
        ax.xaxis.set_major_locator(FixedLocator(ratio_ticks(lo, hi, most=7)))
        ax.xaxis.set_minor_locator(NullLocator())
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:g}"))
    ax.grid(True, axis="x")
    ax.grid(False, axis="y")
    ax.set_ylim(-0.6, n - 0.4)
    ax.set_yticks(ys, [""] * n)
    ax.set_title("Exposure LR χ², by form")
    ax.set_xlabel("LR χ² (log scale)")
    ax.tick_params(axis="y", length=0)


def information_alt(rows: pd.DataFrame, labels: list[str], forms: list[str]) -> str:
    """The alt text: per row, the share kept (with its bootstrap interval) and each LR χ²."""
    parts = []
    for lab, (_, row) in zip(labels, rows.iterrows(), strict=True):
        k = float(row["info_kept"]) if "info_kept" in row else float("nan")
        if not np.isfinite(k):
            parts.append(f"{lab}: not estimable")
            continue
        lrs = ", ".join(f"{FORM_NAMES[form_key(f)]} {float(row[f'lr_{f}']):.1f}" for f in forms
                        if np.isfinite(float(row[f"lr_{f}"])))
        lo, hi = float(row["kept_lower"]), float(row["kept_upper"])
        ci = (f", {float(row['level']):.0%} bootstrap interval {lo:.0%} to {hi:.0%}"
              if np.isfinite(lo) and np.isfinite(hi) and np.isfinite(float(row["level"])) else "")
        parts.append(f"{lab}: groups keep {k:.0%} of the information{ci} (LR χ² {lrs})")
    return ("Two-panel chart, one row per analysis. Left: bars of the share of the exposure's "
            "information kept by the legacy grouping. Right: the exposure's likelihood-ratio "
            "chi-square in each form on a log axis. " + "; ".join(parts) + ".")


def _footnote(rows: pd.DataFrame) -> str:
    text = ("Left: LR χ²(legacy groups) / LR χ²(groups + spline) — the share of what the "
            "exposure tells about the outcome that survives the grouping.")
    boot = rows[np.isfinite(rows["kept_lower"].astype(float))]
    if len(boot):
        used = boot["replicates_used"].astype(float)
        span = (f"{used.min():.0f}" if used.min() == used.max()
                else f"{used.min():.0f}–{used.max():.0f}")
        text += (f" Whiskers: {float(boot['level'].iloc[0]):.0%} bootstrap intervals ({span} "
                 "replicates used).")
    return text + ("\nRight: LR χ² of the exposure in each form, adjusted as in the legacy "
                   "analysis (log axis).")


def draw(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
    rows = select_information(ctx.table("information"), ctx.table(BOOTSTRAP), ctx.jobs())
    if rows.empty:
        return None
    many = len(ctx.spec.cohorts) > 1
    labels = [f"{r.analysis}" + (f" · {r.cohort}" if many else "") for r in rows.itertuples()]
    fig_, fig = new_figure(10.5, 1.9 + 0.42 * len(rows), _footnote(rows))
    left, right = fig.subplots(1, 2, width_ratios=[1, 1.25])
    forms = lr_forms(rows)
    draw_kept(left, rows, labels)
    draw_lr(right, rows, forms)
    handles = [Line2D([], [], ls="none", marker=FORM_MARKERS[form_key(f)], ms=6,
                      color=FORM_COLOURS[form_key(f)],
                      mfc="white" if f == "legacy_plus_spline" else FORM_COLOURS[form_key(f)])
               for f in forms]
    fig.legend(handles, [FORM_NAMES[form_key(f)] for f in forms], loc="outside lower right",
               ncols=len(forms))
    head = "What the legacy groupings keep"
    title(fig, head)
    caption = ("A share near 100% means the grouping lost little; the right panel shows how much "
               "more the continuous forms explain than the groups. Adjusted as in the legacy "
               "analysis.")
    return Drawn(fig_, head, information_alt(rows, labels, forms), caption)
