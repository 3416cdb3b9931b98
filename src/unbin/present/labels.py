"""Human labels for what the tables hold: column names, form codes, adjustment codings, pooling
methods. Every table the report or the terminal shows takes its headers and codes from here; a
column no entry names (a future question's table) gets a readable label built from its name, so
no internal name reaches a reader."""

from __future__ import annotations

import re

# Labels of columns many tables share.
_COMMON: dict[str, str] = {
    "cohort": "cohort", "analysis": "analysis", "adjustment": "adjustment",
    "form": "form", "detail": "model", "status": "status", "message": "note",
    "reason": "reason", "note": "note", "caution": "caution", "scale": "scale",
    "n": "rows", "n_input": "rows in extract", "n_used": "rows used", "rows": "rows",
    "events": "events", "person_time": "person-time", "follow_up": "follow-up",
    "step": "step", "family": "outcome", "exposure": "exposure",
    "variance": "SE from", "horizon": "horizon (follow-up time units)",
}

# Labels of the fits table.
_FITS: dict[str, str] = {
    "selected": "selected", "n_params": "parameters", "exposure_df": "exposure df",
    "loglik": "log-likelihood", "lr_chi2": "LR χ²", "aic": "AIC", "bic": "BIC",
    "c_index": "C-index", "r2": "R²", "converged": "converged", "warnings": "warnings",
    "exposure_basis": "exposure basis", "adjustment_terms": "adjustment terms",
    # multiple imputation
    "missing_method": "missing values", "fmi": "missing information",
    "df_imputation": "df (imputation)", "fmi_added": "missing information, spline adds",
    "fmi_nonlinearity": "missing information, nonlinearity",
}

# Labels of the information table.
_INFORMATION: dict[str, str] = {
    "lr_legacy": "LR χ² groups", "df_legacy": "df groups", "lr_linear": "LR χ² linear",
    "df_linear": "df linear", "lr_spline": "LR χ² spline", "df_spline": "df spline",
    "lr_fp": "LR χ² FP", "fp_detail": "FP powers", "lr_test_spline": "LR χ² test spline",
    "df_test_spline": "df test spline", "test_detail": "test spline",
    "lr_legacy_plus_spline": "LR χ² groups + spline", "info_kept": "information kept",
    "info_kept_lower": "information kept, lower", "info_kept_upper": "information kept, upper",
    "added_lr": "LR χ² spline beyond groups", "added_df": "df spline beyond groups",
    "added_p": "spline adds, p", "nonlinearity_lr": "LR χ² nonlinearity",
    "nonlinearity_df": "df nonlinearity", "nonlinearity_p": "nonlinear, p",
    "c_legacy": "C groups", "c_linear": "C linear", "c_spline": "C spline", "c_fp": "C FP",
    "delta_c": "ΔC (spline − groups)", "aic_legacy": "AIC groups", "aic_linear": "AIC linear",
    "aic_spline": "AIC spline", "aic_fp": "AIC FP", "best_form": "best by AIC",
    "interaction_lr": "LR χ² interaction", "interaction_df": "df interaction",
    "interaction_p": "interaction, p", "interaction_detail": "interaction model",
    "level": "level", "replicates": "replicates", "replicates_used": "replicates used",
}

# Labels of effects and curves.
_EFFECTS: dict[str, str] = {
    "contrast_type": "contrast kind", "contrast": "contrast", "group": "group",
    "x_value": "exposure value", "x_reference": "reference value", "x": "exposure value",
    "estimate": "estimate", "se": "SE", "lower": "lower", "upper": "upper",
    "effect": "effect", "effect_lower": "effect, lower", "effect_upper": "effect, upper",
    "within_p10": "spline in group, 10th pct", "within_p90": "spline in group, 90th pct",
    "by_level": "level", "in_range": "in range", "bin_left": "bin from", "bin_right": "bin to",
    "count": "count", "suppressed": "suppressed",
    # subdistribution (competing events)
    "cs_effect": "cause-specific HR", "cs_effect_lower": "cause-specific HR, lower",
    "cs_effect_upper": "cause-specific HR, upper", "competing_events": "competing events",
    "expanded_rows": "rows after expansion",
}

