"""Figures of a finished run, drawn from the study-level tables and the spec only.

Each figure kind lives in its own module with a ``draw`` function and is registered in ``KINDS``
below; ``draw_figures`` draws every kind whose table exists and has rows, for every
(cohort, analysis), once per analysis across cohorts (pooled) or once for the study, and writes
PNG and SVG under ``<out>/figures/``: per cohort under ``<cohort>/<analysis>/``, study-level and
pooled figures under ``_study/``, with an ``index.json`` per folder for the report. The workflow
draws each cohort's folder in its own job.

Matplotlib is used without pyplot (``matplotlib.figure.Figure`` and the Agg/SVG writers only), so
no GUI backend is ever chosen and nothing global is left behind.
"""

from __future__ import annotations

import json
import logging
import traceback
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import pandas as pd

from ...results.tables import read_table
from .base import Context, Drawn, FigureFile, Kind, finite

__all__ = ["INDEX", "KINDS", "STUDY_DIR", "Context", "Drawn", "FigureFile", "Kind", "all_kinds",
           "draw_figures", "finite", "group_dir", "load_tables", "plan", "read_index"]


log = logging.getLogger(__name__)

STUDY_DIR = "_study"     # study-level figures; cohort names cannot start with "_"
INDEX = "index.json"     # what a folder of figures holds, for the report


def _kinds() -> tuple[Kind, ...]:
    from . import (
        calibration,
        confounding,
        curves,
        cutpoints,
        decisions,
        information,
        levels,
        pooled,
        published,
        ranges,
        windows,
    )

    return (
        Kind("information", "information", "study", information.draw),
        Kind("pooled-curves", "pooled_curves", "pooled", pooled.draw),
        Kind("published-tables", "published_curves", "pooled", published.draw),
        Kind("curves", "curves", "analysis", curves.draw),
        Kind("level-curves", "curves", "analysis", levels.draw),
        Kind("ranges", "ranges", "analysis", ranges.draw),
        Kind("confounding", "confounding", "analysis", confounding.draw),
        Kind("cut-positions", "cutpoints", "analysis", cutpoints.draw_positions),
        Kind("cut-profile", "cutpoints", "analysis", cutpoints.draw_profile),
        Kind("thresholds", "thresholds", "analysis", decisions.draw_thresholds),
        Kind("decision-curves", "net_benefit", "analysis", decisions.draw_net_benefit),
        Kind("calibration", "calibration", "analysis", calibration.draw),
        Kind("windows", "windows", "analysis", windows.draw),
    )


_REGISTERED: list[tuple[Kind, ...]] = []


def all_kinds() -> tuple[Kind, ...]:
    """Every registered kind (``KINDS``), in report order. Built on first use, so that reading
    figures that are already drawn (the report) imports no plotting code."""
    if not _REGISTERED:
        _REGISTERED.append(_kinds())
    return _REGISTERED[0]


def __getattr__(name: str) -> Any:
    if name == "KINDS":
        return all_kinds()
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def load_tables(tables_dir: str | Path,
                names: Sequence[str] | None = None) -> dict[str, pd.DataFrame]:
    """Every study-level table in ``tables_dir`` (or those of ``names`` there) by name."""
    paths = sorted(Path(tables_dir).glob("*.parquet"))
    return {p.stem: read_table(p) for p in paths if names is None or p.stem in names}


def group_dir(figures_dir: Path, cohort: str | None) -> Path:
    return figures_dir / (cohort if cohort is not None else STUDY_DIR)


def figure_path(figures_dir: Path, kind: str, cohort: str | None, analysis: str | None) -> Path:
    base = group_dir(figures_dir, cohort)
    return base / kind if analysis is None else base / analysis / kind


