"""unbin's figure style: the palette, the type and line settings, effect-scale axes, and saving
PNG and SVG with no timestamps or software versions inside (reruns give the same bytes).

The palette gives every *role* one colour, used the same way in every figure: the legacy grouping
is always ``LEGACY`` (a light ember), each continuous form always its own darker ink. The colours
were chosen so that each pair stays apart for readers with protan, deutan or tritan colour vision
and so that the legacy colour differs in lightness from every continuous form (readable when
printed in grey); line styles and hatching carry the same distinction a second time.
``tests/present/test_figures.py`` checks these properties.
"""

from __future__ import annotations

import math
import re
import textwrap
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import matplotlib as mpl
import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure, FigureBase, SubFigure
from matplotlib.ticker import FixedLocator, FuncFormatter, MaxNLocator, NullLocator
from matplotlib.transforms import Bbox

from .canvases import CachedCanvasSVG, PngCanvas, kept_text_layouts

# --------------------------------------------------------------------------- palette

INK = "#23262b"          # text, reference lines
MUTED = "#5b6068"        # secondary text, spines
GRID = "#e4e1da"         # grid lines
PANEL = "#fbfaf7"        # axes background (warm off-white)
RUG = "#aab0b9"          # exposure distribution bars

LEGACY = "#e07a2a"       # the legacy grouping (steps, group estimates)
SPLINE = "#1a365d"       # restricted cubic spline
FP = "#1c6b64"           # fractional polynomial
LINEAR = "#6c5a9e"       # linear
NEUTRAL = "#6b3410"      # crude / unadjusted estimates, treat-all (a dark umber)

FORM_COLOURS: dict[str, str] = {"legacy": LEGACY, "spline": SPLINE, "fp": FP, "linear": LINEAR,
                                "legacy+spline": MUTED, "crude": NEUTRAL}
# The series colours that appear together in one figure (checked for colour-vision safety).
SERIES: dict[str, str] = {"legacy": LEGACY, "spline": SPLINE, "fp": FP, "linear": LINEAR,
                          "crude": NEUTRAL}
FORM_LINES: dict[str, tuple[Any, ...] | str] = {"legacy": "-", "spline": "-", "fp": (0, (6, 2)),
                                                "linear": (0, (1.2, 1.6)), "crude": "-"}
FORM_MARKERS: dict[str, str] = {"legacy": "s", "spline": "o", "fp": "D", "linear": "^",
                                "legacy+spline": "P", "crude": "X"}
FORM_NAMES: dict[str, str] = {"legacy": "legacy groups", "spline": "spline", "fp": "fractional "
                              "polynomial", "linear": "linear", "legacy+spline": "groups + spline"}
LEGACY_HATCH = "////"
BAND_ALPHA = 0.2

DPI = 150
SVG_SALT = "unbin"

STYLE: dict[str, Any] = {
    "font.family": "DejaVu Sans",    # ships with matplotlib: the same glyphs on every machine
    "font.size": 9,
    "axes.titlesize": 9.5,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.titlepad": 6,
    "axes.labelsize": 9,
    "axes.labelcolor": INK,
    "axes.edgecolor": MUTED,
    "axes.linewidth": 0.6,
    "axes.facecolor": PANEL,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "axes.grid.axis": "y",
    "axes.axisbelow": True,
    "grid.color": GRID,
    "grid.linewidth": 0.7,
    "grid.linestyle": "-",
    "xtick.color": MUTED,
    "ytick.color": MUTED,
    "xtick.labelcolor": INK,
    "ytick.labelcolor": INK,
    "xtick.direction": "out",
    "ytick.direction": "out",
    "xtick.major.size": 3,
    "ytick.major.size": 3,
    "xtick.major.width": 0.6,
    "ytick.major.width": 0.6,
    "legend.frameon": False,
    "legend.fontsize": 8,
    "legend.handlelength": 2.6,
    "figure.facecolor": "white",
    "figure.titlesize": 11,
    "figure.titleweight": "bold",
    "hatch.linewidth": 0.7,
    "lines.solid_capstyle": "butt",
    "svg.hashsalt": SVG_SALT,
    "svg.fonttype": "none",          # text as text (a tenth of the size of outlines); the report names fonts
    "path.simplify": True,
}


@contextmanager
def styled() -> Iterator[None]:
    """Everything drawn and saved inside uses unbin's style (and only inside)."""
    with mpl.rc_context(STYLE):  # type: ignore[arg-type]
        yield


