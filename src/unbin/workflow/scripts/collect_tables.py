"""Rule script: concatenate the per-job tables into the study-level tables."""

from pathlib import Path

from unbin.pipeline.jobs import collect_tables
from unbin.pipeline.workflow_support import logging_to, spec_path

sm = snakemake  # type: ignore[name-defined]  # noqa: F821

with logging_to(sm.log[0]):
    # work/<cohort>/<analysis>/<table>.parquet: the work folder, wherever a module prefix put it
    collect_tables(spec_path(sm), Path(sm.input[0]).parents[2], Path(sm.output[0]).parent)
