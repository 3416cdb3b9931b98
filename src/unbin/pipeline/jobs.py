"""What the workflow's jobs do, as plain functions: one per rule, named after the rule (the rule
scripts only call these). Questions never read files; this module is where reading and writing
happens.

Per (cohort, analysis): ``fit_analysis`` (the fits and the question tables built from them) and
``resample_analysis`` (the resampling questions). Study level: ``collect_tables``. Consortium
mode: ``summarise_sample``, ``common_basis``, ``bundle_cohort``, ``pool_bundles``. Last:
``draw_figures`` (one cohort's figures), ``draw_study_figures`` and ``build_report``.
"""

from __future__ import annotations

import importlib
import json
import logging
import traceback
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd

from ..consortium.basis import CommonBasis, combine, sample_summary
from ..consortium.bundles import BUNDLE_TABLES, POOLED_TABLES
from ..data import (
    MIN_SAMPLE_ROWS,
    Sample,
    _type_problems,
    analysis_sample,
    extract_rows,
    file_sha256,
    read_extract,
)
from ..errors import DataError, UnbinError
from ..questions import KEY_COLUMNS, QUESTION_TABLES, RESAMPLING_TABLES
from ..questions.missingness import COLUMNS as MISSINGNESS_COLUMNS
from ..questions.missingness import missingness_table
from ..results.provenance import provenance
from ..results.tables import read_table, write_table
from ..spec import Analysis, Spec, digest, load_spec
from ..spec.missing import missing_options
from ..terms.legacy import legacy_term
from .memory import keep_freed_memory
from .workflow_support import derived_basis_analyses

if TYPE_CHECKING:
    from ..refit.analysis import Refit

# The statistics modules are imported when a job needs them: light jobs (summaries, bundles,
# pooling, collecting) then start without scipy.stats, statsmodels and friends.


def _builder(target: str) -> Callable[[Refit, Spec], pd.DataFrame]:
    """``package.module:function`` (under ``unbin``) -> the table builder; every builder takes
    (refit, spec)."""
    module, name = target.split(":")
    fn: Callable[[Refit, Spec], pd.DataFrame] = getattr(
        importlib.import_module(f"unbin.{module}"), name)
    return fn


log = logging.getLogger("unbin")

FIT_JOB_TABLES: tuple[str, ...] = (*QUESTION_TABLES, "samples", "missingness", "status")
# What a fit job hands its analysis' resampling job besides its tables: under multiple
# imputation the imputed sets and the first set's choices (``pipeline.imputed.handover_state``;
# empty for complete cases). An imputed analysis' resampling job reads it and HANDED_TABLES.
HANDOVER = "handover.pkl"
HANDED_TABLES = ("information", "thresholds")
JOB_TABLES: tuple[str, ...] = (*FIT_JOB_TABLES, *RESAMPLING_TABLES)
STUDY_TABLES = JOB_TABLES


def input_record(spec: Spec, cohort: str) -> dict[str, Any]:
    c = spec.cohort(cohort)
    return {"cohort": cohort, "path": c.path_as_written, "sha256": file_sha256(c.path),
            "rows": extract_rows(c.path, c.csv)}


def _keyed(df: pd.DataFrame, cohort: str, analysis: str) -> pd.DataFrame:
    df = df.copy()
    for position, (key, value) in enumerate(zip(KEY_COLUMNS, (cohort, analysis), strict=True)):
        df.insert(position, key, value)
    return df


def failed_fit_messages(fits: Sequence[Any]) -> list[str]:
    """One line per cause: the fits (form/adjustment) that failed for the same reason share it
    ("legacy/legacy, legacy/continuous, legacy/none: <why>"), in the order first met."""
    by_reason: dict[str, list[str]] = {}
    for f in fits:
        if not f.result.ok and f.selected:
            by_reason.setdefault(f.result.message, []).append(f"{f.form}/{f.adjustment}")
    return [f"{', '.join(which)}: {why}" for why, which in by_reason.items()]


