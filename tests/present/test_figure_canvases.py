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


# --------------------------------------------------------------------------- without matplotlib's
# private Text._get_layout (another matplotlib): no text boxes kept, the same bytes


class _WithoutLayout:
    pass


class _OtherLayout:
    def _get_layout(self, renderer, dpi):  # type: ignore[no-untyped-def]
        raise AssertionError("never called")


class _KeywordLayout:
    def _get_layout(self, *, renderer):  # type: ignore[no-untyped-def]
        raise AssertionError("never called")


def test_own_layout_is_matplotlibs_only_with_its_arguments() -> None:
    from matplotlib.text import Text

    assert canvases._own_layout(Text) is Text._get_layout  # type: ignore[attr-defined]
    for stand_in in (_WithoutLayout, _OtherLayout, _KeywordLayout):
        assert canvases._own_layout(stand_in) is None


@pytest.mark.parametrize(("fmt", "mine", "theirs"), [
    ("png", canvases.CachedCanvasAgg, FigureCanvasAgg),
    ("svg", canvases.CachedCanvasSVG, FigureCanvasSVG)])
def test_without_a_usable_get_layout_the_bytes_are_the_same(
        fmt: str, mine: type[FigureCanvasBase], theirs: type[FigureCanvasBase],
        monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: matplotlib's own canvas; and the canvases with text boxes kept. With
    # ``_get_layout`` as ``_own_layout`` finds it on a Text without one, kept_text_layouts
    # leaves matplotlib's own in place and no text box is kept.
    from matplotlib.text import Text

    own = Text._get_layout  # type: ignore[attr-defined]
    with styled():
        want = _saved(_text_figure(0.0013), theirs, fmt)
        with canvases.kept_text_layouts():
            kept = _saved(_text_figure(0.0013), mine, fmt)
    monkeypatch.setattr(canvases, "_get_layout", canvases._own_layout(_WithoutLayout))
    monkeypatch.setattr(canvases, "_TEXT_BOXES", {})
    with styled():
        with canvases.kept_text_layouts():
            assert Text._get_layout is own  # type: ignore[attr-defined]
            got = _saved(_text_figure(0.0013), mine, fmt)
    assert got == want == kept
    assert canvases._TEXT_BOXES == {}


def test_layouts_matplotlib_shapes_otherwise_are_not_kept(monkeypatch: pytest.MonkeyPatch,
                                                          ) -> None:
    # A _get_layout with the same arguments that returns something else than (box, list of
    # lines, extent) is passed through and not kept; a text without the private attributes
    # the key reads (here a getter that a matplotlib without it would lack) is laid out by
    # matplotlib itself (reference: matplotlib's own result).
    from matplotlib.text import Text

    own = Text._get_layout  # type: ignore[attr-defined]
    fig = _text_figure(0.0)
    canvas = canvases.CachedCanvasAgg(fig)
    renderer = canvas.get_renderer()
    text = fig.axes[0].title
    monkeypatch.setattr(canvases, "_TEXT_BOXES", {})

    def odd(self, renderer):  # type: ignore[no-untyped-def]
        return ("box", ("not", "a list"), 0.0)

    monkeypatch.setattr(canvases, "_get_layout", odd)
    assert canvases._kept_layout(text, renderer) == ("box", ("not", "a list"), 0.0)
    assert canvases._TEXT_BOXES == {}
    monkeypatch.setattr(canvases, "_get_layout", own)

    def missing() -> str:
        raise AttributeError("'Text' object has no attribute 'get_horizontalalignment'")

    monkeypatch.setattr(text, "get_horizontalalignment", missing)
    bbox, lines, box = canvases._kept_layout(text, renderer)
    want = own(text, renderer)
    assert bbox.bounds == want[0].bounds and lines == want[1] and box == want[2]
    assert canvases._TEXT_BOXES == {}


_IMPORT_WITHOUT = r"""
import sys
from pathlib import Path
from matplotlib.text import Text

own = Text._get_layout
if sys.argv[1] == "absent":
    del Text._get_layout
else:  # another signature, still working for matplotlib itself
    Text._get_layout = lambda self, renderer, dpi=None: own(self, renderer)
from unbin.present.figures import canvases
from unbin.present.figures.style import save
assert canvases._get_layout is None
Text._get_layout = own  # matplotlib itself needs one to lay out any text
sys.path.insert(0, sys.argv[3])
from test_figure_canvases import _text_figure
save(_text_figure(0.0013), Path(sys.argv[2]))
assert canvases._TEXT_BOXES == {}
"""


@pytest.mark.parametrize("how", ["absent", "other"])
def test_canvases_import_and_save_without_text_get_layout(how: str, tmp_path) -> None:  # type: ignore[no-untyped-def]
    # A fresh process in which Text._get_layout is missing (or takes other arguments) when
    # the canvases are imported: the import succeeds and style.save writes the same PNG and
    # SVG bytes as this process's save with text boxes kept.
    import os
    import subprocess
    import sys
    from pathlib import Path

    from unbin.present.figures.style import save

    save(_text_figure(0.0013), tmp_path / "kept")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    subprocess.run([sys.executable, "-c", _IMPORT_WITHOUT, how, str(tmp_path / "plain"),
                    str(Path(__file__).parent)], check=True, env=env, cwd=tmp_path)
    for ext in ("png", "svg"):
        assert (tmp_path / f"plain.{ext}").read_bytes() == (tmp_path / f"kept.{ext}").read_bytes()
