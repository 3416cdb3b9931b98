"""The whole page (header, navigation, every section, the provenance appendix) and the entry
points that write ``<out>/report.html`` and draw the figures. No timestamps and no machine paths
beyond the spec's own: the same tables and spec give the same bytes."""

from __future__ import annotations

import shutil
from dataclasses import dataclass
from functools import partial
from importlib import metadata, resources
from pathlib import Path

import pandas as pd
import yaml
from markupsafe import Markup

from ... import __version__
from ...data import file_sha256
from ...errors import UnbinError
from ...results.tables import read_provenance
from ...spec import load_spec
from .. import text
from ..figures import Context, FigureFile, draw_figures, group_dir, load_tables, read_index
from .drawing import (  # noqa: F401  (re-exported: the figure jobs' entry points)
    FIGURES_DIR,
    check_spec_matches,
    draw_cohort_figures,
    draw_study_figures,
)
from .html import Col, TableView, render, table
from .sections import Builder

REPORT_NAME = "report.html"


@dataclass(frozen=True)
class Report:
    path: Path
    figures: list[FigureFile]


def css() -> Markup:
    """The report's style sheet (shipped as package data), placed as it is."""
    return Markup(resources.files("unbin.present.report").joinpath("style.css")
                  .read_text(encoding="utf-8"))


def _version(package: str) -> str:
    try:
        return metadata.version(package)
    except metadata.PackageNotFoundError:
        return "not installed"


def provenance_tables(b: Builder) -> list[TableView]:
    tables_dir = b.out / "tables"
    prov = read_provenance(tables_dir / "status.parquet")
    inputs = pd.DataFrame(prov.get("inputs", []))
    out = []
    if len(inputs):
        out.append(table(inputs, [
            Col("cohort", lambda r: str(r.get("cohort"))),
            Col("path (as in the spec)", lambda r: str(r.get("path"))),
            Col("rows", lambda r: text.count(r.get("rows")), True),
            Col("SHA-256", lambda r: str(r.get("sha256")))], "Inputs"))
    facts = [("study", prov.get("study", b.spec.study)),
             ("spec digest (SHA-256 of its canonical JSON)", prov.get("spec_digest", "")),
             ("seed", prov.get("seed", b.spec.seed)),
             ("disclosure threshold (min cell)", b.spec.min_cell)]
    out.append(table(facts, [Col("item", lambda r: str(r[0])), Col("value", lambda r: str(r[1]))],
                     "Run"))
    versions = dict(prov.get("versions", {}))
    versions["matplotlib (figures)"] = _version("matplotlib")
    versions["jinja2 (report)"] = _version("jinja2")
    out.append(table(list(versions.items()), [Col("package", lambda r: str(r[0])),
                                              Col("version", lambda r: str(r[1]))], "Versions"))
    files = sorted(tables_dir.glob("*.parquet"))
    out.append(table([(p.name, len(b.ctx.table(p.stem)), file_sha256(p)) for p in files],
                     [Col("table", lambda r: r[0]), Col("rows", lambda r: text.count(r[1]), True),
                      Col("SHA-256", lambda r: r[2])],
                     "Study-level tables read by this report"))
    return out


def provenance(b: Builder) -> str:
    spec_text = yaml.safe_dump(b.spec.raw, sort_keys=False, allow_unicode=True)
    return str(render("provenance.html.j2", tables=provenance_tables(b), spec_text=spec_text))


def assemble(b: Builder) -> str:
    status = b.ctx.table("status")
    n_used = int(status["n_used"].sum()) if len(status) and "n_used" in status else 0
    facts = [("cohorts", str(len(b.spec.cohorts))), ("analyses", str(len(b.spec.analyses))),
             ("rows analysed", text.count(n_used)), ("figures", str(len(b.figures)))]
    body = [b.guarded("study summary", b.summary), b.guarded("pooled results", b.pooled),
            b.guarded("missing values", b.missing)]
    body += [b.guarded(f"{a} ({c})", partial(b.analysis, c, a)) for c, a in b.ctx.jobs()]
    body += [b.guarded("cautions", b.cautions), b.guarded("provenance", partial(provenance, b))]
    return str(render("page.html.j2", version=__version__, study=b.spec.study, css=css(),
                      nav=b.nav(), facts=facts, body=body)) + "\n"


# --------------------------------------------------------------------------- entry points


def build_report(out: str | Path, spec_path: str | Path, draw_cohorts: bool = True) -> Report:
    """Write ``out/report.html`` from ``out``'s study-level tables and the spec. With
    ``draw_cohorts`` (the command line) every figure is drawn afresh first (the figures folder
    is replaced); without (the workflow, where the study's figures and each cohort's are jobs
    of their own) they are read from ``out/figures/_study/index.json`` and
    ``out/figures/<cohort>/index.json``."""
    out = Path(out)
    spec = load_spec(spec_path)
    check_spec_matches(spec, out / "tables")
    ctx = Context(load_tables(out / "tables"), spec)
    figures_dir = out / FIGURES_DIR
    if draw_cohorts:
        if figures_dir.is_dir():
            shutil.rmtree(figures_dir)
        figures = draw_figures(ctx, figures_dir)
    else:
        figures = read_index(group_dir(figures_dir, None), figures_dir)
        for c in spec.cohorts:
            figures += read_index(group_dir(figures_dir, c.name), figures_dir)
    page = Builder(ctx, figures, out).page()
    path = out / REPORT_NAME
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_text(page, encoding="utf-8")
    tmp.replace(path)
    return Report(path, figures)


def find_spec(out: Path, spec: str | Path | None) -> Path:
    """The spec to rebuild ``out``'s report with: the one given, else ``out/spec.yaml``."""
    if spec is not None:
        return Path(spec)
    guess = out / "spec.yaml"
    if guess.is_file():
        return guess
    raise UnbinError(f"no spec given and none at {guess}; give the spec of the run with --spec.")