def failure_status(exc: Exception, where: str) -> dict[str, str]:
    """The status of an analysis that stopped: ``failed`` with the message of an UnbinError (bad
    data, an empty sample), ``error`` for an internal error (logged with its traceback)."""
    if isinstance(exc, UnbinError):
        return {"status": "failed", "message": str(exc)}
    log.error("internal error in %s:\n%s", where, traceback.format_exc())
    return {"status": "error", "message": f"internal error ({type(exc).__name__}: {exc}); please "
            "report it with the log file of this job."}


def check_sample_usable(sample: Sample, a: Analysis) -> None:
    """A DataError when the analysis sample cannot be analysed: fewer than MIN_SAMPLE_ROWS rows
    (naming the step that dropped most), or an outcome without events (or non-events)."""
    if sample.n < MIN_SAMPLE_ROWS:
        step, lost = max(sample.dropped, key=lambda d: d[1], default=("", 0))
        most = f" (most were dropped by '{step}': {lost} rows)" if lost else ""
        raise DataError(f"only {sample.n} rows are left after filters, complete cases and "
                        f"follow-up checks{most}; check the filters and missing values (see "
                        "samples.parquet).")
    event = a.outcome.event
    if event is not None:
        events = int(sample.frame[event].sum())
        if events == 0 or (a.family == "binary" and events == sample.n):
            raise DataError(f"no {'events' if events == 0 else 'non-events'} in the analysis "
                            f"sample: {event!r} is {1 if events else 0} in all {sample.n} "
                            "rows; there is no contrast to estimate. Check the outcome "
                            "coding and the filters.")


def _answer_questions(builders: dict[str, str], refit: Refit, spec: Spec,
                      tables: dict[str, pd.DataFrame], where: str) -> list[str]:
    """Each question's table into ``tables``; one question that fails loses its own table only
    (an empty one), never the analysis' others. Returns the failures' messages."""
    lost: list[str] = []
    for name, target in builders.items():
        try:
            tables[name] = _builder(target)(refit, spec)
        except Exception as exc:
            if not isinstance(exc, UnbinError):
                log.error("internal error in %s, question %s:\n%s", where, name,
                          traceback.format_exc())
            tables[name] = pd.DataFrame()
            lost.append(f"question {name!r} failed ({type(exc).__name__}: {exc}); its table is "
                        "empty, the other tables are complete")
    return lost


def analyse(spec: Spec, cohort: str, analysis: str, frame: pd.DataFrame,
            basis: CommonBasis | None = None, resampling: bool = True
            ) -> tuple[dict[str, pd.DataFrame], dict[str, Any]]:
    """Every question's table for one analysis on one cohort's rows, plus its status record
    (the resampling questions too unless ``resampling`` is false: the workflow runs those in
    their own job, ``resample_analysis``).

    Problems of this analysis (bad data, empty sample, a failing question) are recorded in the
    status, never raised: the other analyses must complete.
    """
    return _analyse_extract(spec, cohort, analysis, [frame], basis, resampling)


