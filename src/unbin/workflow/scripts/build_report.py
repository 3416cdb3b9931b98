"""Rule script: draw the study-level figures and write the self-contained HTML report, with the
cohorts' figures read from their own jobs' folders."""

from unbin.pipeline.jobs import build_report
from unbin.pipeline.workflow_support import logging_to, spec_path

sm = snakemake  # type: ignore[name-defined]  # noqa: F821

with logging_to(sm.log[0]):
    build_report(spec_path(sm), sm.output.report)
