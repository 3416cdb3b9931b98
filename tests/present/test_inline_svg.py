"""The lighter SVG the report inlines: path data re-read by an independent parser written here
gives back the drawn coordinates (exactly to 0.01 pt without simplification; within the stated
tolerance with it, measured as the brute-force distance of every original point to the kept
polyline), styles moved into classes keep each element's declarations, and bare groups go
without touching their content. Douglas & Peucker (1973) for the simplification's guarantee;
the distances are computed here from the geometry, not by the code under test."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from unbin.present.report import inline_svg as S


def parse(d: str) -> list[tuple[list[tuple[float, float]], bool]]:
    """Absolute subpaths (points, closed) of path data with M, L, l, z (SVG 1.1 path grammar)."""
    tokens = re.findall(r"[MLlz]|-?(?:\d+\.?\d*|\.\d+)", d)
    subs: list[tuple[list[tuple[float, float]], bool]] = []
    cmd, nums, cur = "", [], (0.0, 0.0)
    for t in tokens:
        if t in "MLlz":
            if t == "z":
                subs[-1] = (subs[-1][0], True)
                cur = subs[-1][0][0]
            cmd = t
            continue
        nums.append(float(t))
        if len(nums) < 2:
            continue
        x, y = nums
        nums = []
        if cmd == "M":
            cur = (x, y)
            subs.append(([cur], False))
            cmd = "L"          # numbers after M are implicit (absolute) lines
        elif cmd == "L":
            cur = (x, y)
            subs[-1][0].append(cur)
        else:
            cur = (cur[0] + x, cur[1] + y)
            subs[-1][0].append(cur)
    return subs


def matplotlib_d(points: np.ndarray, closed: bool = False) -> str:
    """Path data as matplotlib's SVG writer lays it out."""
    lines = [f"M {points[0, 0]:.2f} {points[0, 1]:.2f} "]
    lines += [f"L {x:.2f} {y:.2f} " for x, y in points[1:]]
    return "\n".join(lines) + ("\nz\n" if closed else "\n")


