"""Rule script: concatenate the per-job tables into the study-level tables."""

from pathlib import Path

from unbin.jobs import collect_tables
from unbin.workflow_support import logging_to

sm = snakemake  # type: ignore[name-defined]  # noqa: F821

with logging_to(sm.log[0]):
    collect_tables(sm.params.spec, "work", Path(sm.output[0]).parent)
