"""The pieces every figure kind uses: the tables-and-spec context, what a kind returns, and
the record of a written figure."""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import pandas as pd

from ...spec import Spec


@dataclass(frozen=True)
class Drawn:
    """What a kind's ``draw`` returns: the figure and the words that go with it."""

    figure: Any            # matplotlib.figure.Figure
    title: str
    alt: str               # alternative text: what the figure shows, with its key numbers
    caption: str = ""      # how to read it (shown under the figure in the report)


@dataclass(frozen=True)
class FigureFile:
    kind: str
    cohort: str | None
    analysis: str | None
    title: str
    alt: str
    caption: str
    png: Path | None
    svg: Path | None
    problem: str = ""    # why the figure could not be drawn (png and svg are then None)


@dataclass(frozen=True)
class Exposure:
    """One analysis' exposure as the figures name it."""

    name: str       # the column
    label: str      # label with its unit in parentheses ('Serum sodium (mmol/L)')
    short: str      # label alone ('Serum sodium')
    unit: str       # ' mmol/L' (with its leading space) or ''


@dataclass(frozen=True)
class Context:
    """The study-level tables (missing ones are empty) and the spec."""

    tables: dict[str, pd.DataFrame]
    spec: Spec
    _cache: dict[tuple[str, str | None, str | None], pd.DataFrame] = field(default_factory=dict,
                                                                         repr=False)
    _groups: dict[str, dict[Any, Any]] = field(default_factory=dict, repr=False)

    def table(self, name: str) -> pd.DataFrame:
        return self.tables.get(name, pd.DataFrame())

    def rows(self, name: str, cohort: str | None, analysis: str | None) -> pd.DataFrame:
        """The rows of one table for one (cohort, analysis); an empty frame when there are none."""
        key = (name, cohort, analysis)
        if key not in self._cache:
            df = self.table(name)
            if len(df) and cohort is not None and analysis is not None and {
                    "cohort", "analysis"} <= set(df.columns):
                # Every (cohort, analysis) of the table at once: the positions of its rows,
                # in table order (the rows the two equality filters select).
                groups = self._groups.get(name)
                if groups is None:
                    groups = self._groups[name] = df.groupby(
                        ["cohort", "analysis"], sort=False, dropna=True,
                        observed=True).indices
                pos = groups.get((cohort, analysis))
                df = df.iloc[pos if pos is not None else []]
            else:
                if len(df) and cohort is not None and "cohort" in df:
                    df = df[df["cohort"] == cohort]
                if len(df) and analysis is not None and "analysis" in df:
                    df = df[df["analysis"] == analysis]
            self._cache[key] = df.reset_index(drop=True)
        return self._cache[key]

    def selected_detail(self, cohort: str, analysis: str, form: str, adjustment: str) -> str:
        """The fits table's description of the selected fit of a form ('restricted cubic
        spline, 4 knots', 'FP2(1, 3)'), or '' when there is none."""
        fits = self.rows("fits", cohort, analysis)
        if fits.empty or "form" not in fits:
            return ""
        sel = fits[(fits["form"] == form) & (fits["adjustment"] == adjustment)]
        if "selected" in sel and sel["selected"].any():
            sel = sel[sel["selected"].astype(bool)]
        if sel.empty:
            return ""
        detail = str(sel["detail"].iloc[0])
        return detail.split(" (closed test")[0]

    def legacy_cuts(self, cohort: str, analysis: str) -> list[float]:
        """The exposure's legacy cuts as fitted (quantile groupings included), from the fits
        table's basis description; the spec's cuts when the table has none."""
        fits = self.rows("fits", cohort, analysis)
        if len(fits) and "exposure_basis" in fits:
            for text in fits.loc[fits["form"] == "legacy", "exposure_basis"]:
                try:
                    terms = json.loads(text)
                except (TypeError, ValueError):
                    continue
                for t in terms:
                    if t.get("term") == "grouped" and t.get("cuts"):
                        return [float(c) for c in t["cuts"]]
        a = self.spec.analysis(analysis)
        g = self.spec.groupings.get(a.exposure)
        return [float(c) for c in g.cuts] if g is not None and g.cuts else []

    def exposure(self, analysis: str) -> Exposure:
        """How the figures name one analysis' exposure."""
        a = self.spec.analysis(analysis)
        info = self.spec.variables.get(a.exposure)
        return Exposure(a.exposure, self.spec.label(a.exposure),
                        info.label if info and info.label else a.exposure,
                        f" {info.unit}" if info and info.unit else "")

    def risk_label(self, analysis: str) -> str:
        """The absolute-risk scale of one analysis in words, horizon included: 'Risk of died
        within 5 years' (survival), 'Risk of readmit30' (binary), 'Expected visits per
        person_years' (count), 'Mean sbp' (continuous)."""
        o = self.spec.analysis(analysis).outcome
        if o.type == "survival":
            h = o.horizon if o.horizon is not None else self.spec.horizon
            if h is None:
                return f"Risk of {self.spec.label(o.event or '')} (no horizon given)"
            event = self.spec.label(o.event or "")
            info = self.spec.variables.get(o.time or "")
            if info and info.unit:
                return f"Risk of {event} within {float(h):g} {info.unit}"
            return f"Risk of {event} by {self.spec.label(o.time or '')} = {float(h):g}"
        if o.type == "binary":
            return f"Risk of {self.spec.label(o.event or '')}"
        if o.type == "count":
            return (f"Expected {self.spec.label(o.count or '')} per "
                    f"{self.spec.label(o.persontime or '')}")
        return f"Mean {self.spec.label(o.value or '')}"

    def suffix(self, cohort: str | None) -> str:
        """' — cohort' after a title when the study has several cohorts."""
        return "" if cohort is None or len(self.spec.cohorts) == 1 else f" — {cohort}"

    def outcome_label(self, analysis: str) -> str:
        o = self.spec.analysis(analysis).outcome
        var = o.value or o.event or o.count or o.time or ""
        return self.spec.label(var) if var else "the outcome"

    def jobs(self) -> list[tuple[str, str]]:
        """(cohort, analysis) pairs in spec order."""
        return [(c.name, a.name) for c in self.spec.cohorts for a in self.spec.analyses]


DrawFn = Callable[[Context, str | None, str | None], Drawn | None]


T = TypeVar("T")


def per_analysis(table: str, select: Callable[[pd.DataFrame], T | None]) -> Callable[
        [Callable[[Context, T, str, str], Drawn | None]], DrawFn]:
    """A per-(cohort, analysis) kind from its two halves: ``select`` turns the table's rows of
    one (cohort, analysis) into plain data (None: nothing to draw), the decorated function draws
    that data."""
    def wrap(render: Callable[[Context, T, str, str], Drawn | None]) -> DrawFn:
        def draw(ctx: Context, cohort: str | None, analysis: str | None) -> Drawn | None:
            assert cohort is not None and analysis is not None
            sel = select(ctx.rows(table, cohort, analysis))
            return None if sel is None else render(ctx, sel, cohort, analysis)

        draw.__doc__ = render.__doc__
        return draw

    return wrap


@dataclass(frozen=True)
class Kind:
    name: str
    table: str           # drawn only when this table exists and has rows (for the analysis)
    scope: str           # "analysis" (per cohort x analysis), "pooled" (per analysis, across
    #                      cohorts) or "study" (once)
    draw: DrawFn


def finite(v: Any) -> bool:
    try:
        return v is not None and v is not pd.NA and math.isfinite(float(v))
    except (TypeError, ValueError):
        return False