# Labels of pooled results.
_POOLED: dict[str, str] = {
    "method": "pooling", "k": "cohorts (k)", "cohorts": "cohorts", "groups": "groups",
    "pi_lower": "prediction, lower", "pi_upper": "prediction, upper",
    "effect_pi_lower": "prediction effect, lower", "effect_pi_upper": "prediction effect, upper",
    "tau2": "τ²", "tau2_method": "τ² estimator", "i2": "I²", "q": "Q", "q_df": "Q df",
    "q_p": "Q p-value", "item": "pooled item",
    # published grouped tables
    "study": "study", "evidence": "evidence", "design": "design",
    "covariance_method": "covariance from", "reference": "reference group",
    "assigned_exposure": "assigned exposure", "exposure_rule": "exposure from",
    "ratio": "published ratio", "ratio_lower": "published, lower",
    "ratio_upper": "published, upper", "cases": "cases", "other_count": "non-cases or time",
    "fitted_cases": "fitted cases", "fitted_other": "fitted non-cases or time",
    "plotted_log_ratio": "log ratio on the curve", "knots": "knots",
    "coefficients": "coefficients", "slope": "slope (log ratio per unit)", "slope_se": "slope SE",
    "gof_q": "goodness-of-fit Q", "gof_df": "goodness-of-fit df", "gof_p": "goodness of fit, p",
    "nonlinear_chi2": "Wald χ² nonlinearity", "nonlinear_df": "df nonlinearity",
    "nonlinear_p": "nonlinear, p", "curve": "curve",
    "max_shift_without_published": "largest shift without published tables",
    "table_estimate": "slope from the table", "table_se": "slope from the table, SE",
    "individual_estimate": "slope from the rows", "individual_se": "slope from the rows, SE",
    "information_ratio": "information kept by the table",
}

# Labels of harmonisation and cut points.
_CUTS: dict[str, str] = {
    "variable": "variable", "role": "role", "cut": "cut", "percentile": "percentile",
    "median": "median", "derived_from_data": "chosen from the data", "cut_rank": "cut number",
    "cut_median_correlation": "cut–median correlation",
    "mean_distance_from_p50": "mean distance from the median (percentile points)",
    "distance_to_median": "distance to the median",
    "distance_percentile_points": "distance (percentile points)",
    "row_type": "row kind", "statistic": "statistic", "statistic_name": "statistic",
    "p_naive": "naive p", "p_lausen": "corrected p (Lausen)", "p_altman": "corrected p (Altman)",
    "p_permutation": "permutation p", "p_simulated": "simulated p",
    "adjusted_for": "adjusted for", "n_candidates": "candidate cuts",
    "search_lower": "search from", "search_upper": "search to",
    "bootstrap": "bootstrap replicates", "bootstrap_ok": "bootstrap replicates refitted",
    "bootstrap_failed": "bootstrap replicates failed",
}

# Labels of replication, confounding, ranges and decisions.
_QUESTIONS: dict[str, str] = {
    "reported_effect": "published", "reported_lower": "published, lower",
    "reported_upper": "published, upper", "refit_effect": "refit", "refit_lower": "refit, lower",
    "refit_upper": "refit, upper", "verdict": "verdict", "disagrees": "disagrees",
    "share_left": "share of confounding left", "exposure_form": "exposure form",
    "scope": "confounders", "trim": "trim", "change": "change", "risk_kind": "kind of risk",
    "threshold": "risk threshold", "net_benefit": "net benefit", "rule": "rule",
    "model": "model", "exposure_value": "exposure value", "nearest_cut": "nearest legacy cut",
    "profile_quantile": "rest-of-risk quantile",
    # calibration, decision resampling
    "row_kind": "row kind", "n_rows": "rows", "mean_predicted": "mean predicted risk",
    "observed": "observed risk", "observed_lower": "observed, lower",
    "observed_upper": "observed, upper", "quantity": "quantity", "crossing": "crossing",
    "apparent": "apparent", "optimism": "optimism", "corrected": "optimism-corrected",
    "replicates_matched": "replicates with as many crossings",
    "beyond_central_range": "outside 1st–99th percentile",
    "exposure_p01": "exposure 1st percentile", "exposure_p99": "exposure 99th percentile",
    "risk_scale": "risk", "computed_by": "computed by",
    # net benefit (per patient: shares of the analysis sample)
    "rule_type": "rule kind", "treated": "share treated",
    "true_positive": "true positives per patient", "false_positive": "false positives per patient",
    # implied thresholds
    "by": "modifier", "rest_lp": "rest of the linear predictor", "position": "curve vs threshold",
    "direction": "direction", "risk_at_value": "risk at the value",
    "share_below": "share of rows below the value", "shift_from_cut": "shift from the cut",
    "range_lower": "searched from", "range_upper": "searched to",
    "lr_interaction": "LR χ² interaction", "df_interaction": "df interaction",
    "p_interaction": "interaction, p",
}

