"""Small helpers the Snakefile and rule scripts use (no statistics here)."""

from __future__ import annotations

import logging
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from functools import cache
from importlib import resources
from pathlib import Path
from typing import Any

from .. import __version__
from ..data import extract_rows, file_sha256
from ..spec import Spec, digest
from ..spec.missing import missing_options
from .memory import job_memory_mb


def snakefile() -> Path:
    """Path of the workflow's Snakefile shipped inside the package (for `module` users)."""
    return Path(str(resources.files("unbin").joinpath("workflow/Snakefile")))


@cache
def _sha(path: str) -> str:
    return file_sha256(path)


def analysis_params(spec: Spec, cohort: str, analysis: str) -> str:
    """What decides whether a (cohort, analysis) job reruns: the extract's content digest, the
    digest of the spec entries the analysis uses, and unbin's version."""
    c = spec.cohort(cohort)
    return (f"extract={_sha(str(c.path))} spec={digest(spec.slice_for(analysis, cohort))} "
            f"unbin={__version__}")


@cache
def _rows(path: str, dialect: Any) -> int:
    try:
        return extract_rows(Path(path), dialect)
    except Exception:  # noqa: BLE001 - unreadable here: the job itself reports why
        return 0


def analysis_memory_mb(spec: Spec, cohort: str, analysis: str, job: str, attempt: int) -> int:
    """The memory (MB) the ``fit`` or ``resample`` job of a (cohort, analysis) asks for: from
    the extract's row count (read once per extract), the outcome type and the imputed sets
    (:func:`unbin.pipeline.memory.job_memory_mb`)."""
    c = spec.cohort(cohort)
    options = missing_options(spec, analysis)
    sets = options.imputations if options.imputed else 1
    return job_memory_mb(job, _rows(str(c.path), c.csv), spec.analysis(analysis).family, sets,
                         attempt)


def derived_basis_analyses(spec: Spec) -> list[str]:
    """The analyses whose common basis (knots, reference, grid) is derived from the cohorts'
    summaries: with several cohorts, those whose spec does not fix it."""
    if len(spec.cohorts) < 2:
        return []
    return [a.name for a in spec.analyses if not a.continuous.basis_fixed]


def basis_params(spec: Spec, analyses: str | Sequence[str]) -> str:
    """What decides whether an analysis' common basis (or, given several, their common bases)
    is recomputed (beyond the inputs)."""
    if isinstance(analyses, str):
        return f"spec={digest(spec.slice_for(analyses))} unbin={__version__}"
    return f"spec={digest({a: spec.slice_for(a) for a in analyses})} unbin={__version__}"


def basis_cohort_params(spec: Spec, cohort: str, analyses: Sequence[str]) -> str:
    """What decides whether a cohort's summaries of the analyses are recomputed."""
    c = spec.cohort(cohort)
    slices = {a: spec.slice_for(a, cohort) for a in analyses}
    return f"extract={_sha(str(c.path))} spec={digest(slices)} unbin={__version__}"


def cohort_params(spec: Spec, cohort: str) -> str:
    """What decides whether a cohort's bundle is rebuilt."""
    c = spec.cohort(cohort)
    slices = {a.name: spec.slice_for(a.name, cohort) for a in spec.analyses}
    return f"extract={_sha(str(c.path))} spec={digest(slices)} unbin={__version__}"


def study_params(spec: Spec) -> str:
    return f"spec={digest(spec.raw)} unbin={__version__}"


def spec_path(sm: Any) -> str:
    """The spec's path for a rule script: from the workflow config (not from params, so that
    moving a result folder or the spec does not by itself rerun anything)."""
    return str(Path(sm.config["spec"]).resolve())


@contextmanager
def logging_to(path: str) -> Iterator[None]:
    """Send unbin's log records (and captured warnings) to a rule's log file."""
    Path(path).parent.mkdir(parents=True, exist_ok=True)
    handler = logging.FileHandler(path, mode="w")
    handler.setFormatter(logging.Formatter("%(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger()
    root.addHandler(handler)
    root.setLevel(logging.INFO)
    logging.captureWarnings(True)
    try:
        yield
    finally:
        root.removeHandler(handler)
        handler.close()
