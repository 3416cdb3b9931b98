"""The canvases ``style.save`` draws with: matplotlib's Agg (PNG) and SVG canvases with caches
for text, the same bytes.

Text is most of the cost of a figure here (tick labels, titles, footnotes: about a thousand
strings and twenty-five thousand glyphs per cohort), and matplotlib measures every string once
per renderer, lays it out and asks FreeType for every glyph's bitmap afresh each time. All are
pure functions of their inputs, so they are kept for the whole process:

- a string's size (width, height, descent) per renderer kind, font, size, resolution, hinting
  and string (matplotlib keeps it per renderer only, and each figure has its own);
- a string's layout (the glyphs and their offsets) per font, size, resolution, hinting and
  string;
- a glyph's bitmap per font, size, resolution, glyph, hinting, rotation and the pen position's
  fraction of a pixel (FreeType positions glyphs to 1/64 pixel: a bitmap moved by whole pixels
  is the same bitmap, its corner moved by as many pixels);
- inside ``kept_text_layouts`` (``style.save`` draws in it), a text's box and line offsets
  (``Text._get_layout``, which does not depend on where the text stands) per renderer kind,
  resolutions, hinting, string, font, line spacing, alignments and rotation: matplotlib
  computes them again for every text at every layout pass and every drawing, some ten thousand
  times per cohort for a few hundred different texts. ``Text._get_layout`` is private to
  matplotlib: where it is missing or takes other arguments than ``(self, renderer)``
  (``_own_layout``), or a text lacks what the key reads, or it returns something other than
  (box, list of lines, extent), texts are laid out by matplotlib every time: the same files,
  only slower; the module never fails at import for it.

The bitmaps are composited exactly as matplotlib composites them, so the PNG and the SVG keep
their bytes (``tests/present/test_figure_canvases.py`` compares them with matplotlib's own
canvases).
"""

from __future__ import annotations

import codecs
import inspect
import math
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any, cast

import numpy as np
from matplotlib import cbook
from matplotlib.backends.backend_agg import FigureCanvasAgg, RendererAgg, get_hinting_flag
from matplotlib.backends.backend_mixed import MixedModeRenderer
from matplotlib.backends.backend_svg import FigureCanvasSVG, RendererSVG
from matplotlib.font_manager import fontManager as _fontManager
from matplotlib.font_manager import get_font
from matplotlib.ft2font import RenderMode
from matplotlib.path import Path as MplPath
from matplotlib.text import Text
from matplotlib.transforms import Affine2D

from .png import write_png

# (font, size, dpi, string, flags, features, language) -> [(font, glyph index, x, y), ...]
_LAYOUTS: dict[tuple[Any, ...], list[tuple[Any, int, float, float]]] = {}
# (font, size, dpi, glyph, flags, mode, transform, x fraction, y fraction) ->
#     (bitmap, left - whole x, top - whole y)
_GLYPHS: dict[tuple[Any, ...], tuple[np.ndarray, int, int]] = {}
# (font, resolution) -> (ascent, descent, line gap)
_HEIGHTS: dict[tuple[Any, ...], tuple[Any, Any, Any]] = {}
# (renderer kind, font, resolution, string, hinting) -> (width, height, descent)
_METRICS: dict[tuple[Any, ...], tuple[float, float, float]] = {}
# (renderer kind, resolution, figure resolution, hinting, string, font, line spacing,
#  multi-alignment, rotation, rotation mode, alignments) -> what Text._get_layout returns
_TEXT_BOXES: dict[tuple[Any, ...], tuple[Any, list[Any], Any]] = {}
_MOST = 200_000     # entries per cache before it is emptied (a long session's memory bound)


def _font_key(prop: Any) -> tuple[Any, ...]:
    """The font files ``prop`` resolves to (under the rc settings in force) and its size."""
    return (tuple(_fontManager._find_fonts_by_props(prop)), prop.get_size_in_points())


