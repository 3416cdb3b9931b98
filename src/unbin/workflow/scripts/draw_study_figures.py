"""Rule script: draw the study-level and pooled figures from the study-level tables."""

from unbin.pipeline.jobs import draw_study_figures
from unbin.pipeline.workflow_support import logging_to, spec_path

sm = snakemake  # type: ignore[name-defined]  # noqa: F821

with logging_to(sm.log[0]):
    draw_study_figures(spec_path(sm), sm.output[0])
