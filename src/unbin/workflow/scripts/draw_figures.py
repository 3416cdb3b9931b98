"""Rule script: draw one cohort's figures from the study-level tables (unbin.present.report)."""

from pathlib import Path

from unbin.present.report import draw_cohort_figures
from unbin.workflow_support import logging_to

sm = snakemake  # type: ignore[name-defined]  # noqa: F821

with logging_to(sm.log[0]):
    draw_cohort_figures(Path(sm.output[0]).parent.parent, sm.params.spec, sm.wildcards.cohort)
