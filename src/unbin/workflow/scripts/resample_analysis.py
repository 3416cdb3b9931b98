"""Rule script: the resampling questions of one analysis on one cohort."""

from pathlib import Path

from unbin.pipeline.jobs import resample_analysis
from unbin.pipeline.workflow_support import logging_to, spec_path

sm = snakemake  # type: ignore[name-defined]  # noqa: F821

with logging_to(sm.log[0]):
    resample_analysis(spec_path(sm), sm.wildcards.cohort, sm.wildcards.analysis,
                      Path(sm.output[0]).parent)