# Labels of the confounding table (crude, grouped and continuously adjusted estimates).
_CONFOUNDING: dict[str, str] = {
    "comparison": "comparison group", "grouping": "grouped as", "scale_kind": "scale kind",
    "primary": "primary scale", "confounding": "confounding (crude − continuous)",
    "confounding_lower": "confounding, lower", "confounding_upper": "confounding, upper",
    "confounding_clear": "confounding clear of 0", "residual": "residual (grouped − continuous)",
    "share_left_lower": "share left, lower", "share_left_upper": "share left, upper",
    "share_removed": "share of confounding removed",
    "change_confounding": "change from confounding",
    "change_confounding_lower": "change from confounding, lower",
    "change_confounding_upper": "change from confounding, upper",
    "change_noncollapsibility": "change from non-collapsibility",
    "change_noncollapsibility_lower": "change from non-collapsibility, lower",
    "change_noncollapsibility_upper": "change from non-collapsibility, upper",
    "largest": "grouping leaving the most",
    **{f"{part}_{what}": f"{name}{suffix}"
       for what, name in (("crude", "crude"), ("grouped", "grouped adjustment"),
                          ("continuous", "continuous adjustment"))
       for part, suffix in (("estimate", ""), ("se", ", SE"), ("lower", ", lower"),
                            ("upper", ", upper"), ("effect", ", effect"))},
}

# Labels of the missingness table.
_MISSING: dict[str, str] = {
    "column": "column", "subset": "rows of", "missing": "missing",
    "share_missing": "share missing", "smd": "standardised difference (complete − dropped)",
    "smd_method": "difference of",
}

COLUMNS: dict[str, str] = {**_COMMON, **_FITS, **_INFORMATION, **_EFFECTS, **_POOLED, **_CUTS,
                           **_QUESTIONS, **_CONFOUNDING, **_MISSING}

FORMS: dict[str, str] = {
    "legacy": "legacy groups", "linear": "linear", "spline": "spline",
    "fp": "fractional polynomial", "fp1": "fractional polynomial, degree 1",
    "fp2": "fractional polynomial, degree 2", "null": "adjustment only",
    "legacy+spline": "groups + spline", "legacy+test_spline": "groups + test spline",
    "test_spline": "test spline (fixed knots)", "common_spline": "spline on common knots",
    "legacy x level": "legacy groups × level", "spline x level": "spline × level",
    "crude": "crude",
}

ADJUSTMENTS: dict[str, str] = {
    "legacy": "as in the legacy analysis", "continuous": "confounders continuous",
    "none": "unadjusted",
}

METHODS: dict[str, str] = {
    "fixed": "fixed effect", "random": "random effects",
    "random HKSJ": "random effects, HKSJ",
    "multivariate fixed": "multivariate fixed", "multivariate random": "multivariate random",
    "multivariate random, with published tables": "multivariate random, with published tables",
}

CONTRAST_TYPES: dict[str, str] = {
    "group": "legacy group", "iqr": "quartiles", "per_unit": "per unit",
    "common group": "common group values", "common quartiles": "common quartiles",
}

FAMILIES: dict[str, str] = {
    "binary": "binary (logistic)", "continuous": "continuous (linear)",
    "count": "count (Poisson)", "survival": "time to event (Cox)",
}

# Abbreviations spelled out when a label is built from a column's name.
_WORDS: dict[str, str] = {
    "lr": "LR χ²", "p": "p", "df": "df", "se": "SE", "ci": "CI", "n": "rows", "aic": "AIC",
    "bic": "BIC", "fp": "FP", "pi": "prediction", "tau2": "τ²", "i2": "I²", "q": "Q",
    "c": "C", "info": "information", "pct": "percent", "lo": "lower", "hi": "upper",
    "p50": "median", "x": "exposure",
}


def column(name: str) -> str:
    """The header of a column: its label, or one built from its name (``q_df`` -> "Q df")."""
    if name in COLUMNS:
        return COLUMNS[name]
    words = [w for w in re.split(r"[_\s]+", str(name)) if w]
    if not words:
        return str(name)
    return " ".join(_WORDS.get(w.lower(), w) for w in words)


def code(kind: str, value: object) -> str:
    """A code in a table cell as words: ``code("form", "fp")`` -> "fractional polynomial"."""
    text = str(value)
    table = {"form": FORMS, "exposure_form": FORMS, "model": FORMS, "best_form": FORMS,
             "adjustment": ADJUSTMENTS, "method": METHODS, "contrast_type": CONTRAST_TYPES,
             "family": FAMILIES}.get(kind, {})
    if text in table:
        return table[text]
    if kind in ("form", "exposure_form", "model", "best_form"):
        return form(text)
    return text


def form(value: str) -> str:
    """A form code as words, also for the composite codes (``spline x age``)."""
    if value in FORMS:
        return FORMS[value]
    m = re.fullmatch(r"(\w+) x (.+)", value)
    if m and m.group(1) in FORMS:
        return f"{FORMS[m.group(1)]} × {m.group(2)}"
    return value.replace("_", " ")


SHORT_FORMS: dict[str, str] = {"fp": "FP", "legacy": "groups", "legacy+spline": "groups + spline"}


def short_form(value: str) -> str:
    """A form code for narrow columns (the terminal): "FP" for fractional polynomial."""
    return SHORT_FORMS.get(value, form(value))
