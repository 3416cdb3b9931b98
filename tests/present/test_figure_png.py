"""unbin's PNG writer gives the pixels and resolution of matplotlib's own PNG (written through
Pillow), read back by Pillow; opaque figures as RGB, transparent ones as RGBA."""

from __future__ import annotations

import io
import zlib

import numpy as np
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from PIL import Image

from unbin.present.figures import canvases
from unbin.present.figures.png import encode_png
from unbin.present.figures.style import DPI, styled


def _figure(transparent: bool) -> Figure:
    fig = Figure(figsize=(3.2, 2.1), dpi=DPI)
    if transparent:
        fig.patch.set_alpha(0.0)
    ax = fig.add_axes((0.18, 0.2, 0.75, 0.7))
    x = np.linspace(0, 1, 60)
    ax.fill_between(x, np.sin(6 * x) - 0.3, np.sin(6 * x) + 0.3, alpha=0.2)
    ax.plot(x, np.sin(6 * x), lw=1.3)
    ax.set_xlabel("Serum sodium (mmol/L)")
    ax.set_ylabel("Odds ratio (log scale)")
    return fig


def _saved(fig: Figure, canvas: type[FigureCanvasAgg]) -> bytes:
    canvas(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, metadata={"Software": None})
    return buf.getvalue()


@pytest.mark.parametrize("transparent", [False, True])
def test_png_has_matplotlibs_pixels_and_resolution(transparent: bool) -> None:
    # Reference: matplotlib's own Agg canvas saving through Pillow, both files decoded by Pillow.
    with styled():
        want = Image.open(io.BytesIO(_saved(_figure(transparent), FigureCanvasAgg)))
        data = _saved(_figure(transparent), canvases.PngCanvas)
    got = Image.open(io.BytesIO(data))
    assert got.mode == ("RGBA" if transparent else "RGB")
    assert got.size == want.size
    assert np.array_equal(np.asarray(got.convert("RGBA")), np.asarray(want.convert("RGBA")))
    assert got.info["dpi"] == pytest.approx(want.info["dpi"], abs=1e-9)
    assert b"tEXt" not in data and b"Software" not in data


def test_png_chunks_follow_the_standard() -> None:
    # Reference: the PNG specification (ISO/IEC 15948): each chunk's CRC-32 over its type and
    # data; a 2 x 3 image's rows unfiltered, read back by Pillow and by zlib.
    rgba = np.arange(2 * 3 * 4, dtype=np.uint8).reshape(2, 3, 4)
    rgba[..., 3] = 255
    rgba[1, 2, 3] = 7
    data = encode_png(rgba, dpi=72.0, text={"Title": "two rows", "Software": None})
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    pos, kinds = 8, []
    while pos < len(data):
        n = int.from_bytes(data[pos:pos + 4], "big")
        kind, body = data[pos + 4:pos + 8], data[pos + 8:pos + 8 + n]
        assert int.from_bytes(data[pos + 8 + n:pos + 12 + n], "big") == zlib.crc32(kind + body)
        kinds.append(kind)
        if kind == b"IDAT":
            raw = zlib.decompress(body)
            assert raw == b"".join(b"\0" + rgba[r].tobytes() for r in range(2))
        pos += 12 + n
    assert kinds == [b"IHDR", b"pHYs", b"tEXt", b"IDAT", b"IEND"]
    img = Image.open(io.BytesIO(data))
    assert img.mode == "RGBA" and img.info["Title"] == "two rows"
    assert np.array_equal(np.asarray(img), rgba)
    assert np.array_equal(np.asarray(Image.open(io.BytesIO(encode_png(
        np.dstack([rgba[..., :3], np.full((2, 3), 255, np.uint8)]))))), rgba[..., :3])


def test_png_refuses_what_is_not_an_rgba_image() -> None:
    with pytest.raises(ValueError, match="uint8"):
        encode_png(np.zeros((2, 3, 3), np.uint8))
