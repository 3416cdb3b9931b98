"""The report's HTML building blocks: the Jinja2 environment (autoescape on), the view objects
the templates render (tables, figures, blocks), and table views built from data frames with
human headers (``present.labels``) and numbers formatted once (``present.text``)."""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from functools import cache
from typing import Any

import jinja2
import pandas as pd
from markupsafe import Markup

from .. import labels, text
from ..figures import FigureFile
from .inline_svg import lighten

NUMERIC = re.compile(r"^(?:[<>×±–-]|\d)")
# Keys every multi-cohort table shows first.
KEYS = ("cohort", "analysis")


@cache
def environment() -> jinja2.Environment:
    return jinja2.Environment(
        loader=jinja2.PackageLoader("unbin.present.report", "templates"),
        autoescape=True, trim_blocks=True, lstrip_blocks=True, keep_trailing_newline=False,
        undefined=jinja2.StrictUndefined)


def render(template: str, **context: Any) -> Markup:
    return Markup(environment().get_template(template).render(**context))


def slug(*parts: str | None) -> str:
    return "-".join(re.sub(r"[^A-Za-z0-9_-]+", "-", p) for p in parts if p)


@dataclass(frozen=True)
class Column:
    header: str
    numeric: bool = False


@dataclass(frozen=True)
class TableView:
    """An HTML table: caption, headers, rows of text cells, a note under it."""

    caption: str
    columns: list[Column]
    rows: list[list[str]]
    note: str = ""


@dataclass(frozen=True)
class Col:
    """A column of a table built from rows: its header, how a row gives the cell's text, and
    whether it holds numbers (right-aligned)."""

    header: str
    value: Callable[[Any], str]
    numeric: bool = False


def table(rows: pd.DataFrame | Iterable[Any], cols: Sequence[Col], caption: str,
          note: str = "") -> TableView:
    records = (rows.to_dict("records") if isinstance(rows, pd.DataFrame) else list(rows))
    return TableView(caption, [Column(c.header, c.numeric) for c in cols],
                     [[c.value(r) for c in cols] for r in records], note)


def records_table(rows: list[dict[str, str]], caption: str, note: str = "",
                  numeric: Iterable[str] = ()) -> TableView:
    """A table of rows already formatted (dicts of header -> text), in the rows' key order.
    Without ``numeric``, a column whose every cell reads as a number is right-aligned."""
    if not rows:
        return TableView(caption, [], [], note)
    heads = list(rows[0])
    num = set(numeric) or {h for h in heads
                           if all(NUMERIC.match(r.get(h, "")) for r in rows)}
    return TableView(caption, [Column(h, h in num) for h in heads],
                     [[r.get(h, "") for h in heads] for r in rows], note)


def cell(key: str, v: Any) -> str:
    """A cell of a generic table: codes as words, numbers by the one formatter."""
    if v is None or v is pd.NA or (isinstance(v, float) and v != v):
        return text.DASH
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, str):
        return labels.code(key, v)
    if isinstance(v, int) or (hasattr(v, "is_integer") and key in ("n", "k", "rows", "events")):
        return text.count(v)
    if text.finite(v):
        if key.endswith("_p") or key.startswith("p_") or key == "p":
            return text.pvalue(v)
        return text.number(v)
    return str(v)


def plain_table(df: pd.DataFrame, caption: str, limit: int = 60,
                keep_keys: bool = False, note: str = "") -> TableView:
    """Any table as it is (for tables this report does not lay out itself): human headers,
    formatted cells, the cohort and analysis columns first when ``keep_keys``; ``note`` under
    it (else one saying how many rows were left out)."""
    if not keep_keys:
        df = df.drop(columns=[c for c in KEYS if c in df])
    else:
        df = df[[c for c in KEYS if c in df] + [c for c in df.columns if c not in KEYS]]
    shown = df.head(limit)
    cols = [Col(labels.column(str(c)), _getter(str(c)),
                pd.api.types.is_numeric_dtype(df[c]) and not pd.api.types.is_bool_dtype(df[c]))
            for c in df.columns]
    if not note and len(df) > limit:
        note = f"First {limit} of {len(df)} rows."
    return table(shown, cols, caption, note)


def _getter(key: str) -> Callable[[Any], str]:
    def value(r: Any) -> str:
        return cell(key, r[key])
    return value


@dataclass(frozen=True)
class FigureView:
    id: str
    src: Markup | None
    width: int | None
    height: int | None
    alt: str
    title: str
    caption: str
    problem: str


# What would end the double-quoted attribute or the URI, or be read as a character reference;
# "<" and ">" stay as they are (allowed inside a quoted HTML attribute, and read as is in a data
# URI by the browsers), which keeps the inlined figures about a tenth smaller.
_URI_ESCAPES = {c: f"%{ord(c):02X}" for c in '%"#&\n\r\t'}
_URI_TABLE = str.maketrans(_URI_ESCAPES)


_PROLOG = re.compile(r"<\?xml[^>]*\?>|<!DOCTYPE[^>]*>|<metadata>.*?</metadata>", re.S)
_ID = re.compile(r' id="([^"]*)"')
_REFERENCE = re.compile(r'(?:url\(#|href="#)([^)"]+)')


def compact_svg(text: str) -> str:
    """The figure as drawn, lighter to inline: no XML prolog, doctype or metadata, no line
    breaks between elements (whitespace-only text between tags; figures hold no tspans), and
    no element ids that nothing references. What is drawn is unchanged; the files beside the
    report keep the full SVG."""
    text = _PROLOG.sub("", text)
    text = re.sub(r">\s+<", "><", text).strip()
    used = set(_REFERENCE.findall(text))
    return _ID.sub(lambda m: m.group(0) if m.group(1) in used else "", text)


def inline_svg(text: str) -> str:
    """The figure as the report inlines it: compacted (``compact_svg``), then lightened
    (``inline_svg.lighten``: compact path data, polylines simplified within 0.1 pt, styles as
    classes)."""
    return lighten(compact_svg(text))


def svg_data_uri(svg: bytes) -> str:
    """The SVG (compacted) as a UTF-8 data URI with only the characters that would end the
    attribute or the URI escaped: about a tenth larger than the text, where base64 is a third
    larger."""
    decoded = inline_svg(svg.decode("utf-8"))
    return "data:image/svg+xml;charset=utf-8," + decoded.translate(_URI_TABLE)


def figure_view(f: FigureFile) -> FigureView:
    fid = slug("fig", f.cohort, f.analysis, f.kind)
    if f.svg is None:
        return FigureView(fid, None, None, None, "", f.title, "", str(f.problem))
    svg = f.svg.read_bytes()
    m = re.search(rb'<svg[^>]*\swidth="([\d.]+)pt"[^>]*\sheight="([\d.]+)pt"', svg)
    w = h = None
    if m:
        w, h = (round(float(v) * 4 / 3) for v in m.groups())
    # The URI escapes every character that could end the attribute (", <, >, &), so it is
    # safe to place as it is; autoescaping it would only grow the file.
    return FigureView(fid, Markup(svg_data_uri(svg)), w, h, f.alt, f.title, f.caption, "")


@dataclass
class Block:
    """A piece of a section: an optional heading, figures, tables (optionally behind a fold),
    notes and cautions, rendered by the ``block`` macro."""

    heading: str = ""
    figures: list[FigureView] = field(default_factory=list)
    tables: list[TableView] = field(default_factory=list)
    fold: str = ""
    notes: list[str] = field(default_factory=list)
    cautions: list[str] = field(default_factory=list)

    def empty(self) -> bool:
        return not (self.figures or self.tables or self.notes or self.cautions)
