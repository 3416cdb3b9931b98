"""Small helpers the Snakefile and rule scripts use (no statistics here)."""

from __future__ import annotations

import logging
from collections.abc import Iterator
from contextlib import contextmanager
from functools import cache
from importlib import resources
from pathlib import Path

from . import __version__
from .data import file_sha256
from .spec import Spec, digest


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
    return (f"extract={_sha(str(c.path))} spec={digest(spec.slice_for(analysis))} "
            f"unbin={__version__}")


def study_params(spec: Spec) -> str:
    return f"spec={digest(spec.raw)} unbin={__version__}"


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