def _analyse_extract(spec: Spec, cohort: str, analysis: str, extract: list[pd.DataFrame],
                     basis: CommonBasis | None, resampling: bool,
                     handover: dict[str, Any] | None = None
                     ) -> tuple[dict[str, pd.DataFrame], dict[str, Any]]:
    """:func:`analyse` of the frame in ``extract`` (a list of one), which is taken out of the
    list once the analysis sample and the missingness table are built: when the caller keeps
    no other reference (``fit_analysis``), the extract's rows are freed before the fits. An
    imputed analysis fills ``handover`` (see :data:`HANDOVER`)."""
    a = spec.analysis(analysis)
    if missing_options(spec, analysis).imputed:  # multiple imputation: its own module
        from .imputed import analyse_imputed

        return analyse_imputed(spec, cohort, analysis, extract.pop(), basis,
                               resampling=resampling, handover=handover)
    frame = extract[0]
    status: dict[str, Any] = {"status": "ok", "message": "", "n_input": len(frame), "n_used": 0,
                              "family": a.family, "exposure": a.exposure}
    tables: dict[str, pd.DataFrame] = {}
    samples = pd.DataFrame({"step": pd.Series(dtype=str), "rows": pd.Series(dtype="int64")})
    missing = pd.DataFrame(columns=list(MISSINGNESS_COLUMNS))
    missing_note: list[str] = []
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
        try:  # built before the size check: it explains a sample that is too small
            missing = missingness_table(frame, sample, a, spec)
        except Exception as exc:
            log.error("internal error in %s/%s, table missingness:\n%s", cohort, analysis,
                      traceback.format_exc())
            missing_note.append(f"table 'missingness' failed ({type(exc).__name__}: {exc}); "
                                "it is empty, the other tables are complete")
        extract.clear()
        del frame  # the sample holds the rows the fits use
        check_sample_usable(sample, a)
        from ..refit.analysis import refit_analysis

        refit = refit_analysis(sample, a, spec, cohort, basis)
        failed = failed_fit_messages(refit.fits)
        builders = {**QUESTION_TABLES, **(RESAMPLING_TABLES if resampling else {})}
        lost_questions = _answer_questions(builders, refit, spec, tables, f"{cohort}/{analysis}")
        notes = refit.messages + failed + lost_questions + missing_note
        if failed or lost_questions or missing_note:
            status["status"] = "partial"
        status["message"] = " | ".join(dict.fromkeys(notes))
    except Exception as exc:  # recorded, never raised: the other analyses must complete
        status.update(failure_status(exc, f"{cohort}/{analysis}"))
        tables = {}
    tables["samples"] = samples
    tables["missingness"] = missing
    tables["status"] = pd.DataFrame([status])
    return tables, status


def fit_analysis(spec_path: str | Path, cohort: str, analysis: str,
                 outdir: str | Path, basis_path: str | Path | None = None) -> dict[str, Any]:
    keep_freed_memory()  # registry-size temporaries reused, not mapped afresh (pipeline.memory)
    spec = load_spec(spec_path).for_cohort(cohort)
    a = spec.analysis(analysis)
    rec = input_record(spec, cohort)
    prov_base = dict(inputs=[rec], spec_digest=digest(spec.slice_for(analysis, cohort)),
                     seed=spec.seed, study=spec.study)
    handover: dict[str, Any] = {}
    try:
        basis = None
        if basis_path is not None:
            saved = json.loads(Path(basis_path).read_text())
            if saved.get("status") == "failed":
                raise DataError(saved["message"])
            basis = CommonBasis.from_dict(saved)
        extract = [read_extract(spec.cohort(cohort).path, a.columns, spec.cohort(cohort).csv)]
    except UnbinError as exc:
        tables = {"samples": pd.DataFrame({"step": pd.Series(dtype=str),
                                           "rows": pd.Series(dtype="int64")}),
                  "status": pd.DataFrame([{"status": "failed", "message": str(exc), "n_input": 0,
                                           "n_used": 0, "family": a.family,
                                           "exposure": a.exposure}])}
        status = tables["status"].iloc[0].to_dict()
    else:
        # no reference kept here: the extract's rows are freed once the sample is built
        tables, status = _analyse_extract(spec, cohort, analysis, extract, basis,
                                          resampling=False, handover=handover)
    out = Path(outdir)
    for name in FIT_JOB_TABLES:
        df = tables.get(name, pd.DataFrame())
        write_table(_keyed(df, cohort, analysis), out / f"{name}.parquet",
                    provenance(table=name, **prov_base))  # type: ignore[arg-type]
    from .imputed import save_handover

    save_handover(out / HANDOVER, handover)
    log.info("%s/%s: %s %s", cohort, analysis, status["status"], status["message"])
    return status


