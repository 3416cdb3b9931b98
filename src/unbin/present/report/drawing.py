"""The figure jobs' entry points: one cohort's figures, and the study-level and pooled ones,
drawn from a finished run's study-level tables and the spec. Kept apart from the page so that a
figure job imports neither the report's sections nor its templates."""

from __future__ import annotations

import shutil
from collections.abc import Sequence
from pathlib import Path

from ...errors import UnbinError
from ...results.tables import read_provenance
from ...spec import Spec, digest, load_spec
from ..figures import Context, FigureFile, draw_figures, group_dir, load_tables

FIGURES_DIR = "figures"


def check_spec_matches(spec: Spec, tables_dir: Path) -> None:
    """The spec must be the one the tables were written with (same digest)."""
    path = tables_dir / "status.parquet"
    if not path.is_file():
        raise UnbinError(f"{tables_dir} holds no study-level tables (status.parquet is missing); "
                         "run the workflow first.")
    want = read_provenance(path).get("spec_digest")
    if want and want != digest(spec.raw):
        raise UnbinError(f"the spec {spec.source} is not the one the tables in {tables_dir} were "
                         "written with (its digest differs); give the spec of that run, or rerun "
                         "the workflow.")


def draw_cohort_figures(out: str | Path, spec_path: str | Path, cohort: str,
                        tables: Sequence[str] | None = None) -> list[FigureFile]:
    """One cohort's figures (a workflow job of their own) into ``out/figures/<cohort>/``, from
    the study-level tables named in ``tables`` (None: every one in ``out/tables``)."""
    out = Path(out)
    spec = load_spec(spec_path)
    check_spec_matches(spec, out / "tables")
    ctx = Context(load_tables(out / "tables", tables), spec)
    return draw_figures(ctx, out / FIGURES_DIR, cohorts=[cohort], study=False)


def draw_study_figures(out: str | Path, spec_path: str | Path) -> list[FigureFile]:
    """The study-level and pooled figures (a workflow job of their own, beside the cohorts'
    ones) into ``out/figures/_study/``, from every study-level table in ``out/tables``."""
    out = Path(out)
    spec = load_spec(spec_path)
    check_spec_matches(spec, out / "tables")
    ctx = Context(load_tables(out / "tables"), spec)
    figures_dir = out / FIGURES_DIR
    study_dir = group_dir(figures_dir, None)
    if study_dir.is_dir():
        shutil.rmtree(study_dir)
    return draw_figures(ctx, figures_dir, cohorts=[], study=True)
