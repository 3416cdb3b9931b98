"""Drawing pieces several figure kinds share: the legacy step function, a curve with its band,
the reference marker, readable value ticks, effect values in words."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from matplotlib.axis import Axis
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import FuncFormatter, MaxNLocator

from .style import (
    BAND_ALPHA,
    INK,
    LEGACY,
    LEGACY_HATCH,
    clipped_span,
    effect_axis,
    fmt_number,
    fmt_ratio,
    is_ratio,
    null_value,
)


def value_ticks(axis: Axis, nbins: int = 6) -> None:
    """Round-number ticks printed as short plain numbers."""
    axis.set_major_locator(MaxNLocator(nbins=nbins, steps=[1, 2, 2.5, 5, 10]))
    axis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))


def draw_steps(ax: Any, steps: Sequence[dict[str, float]], risers: bool = False) -> None:
    """The legacy step function: a thick level per group over its hatched interval (none for the
    reference group, whose interval is empty); dotted risers between groups when asked."""
    for s in steps:
        if s["upper"] > s["lower"]:
            ax.fill_between([s["x0"], s["x1"]], s["lower"], s["upper"], facecolor="none",
                            edgecolor=LEGACY, hatch=LEGACY_HATCH, lw=0, zorder=2)
        ax.plot([s["x0"], s["x1"]], [s["effect"]] * 2, color=LEGACY, lw=2.4, zorder=3,
                solid_capstyle="butt")
    if risers:
        for s0, s1 in zip(steps, steps[1:], strict=False):
            ax.plot([s0["x1"]] * 2, [s0["effect"], s1["effect"]], color=LEGACY, lw=1,
                    ls=(0, (1, 1.5)), zorder=3)


def steps_handle() -> tuple[Patch, Line2D]:
    """The legend entry of the legacy step function."""
    return (Patch(facecolor="none", edgecolor=LEGACY, hatch=LEGACY_HATCH, lw=0),
            Line2D([], [], color=LEGACY, lw=2.4))


def draw_curve(ax: Any, rows: Any, colour: str, ls: Any = "-", lw: float = 2.0) -> None:
    """A curve (rows with x, effect, effect_lower, effect_upper, sorted by x) over its band."""
    ax.fill_between(rows["x"], rows["effect_lower"], rows["effect_upper"], color=colour,
                    alpha=BAND_ALPHA, lw=0, zorder=2.5)
    ax.plot(rows["x"], rows["effect"], color=colour, lw=lw, ls=ls, zorder=4)


def mark_reference(ax: Any, x_ref: float, scale: str) -> None:
    """The open circle at the reference value, on the null line."""
    ax.plot([x_ref], [null_value(scale)], marker="o", ms=5, mfc="white", mec=INK, mew=1.1,
            ls="none", zorder=5)


def reference_handle() -> Line2D:
    return Line2D([], [], marker="o", ms=5, mfc="white", mec=INK, ls="none")


def effect_text(v: float, scale: str, digits: int = 2) -> str:
    """One effect value as the alt texts state it: ratios like the ratio axis, differences to
    ``digits`` significant digits."""
    return fmt_ratio(v) if is_ratio(scale) else fmt_number(v, digits)


def effect_limits(rows: Any, scale: str, extra: Sequence[float] = ()) -> tuple[float, float]:
    """The effect axis span of curve rows (effects, ``extra`` values, and their bands clipped as
    ``clipped_span`` does)."""
    return clipped_span([*rows["effect"].astype(float), *extra],
                        [*rows["effect_lower"].astype(float), *rows["effect_upper"].astype(float)],
                        scale)


def padded(values: Any, share: float = 0.01) -> tuple[float, float]:
    """The span of ``values`` widened by ``share`` of itself on each side."""
    lo, hi = float(values.min()), float(values.max())
    return lo - share * (hi - lo), hi + share * (hi - lo)


def effect_panel(ax: Any, scale: str, ylim: tuple[float, float],
                 xlim: tuple[float, float]) -> None:
    """An exposure-by-effect panel: the effect axis (log for ratios) and round exposure ticks."""
    effect_axis(ax, scale, *ylim)
    ax.set_xlim(*xlim)
    value_ticks(ax.xaxis)


def row_axis(ax: Any, n: int, labels: Sequence[str] | None = None, low: float = -0.7,
             high: float = 0.3) -> None:
    """A chart with one row per item (top first): vertical grid lines only, row labels without
    tick marks, rows from ``low`` to ``n - high``."""
    ax.grid(True, axis="x")
    ax.grid(False, axis="y")
    ax.tick_params(axis="y", length=0)
    ax.set_ylim(low, n - high)
    if labels is not None:
        ax.set_yticks(list(range(n))[::-1], list(labels))