def stack_tables(parts: Sequence[pd.DataFrame]) -> pd.DataFrame:
    """The job tables one under the other (``pd.concat``), a column that is all missing in some
    parts (an analysis without horizon: None in an object column) taking the type it has in
    the others. pandas gave these columns that type already, by leaving all-missing columns
    out when it chose a column's type, and has deprecated that; here the all-missing columns
    are given the others' type first (where it holds missing values: float, string, nullable
    integer, dates), so the stacked table is the same, columns, types and values, and pandas
    chooses nothing from all-missing columns."""
    parts = list(parts)
    if len(parts) > 1:
        columns = dict.fromkeys(c for df in parts for c in df.columns)
        for col in columns:
            empty = [i for i, df in enumerate(parts) if col in df and df[col].isna().all()]
            full = [df[col] for df in parts if col in df and not df[col].isna().all()]
            if not empty or not full:
                continue
            target = pd.concat(full, ignore_index=True).dtype
            for i in empty:
                s = parts[i][col]
                if s.dtype == target:
                    continue
                try:
                    cast = s.astype(target)
                except (TypeError, ValueError):
                    continue  # a type without missing values (int, bool): left to pandas
                if cast.isna().all():
                    parts[i] = parts[i].assign(**{col: cast})
    return pd.concat(parts, ignore_index=True)


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
            out = stack_tables(parts)
        else:
            out = pd.DataFrame({"cohort": pd.Series(dtype=str),
                                "analysis": pd.Series(dtype=str)})
        write_table(out, Path(tables_dir) / f"{name}.parquet",
                    provenance(inputs, digest(spec.raw), spec.seed, name, spec.study))


# --------------------------------------------------------------------------- consortium mode


def summarise_sample(spec_path: str | Path, cohort: str, outdir: str | Path) -> None:
    """A cohort's share-safe summaries of the exposures of the analyses whose common basis is
    derived (for the common bases), one file per analysis: ``outdir/<analysis>.json``."""
    analyses = derived_basis_analyses(load_spec(spec_path))
    spec = load_spec(spec_path).for_cohort(cohort)
    Path(outdir).mkdir(parents=True, exist_ok=True)
    for analysis in analyses:
        a = spec.analysis(analysis)
        summary: dict[str, Any] = {"cohort": cohort, "analysis": analysis, "status": "ok"}
        try:
            frame = read_extract(spec.cohort(cohort).path, a.columns, spec.cohort(cohort).csv)
            problems = _type_problems(a, frame, spec)
            if problems:
                raise DataError(" ".join(problems))
            sample = analysis_sample(frame, a, spec)
            if sample.n < MIN_SAMPLE_ROWS:
                raise DataError(f"only {sample.n} rows in the analysis sample")
            x = sample.frame[a.exposure].to_numpy(float)
            summary.update(sample_summary(x, legacy_term(x, a.exposure, spec), a.continuous,
                                          spec.min_cell))
        except UnbinError as exc:
            summary.update(status="failed", message=str(exc))
        (Path(outdir) / f"{analysis}.json").write_text(json.dumps(summary, sort_keys=True,
                                                                  indent=1))


def common_basis(spec_path: str | Path, summary_dirs: Sequence[str | Path],
                 outdir: str | Path) -> None:
    """The common basis (``outdir/<analysis>.json``) of each analysis that derives one, from
    the cohorts' summaries (``<summary_dir>/<analysis>.json``, one folder per cohort). An
    analysis that no cohort could summarise gets a file with ``status: failed`` and the
    reason, which its fit jobs record; the other analyses go on."""
    spec = load_spec(spec_path)
    Path(outdir).mkdir(parents=True, exist_ok=True)
    for analysis in derived_basis_analyses(spec):
        a = spec.analysis(analysis)
        usable = [d for d in (json.loads((Path(p) / f"{analysis}.json").read_text())
                              for p in summary_dirs) if d["status"] == "ok"]
        if usable:
            out = combine(usable, a.continuous).to_dict()
        else:
            out = {"status": "failed",
                   "message": f"analysis {analysis!r}: no cohort could summarise its sample "
                              "for the common basis; see the summaries/ folder for each "
                              "cohort's message."}
        (Path(outdir) / f"{analysis}.json").write_text(json.dumps(out, sort_keys=True, indent=1))


BUNDLE_SOURCES = ("fits", "curves", "effects", "coefficients", "common_contrasts", "status",
                  "cutpoints")