def plan(ctx: Context, cohorts: Sequence[str] | None, study: bool,
         kinds: tuple[Kind, ...] | None = None) -> list[tuple[Kind, str | None, str | None]]:
    """Which figures to draw, in report order: study-level kinds once, pooled kinds once per
    analysis, the others per (cohort, analysis) of ``cohorts`` (None: all); each only when its
    table has rows for it. ``kinds``: those to consider (None: every registered kind)."""
    if kinds is None:
        kinds = all_kinds()
    todo: list[tuple[Kind, str | None, str | None]] = []
    if study:
        todo += [(k, None, None) for k in kinds if k.scope == "study" and len(ctx.table(k.table))]
        todo += [(k, None, a.name) for a in ctx.spec.analyses for k in kinds
                 if k.scope == "pooled" and len(ctx.rows(k.table, None, a.name))]
    for cohort, analysis in ctx.jobs():
        if cohorts is not None and cohort not in cohorts:
            continue
        todo += [(k, cohort, analysis) for k in kinds
                 if k.scope == "analysis" and len(ctx.rows(k.table, cohort, analysis))]
    return todo


def draw_figures(ctx: Context, figures_dir: str | Path, cohorts: Sequence[str] | None = None,
                 study: bool = True, kinds: tuple[Kind, ...] | None = None) -> list[FigureFile]:
    """Draw the figures of ``plan`` as PNG and SVG, and write an ``index.json`` into every
    cohort's folder (and the study folder) listing them with their titles and alt texts."""
    from .style import save, styled

    out = Path(figures_dir)
    done: list[FigureFile] = []
    for k, cohort, analysis in plan(ctx, cohorts, study, kinds):
        try:
            with styled():
                drawn = k.draw(ctx, cohort, analysis)
            if drawn is None:
                continue
            png, svg = save(drawn.figure, figure_path(out, k.name, cohort, analysis))
        except Exception as exc:  # one figure that cannot be drawn must not stop the others
            log.warning("figure %s for %s/%s could not be drawn (%s: %s)", k.name, cohort,
                        analysis, type(exc).__name__, exc)
            log.debug("%s", traceback.format_exc())
            done.append(FigureFile(k.name, cohort, analysis, f"Figure '{k.name}' not drawn", "",
                                   "", None, None, not_drawn_message(k, exc)))
            continue
        done.append(FigureFile(k.name, cohort, analysis, drawn.title, drawn.alt, drawn.caption,
                               png, svg))
    groups: list[str | None] = [None] if study else []
    groups += list(cohorts if cohorts is not None else [c.name for c in ctx.spec.cohorts])
    for cohort in groups:
        write_index([f for f in done if f.cohort == cohort], group_dir(out, cohort), out)
    return done


def not_drawn_message(k: Kind, exc: Exception) -> str:
    return (f"the '{k.name}' figure could not be drawn from the '{k.table}' table "
            f"({type(exc).__name__}: {exc}); its numbers are in tables/{k.table}.parquet. "
            "Please report this with the figures log.")


def write_index(figures: list[FigureFile], directory: Path, figures_dir: Path) -> None:
    directory.mkdir(parents=True, exist_ok=True)
    records = [{"kind": f.kind, "cohort": f.cohort, "analysis": f.analysis, "title": f.title,
                "alt": f.alt, "caption": f.caption,
                "png": f.png.relative_to(figures_dir).as_posix() if f.png else None,
                "svg": f.svg.relative_to(figures_dir).as_posix() if f.svg else None,
                "problem": f.problem} for f in figures]
    (directory / INDEX).write_text(json.dumps(records, indent=1, ensure_ascii=False) + "\n",
                                   encoding="utf-8")


def read_index(directory: Path, figures_dir: Path) -> list[FigureFile]:
    path = directory / INDEX
    if not path.is_file():
        return []
    return [FigureFile(r["kind"], r["cohort"], r["analysis"], r["title"], r["alt"], r["caption"],
                       figures_dir / r["png"] if r.get("png") else None,
                       figures_dir / r["svg"] if r.get("svg") else None, r.get("problem", ""))
            for r in json.loads(path.read_text(encoding="utf-8"))]