def new_figure(width: float, height: float,
               footnote: str | None = None) -> tuple[Figure, SubFigure]:
    """A figure without pyplot (no global state, no GUI backend) and the sub-figure to draw in,
    with constrained layout; a footnote, when given, gets its own strip at the bottom."""
    fig = Figure(figsize=(width, height), layout="constrained")
    if not footnote:
        return fig, fig.add_subfigure(fig.add_gridspec(1, 1)[0])
    chars = int(width * 16)     # 7.5-point DejaVu Sans: about 16 characters to the inch
    footnote = "\n".join(textwrap.fill(par, chars) for par in footnote.split("\n") if par)
    # A 7.5-point line at 1.35 line spacing is 0.14 inch; the text starts 0.06 inch down.
    strip = min(0.45 * height, 0.1 + 0.145 * (footnote.count("\n") + 1))
    grid = fig.add_gridspec(2, 1, height_ratios=[height - strip, strip], hspace=0)
    main, foot = fig.add_subfigure(grid[0]), fig.add_subfigure(grid[1])
    foot.text(0.008, 1 - 0.06 / strip, footnote, ha="left", va="top", fontsize=7.5,
              color=MUTED, linespacing=1.35)
    return fig, main


def title(fig: FigureBase, text: str) -> None:
    fig.suptitle(text, x=0.008, ha="left", color=INK)


def save(fig: Figure, base: Path) -> tuple[Path, Path]:
    """Write ``base.png`` and ``base.svg``; no date, software or version inside either file."""
    base.parent.mkdir(parents=True, exist_ok=True)
    png, svg = base.with_suffix(".png"), base.with_suffix(".svg")
    with styled(), kept_text_layouts():
        fig.set_dpi(DPI)
        # An Agg canvas of its own: the layout and the PNG then use one renderer, so the
        # PNG's drawing reuses the text measurements the layout made (png.py writes the file).
        PngCanvas(fig)
        engine = fig.get_layout_engine()
        if engine is not None:
            # The constrained layout, computed once (without drawing every artist once more
            # with a renderer that discards the drawing).
            engine.execute(fig)
        freeze_layout(fig)
        fig.savefig(png, format="png", dpi=DPI, metadata={"Software": None})
        CachedCanvasSVG(fig)
        fig.savefig(svg, format="svg", metadata={"Date": None, "Creator": None})
    svg.write_text(lighter_svg(svg.read_text(encoding="utf-8")), encoding="utf-8")
    return png, svg


_LONG_DECIMAL = re.compile(r"(?<![\w#.-])(-?\d+\.\d{3,})(?![\w.])")


def lighter_svg(text: str) -> str:
    """Coordinates to two decimals of a point (1/7200 inch): the same drawing to the eye, about
    a third of the bytes (the report inlines every figure)."""
    def short(m: re.Match[str]) -> str:
        v = f"{float(m.group(1)):.2f}".rstrip("0").rstrip(".")
        return "0" if v in ("-0", "") else v

    return re.sub(r"\n[ \t]+", "\n", _LONG_DECIMAL.sub(short, text))


def freeze_layout(fig: Figure, digits: int = 9) -> None:
    """Round every position the layout engine computed and switch the engine off. The
    constrained-layout solver's last bits depend on the process's string-hash seed; rounded
    positions make the files the same in every process (far below a pixel: 1e-9 of the
    figure)."""
    def rounded(b: Bbox) -> Bbox:
        return Bbox(np.round(b.get_points(), digits))

    def visit(f: Figure | SubFigure) -> None:
        for sub in f.subfigs:
            sub.bbox_relative.set(rounded(sub.bbox_relative))
            visit(sub)
        for ax in f.get_axes():
            ax.set_position(rounded(ax.get_position()), which="both")
        for text in f.texts + [t for t in (getattr(f, "_suptitle", None),
                                            getattr(f, "_supxlabel", None),
                                            getattr(f, "_supylabel", None)) if t is not None]:
            x, y = text.get_position()
            text.set_position((round(float(x), digits), round(float(y), digits)))

    visit(fig)
    # No engine at all (not "none": matplotlib then keeps its PlaceHolderLayoutEngine, which
    # makes every savefig draw the figure once more before drawing it for the file): the rounded
    # positions are final.
    fig.set_layout_engine(None)


# --------------------------------------------------------------------------- effect scales

RATIO_SCALES = frozenset({"odds ratio", "hazard ratio", "rate ratio", "risk ratio"})


def is_ratio(scale: str) -> bool:
    return scale in RATIO_SCALES


def null_value(scale: str) -> float:
    return 1.0 if is_ratio(scale) else 0.0


def fmt_ratio(v: float) -> str:
    """A ratio as the report prints it (``present.text.ratio``)."""
    from .. import text

    return text.ratio(v)


def fmt_number(v: float, digits: int = 4) -> str:
    """A short human number: ``digits`` significant digits, no trailing zeros (``present.text.
    number``)."""
    from .. import text

    return text.number(v, digits)