def _font_heights(prop: Any, dpi: float) -> tuple[Any, Any, Any]:
    # As matplotlib's Text._get_layout (3.11) measures a font's ascent, descent and line gap
    # from its tables (its backends may give them through ``_get_font_height_metrics``); None
    # lets it measure them itself.
    key = (_font_key(prop), dpi)
    hit = _HEIGHTS.get(key)
    if hit is None:
        hit = (None, None, None)
        font: Any = get_font(_fontManager._find_fonts_by_props(prop))
        for table_name, linegap_key, ascent_key, descent_key in (
                ("OS/2", "sTypoLineGap", "sTypoAscender", "sTypoDescender"),
                ("hhea", "lineGap", "ascent", "descent")):
            table = font.get_sfnt_table(table_name)
            if table is None:
                continue
            fontsize = prop.get_size_in_points()
            units_per_em = font.get_sfnt_table("head")["unitsPerEm"]
            scale = 1 / units_per_em * fontsize * dpi / 72
            hit = (table[ascent_key] * scale, -table[descent_key] * scale,
                   table[linegap_key] * scale)
            break
        if len(_HEIGHTS) >= _MOST:
            _HEIGHTS.clear()
        _HEIGHTS[key] = hit
    return hit


def _measured(kind: str, dpi: float, s: str, prop: Any, ismath: Any,
              measure: Any) -> tuple[float, float, float]:
    if ismath:     # mathtext and TeX: measured by matplotlib each time
        return measure(s, prop, ismath)
    key = (kind, _font_key(prop), dpi, s, get_hinting_flag())
    hit = _METRICS.get(key)
    if hit is None:
        hit = tuple(measure(s, prop, ismath))
        if len(_METRICS) >= _MOST:
            _METRICS.clear()
        _METRICS[key] = hit
    return hit


class CachedRendererAgg(RendererAgg):
    """``RendererAgg`` whose text sizes, layouts and glyph bitmaps are kept (same pixels)."""

    def get_text_width_height_descent(self, s: str, prop: Any,
                                      ismath: Any) -> tuple[float, float, float]:
        return _measured("agg", self.dpi, s, prop, ismath, super().get_text_width_height_descent)

    def _get_font_height_metrics(self, prop: Any) -> tuple[Any, Any, Any]:
        # The figure's resolution is the renderer's (savefig draws at the figure's dpi).
        return _font_heights(prop, self.dpi)

    def draw_text(self, gc: Any, x: float, y: float, s: str, prop: Any, angle: float,
                  ismath: Any = False, mtext: Any = None) -> None:
        if ismath:
            super().draw_text(gc, x, y, s, prop, angle, ismath, mtext)
            return
        flags = get_hinting_flag()
        features = mtext.get_fontfeatures() if mtext is not None else None
        language = mtext.get_language() if mtext is not None else None
        key = (_font_key(prop), self.dpi, s, flags,
               tuple(features) if features is not None else None,
               language if language is None or isinstance(language, str) else tuple(language))
        items = _LAYOUTS.get(key)
        if items is None:
            font = self._prepare_font(prop)
            items = [(it.ft_object, it.glyph_index, it.x, it.y)
                     for it in font._layout(s, flags=flags, features=features,
                                            language=language)]
            if len(_LAYOUTS) >= _MOST:
                _LAYOUTS.clear()
            _LAYOUTS[key] = items
        size = prop.get_size_in_points()
        self._draw_text_glyphs_and_boxes(
            gc, x, y, angle, ((f, size, g, 0, 1, dx, dy) for f, g, dx, dy in items), [])

    def _draw_text_glyphs_and_boxes(self, gc: Any, x: float, y: float, angle: float,
                                    glyphs: Any, boxes: Any) -> None:
        # As RendererAgg's (matplotlib 3.11), with each glyph's bitmap kept.
        cos = math.cos(math.radians(angle))
        sin = math.sin(math.radians(angle))
        load_flags = get_hinting_flag()
        mode = RenderMode.NORMAL if gc.get_antialiased() else RenderMode.MONO
        height = self.height
        draw_image = self._renderer.draw_text_image
        # The glyph transform, per (slant, extend): the same for every glyph of a string.
        matrices: dict[tuple[float, float], tuple[np.ndarray, tuple[int, ...]]] = {}
        for font, size, glyph_index, slant, extend, dx, dy in glyphs:  # dy is upwards.
            known = matrices.get((slant, extend))
            if known is None:
                m = (0x10000 * np.array([[cos, -sin], [sin, cos]])
                     @ [[extend, extend * slant], [0, 1]]).round().astype(int)
                known = matrices[(slant, extend)] = (m, tuple(m.ravel().tolist()))
            matrix, matrix_key = known
            px = round(0x40 * (x + dx * cos - dy * sin))
            py = round(0x40 * (height - y + dx * sin + dy * cos))  # FreeType's y is upwards
            wx, wy = px >> 6, py >> 6          # whole pixels (floor)
            key = (font, size, self.dpi, glyph_index, load_flags, mode,
                   matrix_key, px & 63, py & 63)
            hit = _GLYPHS.get(key)
            if hit is None:
                font.set_size(size, self.dpi)
                font._set_transform(matrix, [px & 63, py & 63])
                bitmap = font._render_glyph(glyph_index, load_flags, mode)
                buffer = bitmap.buffer
                if not gc.get_antialiased():
                    buffer *= 0xff
                hit = (buffer, bitmap.left, bitmap.top)
                if len(_GLYPHS) >= _MOST:
                    _GLYPHS.clear()
                _GLYPHS[key] = hit
            buffer, left, top = hit
            # draw_text_image's y is downwards & the bitmap bottom side.
            draw_image(buffer, left + wx, int(height) - (top + wy) + buffer.shape[0], 0, gc)

        rgba = gc.get_rgb()
        if len(rgba) == 3 or gc.get_forced_alpha():
            rgba = rgba[:3] + (gc.get_alpha(),)
        gc1 = self.new_gc()
        gc1.set_linewidth(0)
        gc1.set_snap(gc.get_snap())
        for bx, by, w, h in boxes:  # by is upwards.
            if gc1.get_snap() in [None, True]:
                # Prevent thin bars from disappearing by growing symmetrically.
                if w < 1:
                    bx -= (1 - w) / 2
                    w = 1
                if h < 1:
                    by -= (1 - h) / 2
                    h = 1
            path = MplPath._create_closed(  # type: ignore[attr-defined]
                [(bx, by), (bx + w, by), (bx + w, by + h), (bx, by + h)])
            self._renderer.draw_path(gc1, path,
                                     Affine2D().rotate_deg(angle).translate(x, height - y), rgba)
        gc1.restore()


