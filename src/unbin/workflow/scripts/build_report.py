"""Rule script: draw the study-level figures and write the self-contained HTML report, with the
cohorts' figures read from their own jobs' folders (unbin.present.report)."""

from pathlib import Path

from unbin.present.report import build_report
from unbin.workflow_support import logging_to

sm = snakemake  # type: ignore[name-defined]  # noqa: F821

with logging_to(sm.log[0]):
    build_report(Path(sm.output.report).parent, sm.params.spec, draw_cohorts=False)