def bundle_cohort(spec_path: str | Path, cohort: str, work: str | Path,
                  bundle_dir: str | Path) -> None:
    """The cohort's share-safe bundle, built from its job tables."""
    spec = load_spec(spec_path).for_cohort(cohort)
    tables = {}
    for name in BUNDLE_SOURCES:
        parts = [read_table(Path(work) / cohort / a.name / f"{name}.parquet")
                 for a in spec.analyses]
        parts = [p for p in parts if len(p)]
        tables[name] = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(
            columns=["cohort", "analysis", "form", "adjustment", "contrast", "events",
                     "row_type", "n_used", "status"])
    from ..consortium.bundles import bundle_problems, make_bundle

    bundle = make_bundle(tables, spec.min_cell)
    rec = input_record(spec, cohort)
    grid = max(a.continuous.grid_points for a in spec.analyses)
    problems = bundle_problems(bundle, spec.min_cell, grid)
    if problems:
        raise DataError("the bundle is not share-safe: " + "; ".join(problems))
    prov = dict(inputs=[rec], spec_digest=digest({a.name: spec.slice_for(a.name, cohort)
                                                  for a in spec.analyses}),
                seed=spec.seed, study=spec.study)
    for name in BUNDLE_TABLES:
        write_table(bundle[name], Path(bundle_dir) / f"{name}.parquet",
                    provenance(table=f"bundle:{name}", **prov))  # type: ignore[arg-type]


def read_bundle(bundle_dir: str | Path) -> tuple[dict[str, pd.DataFrame], dict[str, Any]]:
    d = Path(bundle_dir)
    missing = [n for n in BUNDLE_TABLES if not (d / f"{n}.parquet").is_file()]
    if missing:
        raise DataError(f"{str(d)!r} is not a complete unbin bundle: {missing} missing; pass the "
                        "folders under <out>/bundles/ of a finished run.")
    from ..results.tables import read_provenance

    return ({n: read_table(d / f"{n}.parquet") for n in BUNDLE_TABLES},
            read_provenance(d / "curves.parquet"))


def pool_bundles(bundle_dirs: Sequence[str | Path], tables_dir: str | Path,
             spec_path: str | Path | None = None) -> None:
    """Pool cohort bundles (from one run or from separate runs) into the pooled tables; with a
    spec that has ``published`` studies, they join the pooled curves (``unbin.published``)."""
    bundles, provs = {}, []
    for d in bundle_dirs:
        bundle, prov = read_bundle(d)
        cohorts = bundle["counts"]["cohort"].unique() if len(bundle["counts"]) else [Path(d).name]
        name = str(cohorts[0])
        if name in bundles:
            raise DataError(f"two bundles are for cohort {name!r}; pass each cohort once.")
        bundles[name] = bundle
        provs.append(prov)
    from ..consortium import pool

    pooled = pool.pool_bundles(dict(sorted(bundles.items())))  # the same tables in any order
    names = list(POOLED_TABLES)
    if spec_path is not None:
        from ..published.job import add_published
        from ..published.spec import PUBLISHED_TABLES

        spec = load_spec(spec_path)
        pooled = add_published(spec, dict(sorted(bundles.items())), pooled)
        names += [n for n in PUBLISHED_TABLES if n in pooled]
    inputs = [i for p in provs for i in p.get("inputs", [])]
    prov = dict(inputs=inputs, spec_digest=digest(sorted(p.get("spec_digest", "") for p in provs)),
                seed=provs[0].get("seed", 0) if provs else 0,
                study=provs[0].get("study", "") if provs else "")
    for name in names:
        df = pooled.get(name, pd.DataFrame())
        if df.empty:
            df = pd.DataFrame({"analysis": pd.Series(dtype=str)})
        write_table(df, Path(tables_dir) / f"{name}.parquet",
                    provenance(table=name, **prov))


# --------------------------------------------------------------------------- versioned updates


