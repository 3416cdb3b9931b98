"""Rule script: pool every cohort's bundle."""

from pathlib import Path

from unbin.pipeline.jobs import pool_bundles
from unbin.pipeline.workflow_support import logging_to

sm = snakemake  # type: ignore[name-defined]  # noqa: F821

with logging_to(sm.log[0]):
    bundle_dirs = sorted({str(Path(p).parent) for p in sm.input})
    pool_bundles(bundle_dirs, Path(sm.output[0]).parent, sm.config["spec"])
