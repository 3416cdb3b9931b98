"""Rule script: the resampling questions of one analysis on one cohort."""

from pathlib import Path

from unbin.pipeline.jobs import resample_analysis
from unbin.pipeline.workflow_support import logging_to, spec_path

sm = snakemake  # type: ignore[name-defined]  # noqa: F821

with logging_to(sm.log[0]):
    # an imputed analysis: its fit job's handover file first, then the tables it reads
    fitted = list(sm.input.get("fitted") or [])
    resample_analysis(spec_path(sm), sm.wildcards.cohort, sm.wildcards.analysis,
                      Path(sm.output[0]).parent, handover=fitted[0] if fitted else None)