def compare_folders(old: str | Path, new: str | Path, tolerance: float) -> pd.DataFrame:
    """What changed between two result folders (see ``unbin.results.compare``)."""
    from ..results.compare import (
        COMPARED,
        compare_commits,
        compare_provenance,
        compare_tables,
        run_record,
    )
    from ..results.tables import read_provenance

    def tables(root: Path) -> dict[str, pd.DataFrame]:
        names = [*COMPARED, "status"]
        return {n: read_table(root / "tables" / f"{n}.parquet") for n in names
                if (root / "tables" / f"{n}.parquet").is_file()}

    def provs(root: Path) -> dict[tuple[str, str], dict[str, Any]]:
        out = {}
        for p in sorted((root / "work").glob("*/*/status.parquet")):
            out[(p.parent.parent.name, p.parent.name)] = read_provenance(p)
        return out

    o, n = Path(old), Path(new)
    for root in (o, n):
        if not (root / "tables" / "status.parquet").is_file():
            raise DataError(f"{str(root)!r} is not a finished unbin result folder (no "
                            "tables/status.parquet).")
    changes = compare_tables(tables(o), tables(n), tolerance)
    prov = compare_provenance(provs(o), provs(n))
    commits = compare_commits(run_record(o), run_record(n))
    parts = [d for d in (commits, prov, changes) if len(d)]
    return pd.concat(parts, ignore_index=True) if parts else changes


def resample_analysis(spec_path: str | Path, cohort: str, analysis: str, outdir: str | Path,
                      handover: str | Path | None = None) -> None:
    """The resampling questions of one analysis on one cohort (bootstrap, permutations), on the
    analysis sample (an imputed analysis: from its fit job's ``handover`` file and tables,
    :func:`unbin.pipeline.imputed.resampling_from_fit`; without one, imputed and refitted
    again, :func:`unbin.pipeline.imputed.resampling_tables`); an analysis that cannot run
    leaves empty tables (its fit job records why)."""
    keep_freed_memory()
    spec = load_spec(spec_path).for_cohort(cohort)
    a = spec.analysis(analysis)
    prov_base = dict(inputs=[input_record(spec, cohort)],
                     spec_digest=digest(spec.slice_for(analysis, cohort)), seed=spec.seed,
                     study=spec.study)
    tables: dict[str, pd.DataFrame] = {}
    try:
        frame = read_extract(spec.cohort(cohort).path, a.columns, spec.cohort(cohort).csv)
        if _type_problems(a, frame, spec):
            raise DataError("the data do not fit the spec (see the fit job's status)")
        if missing_options(spec, analysis).imputed and handover is not None:
            from .imputed import resampling_from_fit

            tables = resampling_from_fit(spec, cohort, analysis, frame, handover)
        elif missing_options(spec, analysis).imputed:  # within the imputed sets
            from .imputed import resampling_tables

            tables = resampling_tables(spec, cohort, analysis, frame)
        else:
            sample = analysis_sample(frame, a, spec)
            del frame  # the sample holds the rows the tables use
            if sample.n < MIN_SAMPLE_ROWS:
                raise DataError("too few rows")
            from ..refit.analysis import bare_refit

            r = bare_refit(sample, a, spec, cohort)
            for name, target in RESAMPLING_TABLES.items():
                tables[name] = _builder(target)(r, spec)
    except UnbinError as exc:
        log.info("%s/%s: resampling questions not run: %s", cohort, analysis, exc)
        tables = {}
    for name in RESAMPLING_TABLES:
        df = tables.get(name, pd.DataFrame())
        write_table(_keyed(df, cohort, analysis), Path(outdir) / f"{name}.parquet",
                    provenance(table=name, **prov_base))  # type: ignore[arg-type]


# --------------------------------------------------------------------------- figures and report


def draw_figures(spec_path: str | Path, cohort: str, figures_dir: str | Path) -> None:
    """One cohort's figures into ``figures_dir`` (``<run>/figures/<cohort>``), from the run's
    study-level tables of the cohorts' jobs (the pooled ones are the report's)."""
    from ..present import report

    report.draw_cohort_figures(Path(figures_dir).parent.parent, spec_path, cohort, STUDY_TABLES)


def draw_study_figures(spec_path: str | Path, figures_dir: str | Path) -> None:
    """The study-level and pooled figures into ``figures_dir`` (``<run>/figures/_study``), from
    every study-level table of the run."""
    from ..present import report

    report.draw_study_figures(Path(figures_dir).parent.parent, spec_path)


def build_report(spec_path: str | Path, report_path: str | Path) -> None:
    """The self-contained HTML report at ``report_path`` (``<run>/report.html``), with the
    figures read from their own jobs' folders."""
    from ..present import report

    report.build_report(Path(report_path).parent, spec_path, draw_cohorts=False)
