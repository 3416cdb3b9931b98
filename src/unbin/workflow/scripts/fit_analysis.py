"""Rule script: fit one analysis on one cohort (all statistics live in the unbin package)."""

from pathlib import Path

from unbin.pipeline.jobs import fit_analysis
from unbin.pipeline.workflow_support import logging_to, spec_path

sm = snakemake  # type: ignore[name-defined]  # noqa: F821

with logging_to(sm.log[0]):
    basis = sm.input.get("basis") or None
    fit_analysis(spec_path(sm), sm.wildcards.cohort, sm.wildcards.analysis,
                 Path(sm.output[0]).parent, basis_path=basis)