class CachedCanvasAgg(FigureCanvasAgg):
    """An Agg canvas drawing with ``CachedRendererAgg``."""

    def get_renderer(self) -> RendererAgg:
        w, h = self.get_width_height(physical=True)
        key = w, h, self.figure.dpi
        if self._lastKey != key:
            self.renderer = CachedRendererAgg(w, h, self.figure.dpi)
            self._lastKey = key
        return self.renderer


class PngCanvas(CachedCanvasAgg):
    """``CachedCanvasAgg`` whose PNG is written by ``png.write_png``: the same pixels as
    matplotlib's PNG (drawn by the same canvas), in less time and fewer bytes."""

    def print_png(self, filename_or_obj: Any, *, metadata: dict[str, str | None] | None = None,
                  pil_kwargs: Any = None, **_ignored: Any) -> None:
        # The other keywords savefig passes (resolution, face and edge colour, orientation) are
        # those matplotlib drops for its own canvas: savefig has applied them to the figure.
        if pil_kwargs:
            raise ValueError("pil_kwargs do not apply: unbin writes its PNG files itself")
        FigureCanvasAgg.draw(self)
        write_png(filename_or_obj, np.asarray(self.buffer_rgba()), dpi=self.figure.dpi,
                  text=metadata)


class CachedRendererSVG(RendererSVG):
    """``RendererSVG`` whose text sizes are kept (the same file)."""

    def get_text_width_height_descent(self, s: str, prop: Any,
                                      ismath: Any) -> tuple[float, float, float]:
        return _measured("svg", float(cast(Any, self.points_to_pixels(72))), s, prop, ismath,
                         super().get_text_width_height_descent)

    def _get_font_height_metrics(self, prop: Any) -> tuple[Any, Any, Any]:
        # print_svg draws with the figure at 72 dpi.
        return _font_heights(prop, 72.0)


class CachedCanvasSVG(FigureCanvasSVG):
    """An SVG canvas drawing with ``CachedRendererSVG``."""

    def print_svg(self, filename: Any, *, bbox_inches_restore: Any = None,
                  metadata: Any = None, **_ignored: Any) -> None:
        # As FigureCanvasSVG.print_svg (matplotlib 3.11), with the renderer above; the other
        # keywords savefig passes (face and edge colour, orientation) are those matplotlib drops
        # for its own canvas.
        with cbook.open_file_cm(filename, "w", encoding="utf-8") as fh:
            if not cbook.file_requires_unicode(fh):
                fh = codecs.getwriter("utf-8")(fh)  # type: ignore[assignment]
            dpi = self.figure.dpi
            self.figure.dpi = 72
            width, height = self.figure.get_size_inches()
            w, h = width * 72, height * 72
            renderer = MixedModeRenderer(
                self.figure, width, height, dpi,
                CachedRendererSVG(w, h, fh, image_dpi=dpi, metadata=metadata),
                bbox_inches_restore=bbox_inches_restore)
            self.figure.draw(renderer)  # type: ignore[arg-type]
            renderer.finalize()


