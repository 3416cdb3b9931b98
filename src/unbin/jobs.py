"""What the workflow's jobs do, as plain functions (the rule scripts only call these).

``run_analysis_job`` fits one analysis on one cohort and writes its per-job tables;
``collect_tables`` concatenates every job's tables into the study-level tables. Questions never
read files; this module is where reading and writing happens.
"""

from __future__ import annotations

import logging
import traceback
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pandas as pd

from .confounding import confounding_table
from .curves import curves_table, density_table
from .cutpoints import cutpoints_table
from .data import _type_problems, analysis_sample, extract_rows, file_sha256, read_extract
from .effects import effects_table
from .errors import DataError, UnbinError
from .fits import fits_table
from .information import information_table
from .provenance import provenance
from .ranges import ranges_table
from .refit import Refit, refit_analysis
from .replication import replication_table
from .spec import Spec, digest, load_spec
from .tables import read_table, write_table

log = logging.getLogger("unbin")

# Tables every (cohort, analysis) job writes, and the builder of each from the refit.
QUESTION_TABLES: dict[str, Callable[[Refit, Spec], pd.DataFrame]] = {
    "fits": lambda r, s: fits_table(r),
    "information": lambda r, s: information_table(r),
    "effects": lambda r, s: effects_table(r),
    "curves": lambda r, s: curves_table(r),
    "density": lambda r, s: density_table(r, s.min_cell),
    "ranges": ranges_table,
    "confounding": confounding_table,
    "cutpoints": cutpoints_table,
    "replication": replication_table,
}
JOB_TABLES: tuple[str, ...] = (*QUESTION_TABLES, "samples", "status")
STUDY_TABLES = JOB_TABLES


def input_record(spec: Spec, cohort: str) -> dict[str, Any]:
    c = spec.cohort(cohort)
    return {"cohort": cohort, "path": c.path_as_written, "sha256": file_sha256(c.path),
            "rows": extract_rows(c.path)}


def _keyed(df: pd.DataFrame, cohort: str, analysis: str) -> pd.DataFrame:
    df = df.copy()
    df.insert(0, "analysis", analysis)
    df.insert(0, "cohort", cohort)
    return df


def analyse(spec: Spec, cohort: str, analysis: str,
            frame: pd.DataFrame) -> tuple[dict[str, pd.DataFrame], dict[str, Any]]:
    """Every question's table for one analysis on one cohort's rows, plus its status record.

    Problems of this analysis (bad data, empty sample, a failing question) are recorded in the
    status, never raised: the other analyses must complete.
    """
    a = spec.analysis(analysis)
    status: dict[str, Any] = {"status": "ok", "message": "", "n_input": len(frame), "n_used": 0,
                              "family": a.family, "exposure": a.exposure}
    tables: dict[str, pd.DataFrame] = {}
    samples = pd.DataFrame({"step": pd.Series(dtype=str), "rows": pd.Series(dtype="int64")})
    try:
        problems = _type_problems(a, frame, spec)
        if problems:
            raise DataError(" ".join(problems))
        sample = analysis_sample(frame, a, spec)
        samples = pd.DataFrame(
            [("rows in extract", sample.n_input)]
            + [(f"dropped: {reason}", n) for reason, n in sample.dropped]
            + [("analysis sample", sample.n)], columns=["step", "rows"])
        status["n_used"] = sample.n
        if sample.n < 10:
            raise DataError(f"only {sample.n} rows are left after filters and complete cases; "
                            "check the filters and missing values (see samples.parquet).")
        refit = refit_analysis(sample, a, spec, cohort)
        failed = [f"{f.form}/{f.adjustment}: {f.result.message}" for f in refit.fits
                  if not f.result.ok and f.selected]
        for name, build in QUESTION_TABLES.items():
            tables[name] = build(refit, spec)
        notes = refit.messages + failed
        if failed:
            status["status"] = "partial"
        status["message"] = " | ".join(dict.fromkeys(notes))
    except UnbinError as exc:
        status.update(status="failed", message=str(exc))
        tables = {}
    except Exception as exc:  # an internal error must not stop the other analyses
        log.error("internal error in %s/%s:\n%s", cohort, analysis, traceback.format_exc())
        status.update(status="error",
                      message=f"internal error ({type(exc).__name__}: {exc}); please report it "
                              "with the log file of this job.")
        tables = {}
    tables["samples"] = samples
    tables["status"] = pd.DataFrame([status])
    return tables, status


def run_analysis_job(spec_path: str | Path, cohort: str, analysis: str,
                     outdir: str | Path) -> dict[str, Any]:
    spec = load_spec(spec_path)
    a = spec.analysis(analysis)
    rec = input_record(spec, cohort)
    prov_base = dict(inputs=[rec], spec_digest=digest(spec.slice_for(analysis)), seed=spec.seed,
                     study=spec.study)
    try:
        frame = read_extract(spec.cohort(cohort).path, a.columns)
    except UnbinError as exc:
        frame = pd.DataFrame()
        tables = {"samples": pd.DataFrame({"step": pd.Series(dtype=str),
                                           "rows": pd.Series(dtype="int64")}),
                  "status": pd.DataFrame([{"status": "failed", "message": str(exc), "n_input": 0,
                                           "n_used": 0, "family": a.family,
                                           "exposure": a.exposure}])}
        status = tables["status"].iloc[0].to_dict()
    else:
        tables, status = analyse(spec, cohort, analysis, frame)
    out = Path(outdir)
    for name in JOB_TABLES:
        df = tables.get(name, pd.DataFrame())
        write_table(_keyed(df, cohort, analysis), out / f"{name}.parquet",
                    provenance(table=name, **prov_base))  # type: ignore[arg-type]
    log.info("%s/%s: %s %s", cohort, analysis, status["status"], status["message"])
    return status


def collect_tables(spec_path: str | Path, work: str | Path, tables_dir: str | Path) -> None:
    spec = load_spec(spec_path)
    inputs = [input_record(spec, c.name) for c in spec.cohorts]
    for name in STUDY_TABLES:
        parts = []
        for c in spec.cohorts:
            for a in spec.analyses:
                df = read_table(Path(work) / c.name / a.name / f"{name}.parquet")
                if len(df):
                    parts.append(df)
        if parts:
            out = pd.concat(parts, ignore_index=True)
        else:
            out = pd.DataFrame({"cohort": pd.Series(dtype=str),
                                "analysis": pd.Series(dtype=str)})
        write_table(out, Path(tables_dir) / f"{name}.parquet",
                    provenance(inputs, digest(spec.raw), spec.seed, name, spec.study))
