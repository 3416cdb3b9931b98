"""Rule script: the common basis of one analysis from the cohorts' summaries."""

from unbin.pipeline.jobs import common_basis
from unbin.pipeline.workflow_support import logging_to, spec_path

sm = snakemake  # type: ignore[name-defined]  # noqa: F821

with logging_to(sm.log[0]):
    common_basis(spec_path(sm), sm.wildcards.analysis, list(sm.input), sm.output[0])