_Layout = tuple[Any, list[Any], Any]


def _own_layout(cls: type) -> Callable[[Any, Any], _Layout] | None:
    """``cls._get_layout`` (matplotlib's Text's own, private: 3.8 to 3.11 have it as
    ``(self, renderer)``) when it is there with those arguments, so that ``_kept_layout`` can
    stand in for it; None otherwise (texts are then laid out by matplotlib every time)."""
    own = getattr(cls, "_get_layout", None)
    if not callable(own):
        return None
    try:
        params = list(inspect.signature(own).parameters.values())
    except (TypeError, ValueError):  # no signature to read
        return None
    if ([p.name for p in params] != ["self", "renderer"]
            or any(p.kind is not p.POSITIONAL_OR_KEYWORD or p.default is not p.empty
                   for p in params)):
        return None
    return cast(Callable[[Any, Any], _Layout], own)


_get_layout = _own_layout(Text)


def _renderer_kind(renderer: Any) -> tuple[str, float] | None:
    """Which of the canvases' renderers ``renderer`` is (SVG comes wrapped in matplotlib's
    MixedModeRenderer) and the resolution it measures text at; None for any other."""
    inner = renderer._renderer if isinstance(renderer, MixedModeRenderer) else renderer
    if isinstance(inner, CachedRendererAgg):
        return "agg", float(inner.dpi)
    if isinstance(inner, CachedRendererSVG):
        return "svg", 72.0
    return None


def _text_key(text: Text, kind: tuple[str, float]) -> tuple[Any, ...] | None:
    """What ``Text._get_layout``'s result depends on (module docstring); None when the text
    lacks one of matplotlib's private attributes read here (another matplotlib)."""
    try:
        fig = text.get_figure(root=True)
        return (*kind, fig.dpi if fig is not None else None, get_hinting_flag(), text.get_text(),
                _font_key(text.get_fontproperties()),
                text._linespacing,  # type: ignore[attr-defined]
                text._get_multialignment(), text.get_rotation(),  # type: ignore[attr-defined]
                text.get_rotation_mode(), text.get_horizontalalignment(),
                text.get_verticalalignment())
    except (AttributeError, TypeError):
        return None


def _kept_layout(text: Text, renderer: Any) -> _Layout:
    """``Text._get_layout`` kept per its inputs (copies of the box and the line list: callers
    may keep them). Math, TeX and wrapped texts are laid out by matplotlib each time, and so is
    any text whose key cannot be read or whose layout is not (box, list of lines, extent)."""
    assert _get_layout is not None  # installed by kept_text_layouts only when there is one
    kind = _renderer_kind(renderer)
    s = text.get_text()
    if kind is None or "$" in s or text.get_usetex() or text.get_wrap():
        return _get_layout(text, renderer)
    key = _text_key(text, kind)
    if key is None:
        return _get_layout(text, renderer)
    hit = _TEXT_BOXES.get(key)
    if hit is None:
        hit = _get_layout(text, renderer)
        if not (isinstance(hit, tuple) and len(hit) == 3 and hasattr(hit[0], "frozen")
                and isinstance(hit[1], list)):
            return hit  # another matplotlib's layout: not kept
        if len(_TEXT_BOXES) >= _MOST:
            _TEXT_BOXES.clear()
        _TEXT_BOXES[key] = hit
    bbox, lines, box = hit
    return bbox.frozen(), list(lines), box


@contextmanager
def kept_text_layouts() -> Iterator[None]:
    """Texts laid out inside are laid out once per their inputs (``_kept_layout``); matplotlib's
    own ``Text._get_layout`` is back on leaving (nested uses keep the outer one's). Without a
    usable ``Text._get_layout`` (``_own_layout``) nothing is changed: matplotlib lays out every
    text itself, to the same files."""
    if _get_layout is None or getattr(Text, "_get_layout", None) is _kept_layout:
        yield
        return
    setattr(Text, "_get_layout", _kept_layout)  # noqa: B010
    try:
        yield
    finally:
        setattr(Text, "_get_layout", _get_layout)  # noqa: B010


__all__ = ["CachedCanvasAgg", "CachedCanvasSVG", "CachedRendererAgg", "CachedRendererSVG",
           "PngCanvas", "kept_text_layouts"]
