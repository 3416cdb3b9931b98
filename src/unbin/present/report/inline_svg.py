"""Lighter SVG text for the figures the report inlines (the files beside the report keep the
full SVG). Nothing here changes what a figure shows beyond a stated tolerance:

- path data written compactly (commands without spaces, relative line segments whose steps are
  differences of the coordinates rounded to 0.01 pt, so rounding never accumulates);
- a polyline's points that lie within ``TOLERANCE_PT`` of the line through their neighbours
  dropped (Douglas & Peucker 1973): a drawn curve or band edge moves by at most that much, a
  small fraction of a screen pixel (0.75 pt at 100% zoom);
- repeated ``style`` attributes turned into classes of one style sheet (the same declarations,
  and a class selector outranks the figure's own ``*`` rule just as the attribute did);
- identity rotations of text, attribute-less groups and the ``xlink:`` prefix dropped.
"""

from __future__ import annotations

import re
from collections import Counter
from functools import lru_cache

import numpy as np

# How far a simplified polyline may stray from the drawn one, in points (1/72 inch).
TOLERANCE_PT = 0.1
# Polylines shorter than this keep every point (rectangles, ticks, markers).
MIN_POINTS = 8

_D_ATTR = re.compile(r' d="([^"]*)"')
_TOKEN = re.compile(r"[A-Za-z]|[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?")
_STYLE_ATTR = re.compile(r' style="([^"]*)"')
_IDENTITY_ROTATION = re.compile(r' transform="rotate\(-?0 [^)"]*\)"')
_GROUP_TAG = re.compile(r"<g(?:\s[^>]*)?>|</g>")
_STYLE_ELEMENT = re.compile(r"(<style[^>]*>)(.*?)(</style>)", re.S)
_STYLE_SPACE = re.compile(r"\s*([:;])\s*")


def _separator(m: re.Match[str]) -> str:
    return m.group(1)


def hundredths(v: float) -> int:
    return int(round(v * 100))


@lru_cache(maxsize=65536)
def number(h: int) -> str:
    """A coordinate given in hundredths of a point, as short as SVG reads it: 12.5, .25, -3."""
    sign, a = ("-" if h < 0 else ""), abs(h)
    whole, frac = divmod(a, 100)
    if frac == 0:
        return f"{sign}{whole}"
    digits = f"{frac:02d}".rstrip("0")
    return f"{sign}{whole if whole else ''}.{digits}"


def join(tokens: list[str]) -> str:
    """Path tokens with a space only where two numbers would otherwise run together."""
    out: list[str] = []
    prev_number = False
    for t in tokens:
        is_number = not t.isalpha()
        if is_number and prev_number and not t.startswith("-"):
            out.append(" ")
        out.append(t)
        prev_number = is_number
    return "".join(out)


def keep_points(points: np.ndarray, tolerance: float) -> np.ndarray:
    """Douglas–Peucker: a mask of the points to keep so that every dropped point lies within
    ``tolerance`` of the segment between the kept points around it (ends always kept)."""
    n = len(points)
    keep = np.zeros(n, dtype=bool)
    keep[0] = keep[-1] = True
    stack = [(0, n - 1)]
    while stack:
        a, b = stack.pop()
        if b <= a + 1:
            continue
        p, q = points[a], points[b]
        inner = points[a + 1:b]
        d = q - p
        length = float(np.hypot(d[0], d[1]))
        if length == 0.0:
            dist = np.hypot(inner[:, 0] - p[0], inner[:, 1] - p[1])
        else:
            # distance to the segment (not the infinite line), so turning points stay
            t = np.clip(((inner - p) @ d) / (length * length), 0.0, 1.0)
            proj = p + t[:, None] * d
            dist = np.hypot(inner[:, 0] - proj[:, 0], inner[:, 1] - proj[:, 1])
        i = int(np.argmax(dist))
        if dist[i] > tolerance:
            k = a + 1 + i
            keep[k] = True
            stack.append((a, k))
            stack.append((k, b))
    return keep


