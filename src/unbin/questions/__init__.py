"""The questions: one module per table, each a builder (refit, spec) -> DataFrame.

The registries below name each table's builder as ``package.module:function`` under ``unbin``;
the pipeline's jobs import a builder only when a job needs it. Each builder's module states the
columns it writes, in order, as ``COLUMNS`` (``<TABLE>_COLUMNS`` in a module that builds several
tables); the pipeline puts :data:`KEY_COLUMNS` in front of them.
"""

from __future__ import annotations

import importlib

# The columns the pipeline puts first in every per-cohort table: which cohort and analysis.
KEY_COLUMNS: tuple[str, ...] = ("cohort", "analysis")

# Tables every (cohort, analysis) fit job writes, and the builder of each from the refit.
QUESTION_TABLES: dict[str, str] = {
    "fits": "questions.fits:fits_table",
    "information": "questions.information:information_table",
    "effects": "questions.effects:effects_table",
    "curves": "questions.curves:curves_table",
    "density": "questions.density:density_table",
    "coefficients": "consortium.bundles:coefficients_table",
    "common_contrasts": "consortium.bundles:common_contrasts_table",
    "ranges": "questions.ranges:ranges_table",
    "replication": "questions.replication:replication_table",
    "thresholds": "questions.thresholds:thresholds_table",
    "net_benefit": "questions.net_benefit:net_benefit_table",
    "hazards": "questions.hazards:hazards_table",
    "windows": "questions.windows:windows_table",
    "as_published": "questions.as_published:as_published_table",
    "calibration": "questions.calibration:calibration_table",
    "subdistribution": "questions.subdistribution:subdistribution_table",
}
# Questions whose cost is resampling (bootstrap, permutations): a workflow job of their own per
# (cohort, analysis), so they spread over cores or a cluster beside the fits. They need the
# analysis sample only, not the refit's fits.
RESAMPLING_TABLES: dict[str, str] = {
    "confounding": "questions.confounding:confounding_table",
    "cutpoints": "questions.cutpoints:cutpoints_table",
    "information_bootstrap": "questions.kept:information_bootstrap_table",
    "decision_resampling": "questions.decision_resampling:decision_resampling_table",
}


def table_columns(table: str) -> tuple[str, ...]:
    """The columns the builder of ``table`` writes, in order, without :data:`KEY_COLUMNS`."""
    module = {**QUESTION_TABLES, **RESAMPLING_TABLES}[table].split(":")[0]
    mod = importlib.import_module(f"unbin.{module}")
    return tuple(getattr(mod, f"{table.upper()}_COLUMNS", None) or mod.COLUMNS)
