"""Rule script: the common bases of the analyses from the cohorts' summaries."""

from pathlib import Path

from unbin.pipeline.jobs import common_basis
from unbin.pipeline.workflow_support import logging_to, spec_path

sm = snakemake  # type: ignore[name-defined]  # noqa: F821

with logging_to(sm.log[0]):
    common_basis(spec_path(sm), list(sm.input), Path(sm.output[0]).parent)
