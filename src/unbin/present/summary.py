"""The terminal summary of a finished run (rich), read from the study-level tables."""

from __future__ import annotations

import math
from pathlib import Path

import pandas as pd
from rich.console import Console
from rich.table import Table

from ..results.tables import read_table


def _fmt(v: object, digits: int = 1) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "–"
    if isinstance(v, float):
        return f"{v:.{digits}f}"
    return str(v)


def _p(v: object) -> str:
    if not isinstance(v, float) or math.isnan(v):
        return "–"
    return "<0.001" if v < 0.001 else f"{v:.3f}"


def information_summary(out: Path) -> Table:
    info = read_table(out / "tables" / "information.parquet")
    status = read_table(out / "tables" / "status.parquet")
    t = Table(title="What the legacy grouping kept (adjusted for the legacy covariates)",
              title_justify="left")
    for col in ("cohort", "analysis", "status", "n", "LR χ² groups (df)", "LR χ² spline (df)",
                "info kept", "spline adds p", "nonlinear p", "best by AIC"):
        if col == "cohort" and status["cohort"].nunique() <= 1:
            continue
        t.add_column(col, justify="right" if col not in ("cohort", "analysis", "status",
                                                          "best by AIC") else "left")
    rows = info[info["adjustment"] == "legacy"] if len(info) else info
    merged = status.merge(rows, on=["cohort", "analysis"], how="left") if len(status) else status
    for _, r in merged.iterrows():
        cells = [] if status["cohort"].nunique() <= 1 else [str(r["cohort"])]
        t.add_row(
            *cells, str(r["analysis"]), str(r["status"]), str(r.get("n_used", "")),
            f"{_fmt(r.get('lr_legacy'))} ({_fmt(r.get('df_legacy'), 0)})",
            f"{_fmt(r.get('lr_spline'))} ({_fmt(r.get('df_spline'), 0)})",
            _fmt(r.get("info_kept"), 2), _p(r.get("added_p")), _p(r.get("nonlinearity_p")),
            _fmt(r.get("best_form")),
        )
    return t


def question_lines(out: Path) -> list[str]:
    """One line per "what the grouping cost" question whose table exists."""
    from ..questions import confounding, cutpoints, ranges, replication

    lines = []
    for mod in (ranges, confounding, cutpoints, replication):
        path = out / "tables" / f"{mod.TABLE}.parquet"
        if path.is_file():
            lines.append(mod.summary_line(read_table(path)))
    from ..questions.decisions import TABLES, summary_lines

    paths = [out / "tables" / f"{name}.parquet" for name in TABLES]
    if all(p.is_file() for p in paths):
        lines += summary_lines(*(read_table(p) for p in paths))
    return lines


def print_summary(out: Path, console: Console | None = None) -> None:
    console = console or Console()
    console.print(information_summary(out))
    status = read_table(out / "tables" / "status.parquet")
    bad = status[status["status"] != "ok"] if len(status) else pd.DataFrame()
    for _, r in bad.iterrows():
        console.print(f"[bold]{r['cohort']}/{r['analysis']}[/bold] {r['status']}: {r['message']}")
    console.print("info kept = LR χ²(legacy groups) / LR χ²(groups + spline); 1 means the "
                  "grouping lost nothing.")
    for line in question_lines(out):
        console.print(line, markup=False)
    console.print(f"Tables: {out / 'tables'}")
