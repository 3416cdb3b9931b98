# Shared set-up: validate the config and the spec up front, and name the jobs.
import copy
import os
from pathlib import Path

from snakemake.utils import min_version, validate

from unbin.consortium.bundles import BUNDLE_TABLES, POOLED_TABLES
from unbin.pipeline.jobs import (
    FIT_JOB_TABLES,
    HANDED_TABLES,
    HANDOVER,
    JOB_TABLES,
    RESAMPLING_TABLES,
    STUDY_TABLES,
)
from unbin.pipeline.workflow_support import (
    analysis_memory_mb,
    analysis_params,
    basis_cohort_params,
    basis_params,
    cohort_params,
    derived_basis_analyses,
    study_params,
)
from unbin.published.spec import PUBLISHED_TABLES, published_studies
from unbin.spec import VALIDATED_ENV, digest, validated_spec
from unbin.spec.missing import missing_options

min_version("9.0")

# Resolve our own files from this file's folder (inside a module, workflow.basedir is the
# consumer's folder).
UNBIN_RULES_DIR = Path(workflow.current_basedir)

validate(config, str(UNBIN_RULES_DIR.parent / "schemas" / "config.schema.json"))
UNBIN_SPEC_PATH = str(Path(config["spec"]).resolve())
UNBIN_SPEC, UNBIN_SPEC_SHA256 = validated_spec(UNBIN_SPEC_PATH)
# Snakemake's validate fills schema defaults in place: validate a copy, keep the spec as written.
validate(
    copy.deepcopy(UNBIN_SPEC.raw), str(UNBIN_RULES_DIR.parent / "schemas" / "spec.schema.json")
)
# The jobs this process starts inherit its environment: a job that finds this very text in the
# spec file skips validating it again (unbin.spec.load.VALIDATED_ENV).
os.environ[VALIDATED_ENV] = UNBIN_SPEC_SHA256

UNBIN_COHORTS = [c.name for c in UNBIN_SPEC.cohorts]
UNBIN_ANALYSES = [a.name for a in UNBIN_SPEC.analyses]
# Several cohorts: common bases from cohort summaries (unless the spec fixes knots, reference
# and grid of an analysis), then pooling.
UNBIN_CONSORTIUM = len(UNBIN_COHORTS) > 1
# Studies known only from their published grouped table join the pooled curves.
UNBIN_PUBLISHED_TABLES = (
    list(PUBLISHED_TABLES) if UNBIN_CONSORTIUM and published_studies(UNBIN_SPEC.raw) else []
)
UNBIN_BASIS_ANALYSES = derived_basis_analyses(UNBIN_SPEC)
UNBIN_DERIVED_BASIS = {a: a in UNBIN_BASIS_ANALYSES for a in UNBIN_ANALYSES}
# Analyses under multiple imputation: their resampling jobs read what the fit jobs hand over.
UNBIN_IMPUTED = {a: missing_options(UNBIN_SPEC, a).imputed for a in UNBIN_ANALYSES}

# Bookkeeping rules run in the main process, not as cluster jobs: each says so itself
# (`localrule: True`), which survives a consumer's `use rule * from unbin as unbin_*` (a
# `localrules:` list names the unprefixed rules and is lost there).


wildcard_constraints:
    cohort="[A-Za-z0-9][A-Za-z0-9_-]*",
    analysis="[A-Za-z0-9][A-Za-z0-9_-]*",
