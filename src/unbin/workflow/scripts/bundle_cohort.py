"""Rule script: a cohort's share-safe bundle from its job tables."""

from pathlib import Path

from unbin.pipeline.jobs import bundle_cohort
from unbin.pipeline.workflow_support import logging_to, spec_path

sm = snakemake  # type: ignore[name-defined]  # noqa: F821

with logging_to(sm.log[0]):
    # work/<cohort>/<analysis>/<table>.parquet: the work folder, wherever a module prefix put it
    bundle_cohort(spec_path(sm), sm.wildcards.cohort, Path(sm.input[0]).parents[2],
                  Path(sm.output[0]).parent)