def tick_decimals(ticks: Sequence[float]) -> int:
    """The fewest decimals that print every tick exactly enough (0.1% of its value) and keep
    neighbouring ticks apart."""
    for d in range(0, 6):
        shown = [round(t, d) for t in ticks]
        if len(set(shown)) == len(shown) and all(
                abs(s - t) <= 1e-3 * abs(t) for s, t in zip(shown, ticks, strict=True)):
            return d
    return 6


_MANTISSAS = ((1.0,), (1.0, 2.0, 5.0), (1.0, 1.5, 2.0, 3.0, 5.0, 7.0),
              (1.0, 1.25, 1.5, 2.0, 2.5, 3.0, 4.0, 5.0, 6.0, 8.0))


def ratio_ticks(lo: float, hi: float, most: int = 8) -> list[float]:
    """Readable ticks for a log ratio axis between lo and hi (both > 0): powers of ten, then
    1-2-5, then finer mantissas, the first set with at least three ticks inside; fewer than
    three even with the finest set (a narrow range) falls back to evenly spaced ticks."""
    if not (lo > 0 and hi > lo):
        return [lo] if lo > 0 else []
    k0, k1 = math.floor(math.log10(lo)) - 1, math.ceil(math.log10(hi)) + 1
    for mants in _MANTISSAS:
        ticks = [m * 10.0 ** k for k in range(k0, k1 + 1) for m in mants]
        ticks = sorted({round(t, 12) for t in ticks if lo <= t <= hi})
        if len(ticks) > most:
            step = math.ceil(len(ticks) / most)
            ticks = ticks[::step]
        if len(ticks) >= 3:
            return ticks
    return [float(t) for t in MaxNLocator(nbins=5).tick_values(lo, hi) if lo <= t <= hi]


def effect_axis(ax: Axes, scale: str, lo: float, hi: float, axis: str = "y") -> None:
    """Put an effect on ``ax``'s y (or x) axis: log scale with readable ratio ticks for ratios,
    a linear axis otherwise; a reference line at the null value."""
    which = ax.yaxis if axis == "y" else ax.xaxis
    setlim = ax.set_ylim if axis == "y" else ax.set_xlim
    line = ax.axhline if axis == "y" else ax.axvline
    if is_ratio(scale):
        lo, hi = max(lo, 1e-6), max(hi, lo * 1.01)
        pad = (math.log(hi) - math.log(lo)) * 0.06 or 0.05
        lo, hi = math.exp(math.log(lo) - pad), math.exp(math.log(hi) + pad)
        (ax.set_yscale if axis == "y" else ax.set_xscale)("log")
        setlim(lo, hi)
        ticks = ratio_ticks(lo, hi)
        decimals = tick_decimals(ticks)
        which.set_major_locator(FixedLocator(ticks))
        which.set_minor_locator(NullLocator())
        which.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:.{decimals}f}"))
    else:
        pad = (hi - lo) * 0.06 or 0.5
        setlim(lo - pad, hi + pad)
        which.set_major_locator(MaxNLocator(nbins=6, steps=[1, 2, 2.5, 5, 10]))
        which.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
    ref = null_value(scale)
    if lo <= ref <= hi or not is_ratio(scale):
        line(ref, color=INK, lw=0.8, zorder=1.5)


def finite_span(values: Sequence[float]) -> tuple[float, float]:
    vals = [float(v) for v in values if v is not None and math.isfinite(float(v))]
    if not vals:
        return (0.5, 2.0)
    return min(vals), max(vals)


def clipped_span(estimates: Sequence[float], bounds: Sequence[float], scale: str,
                 reach: float = 1.0) -> tuple[float, float]:
    """The axis span: every estimate, and interval bounds up to ``reach`` times the estimates'
    own span beyond them (a very wide interval at the edge of the data must not flatten the
    curves); on the log scale for ratios. The null value is always inside."""
    ratio = is_ratio(scale)
    tr = (lambda v: math.log(v)) if ratio else (lambda v: v)
    inv = (lambda v: math.exp(v)) if ratio else (lambda v: v)
    est = [tr(v) for v in estimates if math.isfinite(v) and (v > 0 or not ratio)]
    bnd = [tr(v) for v in bounds if math.isfinite(v) and (v > 0 or not ratio)]
    ref = tr(null_value(scale))
    if not est:
        return inv(ref - 1), inv(ref + 1)
    lo, hi = min(min(est), ref), max(max(est), ref)
    span = (hi - lo) or 1.0
    if bnd:
        lo = max(min(lo, min(bnd)), lo - reach * span)
        hi = min(max(hi, max(bnd)), hi + reach * span)
    return inv(lo), inv(hi)


def effect_label(scale: str, family_outcome: str | None = None) -> str:
    if is_ratio(scale):
        return scale[0].upper() + scale[1:] + " (log scale)"
    return "Difference in mean " + family_outcome if family_outcome else "Mean difference"
