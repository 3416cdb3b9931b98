"""The questions: one module per table, each a builder (refit, spec) -> DataFrame.

The registries below name each table's builder as ``package.module:function`` under ``unbin``;
the pipeline's jobs import a builder only when a job needs it.
"""

from __future__ import annotations

# Tables every (cohort, analysis) fit job writes, and the builder of each from the refit.
QUESTION_TABLES: dict[str, str] = {
    "fits": "questions.fits:fits_table",
    "information": "questions.information:information_table",
    "effects": "questions.effects:effects_table",
    "curves": "questions.curves:curves_table",
    "density": "questions.curves:density_table",
    "coefficients": "consortium.bundles:coefficients_table",
    "common_contrasts": "consortium.bundles:common_contrasts_table",
    "ranges": "questions.ranges:ranges_table",
    "replication": "questions.replication:replication_table",
    "thresholds": "questions.decisions:thresholds_table",
    "net_benefit": "questions.decisions:net_benefit_table",
}
# Questions whose cost is resampling (bootstrap, permutations): a workflow job of their own per
# (cohort, analysis), so they spread over cores or a cluster beside the fits. They need the
# analysis sample only, not the refit's fits.
RESAMPLING_TABLES: dict[str, str] = {
    "confounding": "questions.confounding:confounding_table",
    "cutpoints": "questions.cutpoints:cutpoints_table",
    "information_bootstrap": "questions.kept:information_bootstrap_table",
}
