"""The canvases with cached text sizes, layouts and glyph bitmaps (and text boxes kept inside
``kept_text_layouts``) give matplotlib's own PNG and SVG, byte for byte; the constants kept in the figure modules equal scipy's values."""

from __future__ import annotations

import io

import numpy as np
import pytest
from matplotlib.backend_bases import FigureCanvasBase
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.backends.backend_svg import FigureCanvasSVG
from matplotlib.figure import Figure

from unbin.present.figures import canvases, confounding, cutpoints
from unbin.present.figures.style import DPI, styled


def _text_figure(shift: float) -> Figure:
    """Text at many fractional positions, sizes, weights and angles (the layout's positions are
    never whole pixels), with mathtext and a multi-line footnote."""
    fig = Figure(figsize=(4.3, 3.1), dpi=DPI)
    ax = fig.add_axes((0.17 + shift, 0.2, 0.7, 0.65))
    ax.plot(np.linspace(0, 1, 40), np.sin(np.linspace(0, 6, 40)))
    ax.set_xlabel("Serum urate (mg/dL)")
    ax.set_ylabel("Odds ratio (log scale)")
    ax.set_title("Spline and legacy groups — Ørby", fontweight="bold")
    for i in range(12):
        ax.text(0.05 + i * 0.0731, 0.1 + i * 0.0617, f"p = 0.{i}3", fontsize=6 + i * 0.37,
                rotation=(0, 30, 90, 270)[i % 4], transform=ax.transAxes)
    ax.text(0.5, 0.5, r"$\chi^2_1 = 3.84$", transform=ax.transAxes)
    # One string as a base text, then as variants that each change one property of it: each is
    # its own text layout.
    base: dict[str, object] = {"ha": "left", "va": "baseline", "rotation": 20.0,
                               "rotation_mode": "default", "linespacing": 1.2,
                               "multialignment": "left", "fontsize": 8.0, "fontweight": "normal"}
    variants = [{}, {"ha": "right"}, {"va": "top"}, {"rotation": 35.0},
                {"rotation_mode": "anchor"}, {"linespacing": 1.6}, {"multialignment": "right"},
                {"fontsize": 8.5}, {"fontweight": "bold"}]
    for i, change in enumerate(variants):
        ax.text(0.08 + 0.1 * i, 0.75, "p = 0.43\nrows kept", transform=ax.transAxes,
                **{**base, **change})  # type: ignore[arg-type]
    fig.text(0.01, 0.02, "a footnote\non two lines", fontsize=7.5, linespacing=1.35)
    return fig


def _saved(fig: Figure, canvas: type[FigureCanvasBase], fmt: str) -> bytes:
    canvas(fig)
    buf = io.BytesIO()
    meta = {"Software": None} if fmt == "png" else {"Date": None, "Creator": None}
    fig.savefig(buf, format=fmt, dpi=DPI, metadata=meta)
    return buf.getvalue()


@pytest.mark.parametrize(("fmt", "mine", "theirs"), [
    ("png", canvases.CachedCanvasAgg, FigureCanvasAgg),
    ("svg", canvases.CachedCanvasSVG, FigureCanvasSVG)])
def test_cached_canvases_give_matplotlibs_bytes(fmt: str, mine: type[FigureCanvasBase],
                                                theirs: type[FigureCanvasBase]) -> None:
    # Reference: matplotlib's own canvas on the same figure. The same figure is drawn twice so
    # that the second one reads the caches, then moved by fractions of a pixel.
    with styled():
        for shift in (0.0, 0.0, 0.0013, 0.25):
            want = _saved(_text_figure(shift), theirs, fmt)
            with canvases.kept_text_layouts():
                got = _saved(_text_figure(shift), mine, fmt)
            assert got == want
    assert canvases._METRICS and canvases._TEXT_BOXES
    if fmt == "png":
        assert canvases._GLYPHS and canvases._LAYOUTS


def test_text_layouts_are_kept_only_inside() -> None:
    # matplotlib's own Text._get_layout outside the block, also after a nested use.
    from matplotlib.text import Text

    own = Text._get_layout  # type: ignore[attr-defined]
    with canvases.kept_text_layouts():
        assert Text._get_layout is not own  # type: ignore[attr-defined]
        with canvases.kept_text_layouts():
            pass
        assert Text._get_layout is not own  # type: ignore[attr-defined]
    assert Text._get_layout is own  # type: ignore[attr-defined]


def test_constants_equal_scipys_values() -> None:
    # Reference: scipy.stats, the values the fits use.
    from scipy import stats

    from unbin.refit.contrasts import Z95

    assert confounding.Z95 == Z95 == float(stats.norm.ppf(0.975))
    assert cutpoints.CHI2_1_95 == float(stats.chi2.ppf(0.95, 1))