def segment_distance(p: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Distance of each point of ``p`` to the segment a-b."""
    d = b - a
    den = float(d @ d)
    t = np.zeros(len(p)) if den == 0 else np.clip(((p - a) @ d) / den, 0, 1)
    return np.hypot(*(p - (a + t[:, None] * d)).T)


def test_numbers_are_short_and_exact() -> None:
    assert [S.number(h) for h in (0, 5, -5, 250, -1250, 100, -100, 1234567)] == [
        "0", ".05", "-.05", "2.5", "-12.5", "1", "-1", "12345.67"]
    assert S.join(["M", "1", "2", "l", "3", "-4", ".5", "6"]) == "M1 2l3-4 .5 6"


def test_a_short_polyline_comes_back_exactly() -> None:
    pts = np.array([[10.0, 20.0], [12.37, 18.01], [15.0, 25.55], [9.99, 20.0]])
    d = S.compact_path(matplotlib_d(pts, closed=True))
    (back, closed), = parse(d)
    assert closed and np.allclose(back, pts, atol=1e-9)
    assert len(d) < 0.7 * len(matplotlib_d(pts, closed=True))


def test_rounding_does_not_accumulate_along_a_long_path() -> None:
    # 2,000 steps of 0.333 pt: relative steps taken from the rounded absolute coordinates.
    x = np.round(np.arange(2000) * 0.333, 2)
    pts = np.column_stack([x, np.round(x * 0.7, 2)])
    (back, _), = parse(S.compact_path(matplotlib_d(pts), tolerance=0))
    assert np.allclose(back, pts, atol=1e-9)


@pytest.mark.parametrize("tolerance", [0.05, 0.1, 0.5])
def test_a_simplified_curve_stays_within_the_tolerance(tolerance: float) -> None:
    rng = np.random.default_rng(7)
    x = np.linspace(50, 300, 400)
    y = 150 + 60 * np.sin(x / 25) + rng.normal(0, 0.02, x.size)   # smooth, with tiny wiggles
    pts = np.round(np.column_stack([x, y]), 2)
    (kept, _), = parse(S.compact_path(matplotlib_d(pts), tolerance))
    kept_ = np.array(kept)
    assert len(kept_) < len(pts) / 2                      # lighter
    assert np.allclose(kept_[[0, -1]], pts[[0, -1]])      # the ends stay
    dist = np.min([segment_distance(pts, a, b) for a, b in zip(kept_[:-1], kept_[1:],
                                                                strict=True)], axis=0)
    assert dist.max() <= tolerance + 1e-9


def test_curved_paths_keep_their_commands() -> None:
    d = "M 0 -2.5 \nC 0.663 -2.5 1.299 -2.237 1.768 -1.768 \nz\n"
    assert S.compact_path(d) == "M0-2.5C.66-2.5 1.3-2.24 1.77-1.77z"


def test_styles_become_classes_with_the_same_declarations() -> None:
    svg = ('<svg><defs><style type="text/css">*{stroke-linecap: butt}</style></defs>'
           '<path d="M0 0" style="fill: #fff; stroke: #000"/><path d="M1 1" style="fill: #fff; '
           'stroke: #000"/><text style="font-size: 9px">a</text></svg>')
    out = S.classes_for_styles(svg)
    rules = dict(re.findall(r"\.(s\w+)\{([^}]*)\}", out))
    assert rules == {"s0": "fill:#fff;stroke:#000"}
    assert out.count('class="s0"') == 2 and 'style="font-size:9px"' in out
    assert "*{stroke-linecap: butt}" in out


def test_bare_groups_go_and_their_content_stays() -> None:
    svg = '<svg><g><g id="a"><g><path/></g></g><g/><text>x</text></g></svg>'
    assert S.unwrap_bare_groups(svg) == '<svg><g id="a"><path/></g><g/><text>x</text></svg>'


def test_lighten_drops_identity_rotations_and_the_xlink_prefix() -> None:
    svg = ('<svg xmlns:xlink="http://www.w3.org/1999/xlink" xmlns="http://www.w3.org/2000/svg">'
           '<defs><path id="m" d="M 0 0 \nL 0 3 \n"/></defs><use xlink:href="#m" x="1"/>'
           '<text x="1" y="2" transform="rotate(-0 1 2)">a</text>'
           '<text x="1" y="2" transform="rotate(-90 1 2)">b</text></svg>')
    out = S.lighten(svg)
    assert out == ('<svg xmlns="http://www.w3.org/2000/svg"><defs><path id="m" d="M0 0l0 3"/>'
                   '</defs><use href="#m" x="1"/><text x="1" y="2">a</text>'
                   '<text x="1" y="2" transform="rotate(-90 1 2)">b</text></svg>')


# --------------------------------------------------------------------------- in a browser


def _figure(path: Path) -> Path:
    """A figure with what the report's figures hold: a dense curve over its band, a hatched
    legacy step, markers with error bars, ticks and text, saved as the figures are."""
    from unbin.present.figures.parts import draw_curve, draw_steps, mark_reference
    from unbin.present.figures.style import new_figure, save, styled, title

    x = np.linspace(120, 160, 100)
    eff = np.exp(0.002 * (x - 140) ** 2 - 0.01 * (x - 140))
    rows = pd.DataFrame({"x": x, "effect": eff, "effect_lower": eff / 1.3,
                         "effect_upper": eff * 1.3})
    with styled():
        fig_, fig = new_figure(7, 3.5, "A footnote under the panels.")
        ax = fig.subplots()
        draw_steps(ax, [{"x0": 120, "x1": 135, "effect": 1.4, "lower": 1.1, "upper": 1.8},
                        {"x0": 135, "x1": 160, "effect": 1.0, "lower": 1.0, "upper": 1.0}],
                   risers=True)
        draw_curve(ax, rows, "#1a365d", (0, (6, 2)))
        ax.errorbar(x[::10], eff[::10], yerr=0.1, fmt="o", ms=4, mfc="white")
        mark_reference(ax, 140, "odds ratio")
        ax.set_yscale("log")
        title(fig, "A test figure")
        _png, svg = save(fig_, path)
    return svg


@pytest.fixture(scope="module")
def chromium() -> str:
    from browser.cdp import install_chromium

    path, how = install_chromium()
    if path is None:
        pytest.skip(f"CHROMIUM IS MISSING: the lightened SVG was NOT compared in a browser ({how})")
    return path


def test_the_lightened_figure_looks_the_same_in_chromium(chromium: str, tmp_path: Path) -> None:
    """Rendered at 100% zoom, the lightened figure differs from the compacted original only in
    the anti-aliasing of edges: no pixel by more than a third of the colour range and few by
    anything (a moved edge would change whole pixels, by up to the full range)."""
    from PIL import Image

    from browser.cdp import Chromium, open_report
    from unbin.present.report.html import _URI_ESCAPES, compact_svg, inline_svg

    text = _figure(tmp_path / "fig").read_text(encoding="utf-8")
    shots = []
    with Chromium(chromium, tmp_path / "profile") as browser:
        for svg in (compact_svg(text), inline_svg(text)):
            uri = "data:image/svg+xml;charset=utf-8," + "".join(_URI_ESCAPES.get(c, c)
                                                               for c in svg)
            page_file = tmp_path / "page.html"
            page_file.write_text('<!DOCTYPE html><html><body style="margin:0;background:#fff">'
                                 f'<img src="{uri}"></body></html>', encoding="utf-8")
            page = open_report(browser, page_file)
            assert page.evaluate("document.images[0].decode().then(() => "
                                 "document.images[0].naturalWidth)") > 0
            page.screenshot(tmp_path / "shot.png", 800, 450)
            with Image.open(tmp_path / "shot.png") as im:
                shots.append(np.asarray(im.convert("RGB"), dtype=int))
    assert len(inline_svg(text)) < 0.7 * len(compact_svg(text))
    diff = np.abs(shots[0] - shots[1]).max(axis=2)
    ink = (shots[0] < 250).any(axis=2).sum()
    assert ink > 20_000                                     # something was drawn
    assert diff.max() <= 85, diff.max()
    assert (diff > 0).sum() <= 0.05 * ink, ((diff > 0).sum(), ink)