def _polyline(sub: list[tuple[int, int]], closed: bool, tolerance: float) -> list[str]:
    pts = np.asarray(sub, dtype=float)
    if len(pts) >= MIN_POINTS and tolerance > 0:
        pts = pts[keep_points(pts, tolerance * 100)]
    ints = pts.astype(np.int64)
    out = ["M", number(int(ints[0, 0])), number(int(ints[0, 1]))]
    if len(ints) > 1:
        out.append("l")
        out += map(number, np.diff(ints, axis=0).ravel().tolist())
    if closed:
        out.append("z")
    return out


def compact_path(d: str, tolerance: float = TOLERANCE_PT) -> str:
    """One path's data, compact: straight-line subpaths relative and simplified within
    ``tolerance`` points (0: every point kept), any other path (curves: markers) with its
    numbers shortened only."""
    tokens = _TOKEN.findall(d)
    commands = {t for t in tokens if t.isalpha()}
    if not commands <= {"M", "L", "Z", "z"}:
        return join([t if t.isalpha() else number(hundredths(float(t))) for t in tokens])
    out: list[str] = []
    sub: list[tuple[int, int]] = []
    nums: list[int] = []
    for t in tokens + ["M"]:
        if not t.isalpha():
            nums.append(hundredths(float(t)))
            if len(nums) == 2:
                sub.append((nums[0], nums[1]))
                nums = []
            continue
        if t in ("Z", "z"):
            if sub:
                out += _polyline(sub, True, tolerance)
            sub = []
        elif t == "M" and sub:
            out += _polyline(sub, False, tolerance)
            sub = []
    return join(out)


def classes_for_styles(svg: str) -> str:
    """Every style used more than once becomes a class of the figure's style sheet."""
    tidy = _STYLE_ATTR.sub(lambda m: ' style="' + _STYLE_SPACE.sub(_separator,
                                                                  m.group(1).strip()) + '"', svg)
    counts = Counter(_STYLE_ATTR.findall(tidy))
    order = sorted((s for s, n in counts.items() if n > 1), key=lambda s: -counts[s])
    if not order:
        return tidy
    names = {s: f"s{i:x}" for i, s in enumerate(order)}
    rules = "".join(f".{names[s]}{{{s}}}" for s in order)
    out = _STYLE_ATTR.sub(lambda m: f' class="{names[m.group(1)]}"' if m.group(1) in names
                          else m.group(0), tidy)
    if _STYLE_ELEMENT.search(out):
        return _STYLE_ELEMENT.sub(lambda m: m.group(1) + m.group(2) + rules + m.group(3), out,
                                  count=1)
    return re.sub(r"(<svg[^>]*>)", lambda m: m.group(1) + f"<style>{rules}</style>", out,
                  count=1)


def unwrap_bare_groups(svg: str) -> str:
    """Drop ``<g>`` elements without attributes (they change nothing), keeping their content."""
    out: list[str] = []
    stack: list[bool] = []
    last = 0
    for m in _GROUP_TAG.finditer(svg):
        tag = m.group(0)
        if tag.endswith("/>"):
            continue
        out.append(svg[last:m.start()])
        last = m.end()
        if tag == "</g>":
            bare = stack.pop() if stack else False
            if not bare:
                out.append(tag)
        else:
            bare = tag == "<g>"
            stack.append(bare)
            if not bare:
                out.append(tag)
    out.append(svg[last:])
    return "".join(out)


def lighten(svg: str, tolerance: float = TOLERANCE_PT) -> str:
    """The whole figure lightened (see the module's docstring); ``svg`` is already without
    prolog, metadata and line breaks between elements."""
    svg = _D_ATTR.sub(lambda m: f' d="{compact_path(m.group(1), tolerance)}"', svg)
    svg = _IDENTITY_ROTATION.sub("", svg)
    svg = classes_for_styles(svg)
    svg = unwrap_bare_groups(svg)
    svg = svg.replace("xlink:href=", "href=")
    if "xlink:" not in svg:
        svg = re.sub(r' xmlns:xlink="[^"]*"', "", svg)
    return svg
