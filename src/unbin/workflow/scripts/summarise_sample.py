"""Rule script: a cohort's share-safe summaries of the analyses' exposures."""

from unbin.pipeline.jobs import summarise_sample
from unbin.pipeline.workflow_support import logging_to, spec_path

sm = snakemake  # type: ignore[name-defined]  # noqa: F821

with logging_to(sm.log[0]):
    summarise_sample(spec_path(sm), sm.wildcards.cohort, sm.output[0])
