"""The public helpers a consumer's Snakefile imports (``import unbin.workflow_support``): this
path stays stable; the code lives in ``unbin.pipeline.workflow_support``."""

from .pipeline.workflow_support import (
    analysis_params,
    basis_params,
    cohort_params,
    logging_to,
    snakefile,
    spec_path,
    study_params,
)

__all__ = ["analysis_params", "basis_params", "cohort_params", "logging_to", "snakefile",
           "spec_path", "study_params"]
