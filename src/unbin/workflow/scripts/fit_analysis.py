"""Rule script: fit one analysis on one cohort (all statistics live in the unbin package)."""

from pathlib import Path

from unbin.jobs import run_analysis_job
from unbin.workflow_support import logging_to

sm = snakemake  # type: ignore[name-defined]  # noqa: F821

with logging_to(sm.log[0]):
    run_analysis_job(sm.params.spec, sm.wildcards.cohort, sm.wildcards.analysis,
                     Path(sm.output[0]).parent)
