"""An analysis under multiple imputation (``missing: {method: impute}``).

The analysis sample keeps the rows whose exposure, adjusters or ``by`` are missing (filters,
a missing outcome, stratum, weight or cluster and impossible follow-up still drop rows, as with
complete cases); :func:`unbin.data.impute.impute_chained` fills them M times, with the outcome
in every imputation model (binary: the event; continuous: the value; count: the count and the
log person-time; survival: the event and the Nelson–Aalen cumulative hazard, White & Royston
2009). Splines, legacy groups and FP powers are then built from each set's imputed raw values.

Choices are made once, on the first imputed set: the full refit there (spline knots by AIC, the
FP function selection) is the first set's refit, and every other set repeats its fits with its
terms (:func:`_refit_fixed`): the chosen spline's knots, the chosen FP1, FP2 and FP functions
(their powers, shift and scale), the test spline's and the adjusters' knots, the legacy
grouping and the common basis (curve grid and reference). The sets' tables therefore match
row for row, and every coefficient means the same in every set, which Rubin's rules, D1 and
D3 need. The cost is one full refit plus M - 1 refits of some thirty fixed designs, not M full
FP searches; the sets are refitted one at a time, each set's tables built and its fits kept
without their per-row linear predictors, so memory holds one set's refit at a time. Each
question's table is built per set and combined (:func:`unbin.refit.combine.combine_tables`:
Rubin's rules with Barnard–Rubin degrees of freedom); the information table's tests by D3
(likelihood ratio; Meng & Rubin 1992: each set's tested models evaluated again at the
coefficients averaged over the sets, :func:`pooled_logliks`), or by D1 (Wald) where the fits
maximise no plain likelihood (penalised, matched, quasi-Poisson, negative binomial, sampling
weights or a cluster), and the interaction test by D2.
"""

from __future__ import annotations

import logging
import pickle
import traceback
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..consortium.basis import CommonBasis
from ..data import MIN_SAMPLE_ROWS, Sample, _type_problems, analysis_sample
from ..data.impute import Target, impute_chained, nelson_aalen
from ..errors import DataError, UnbinError
from ..models import Outcome
from ..models.percentile_limits import percentile_limits
from ..spec import Analysis, Spec
from ..spec.missing import MissingOptions, missing_options
from ..terms.roles import variable_role
from .jobs import HANDED_TABLES

log = logging.getLogger("unbin")

ROW = "__unbin_row"
METHOD_COLUMN = "missing_method"


def imputed_columns(a: Analysis) -> tuple[str, ...]:
    """The columns imputation fills: the exposure, the adjusters and ``by`` (never the outcome,
    strata, weights or clusters)."""
    fixed = {*a.outcome.columns, *a.strata, *((a.weights.column,) if a.weights else ()),
             *((a.cluster,) if a.cluster else ())}
    return tuple(c for c in dict.fromkeys([a.exposure, *a.adjust, *([a.by] if a.by else [])])
                 if c not in fixed)


def incomplete_sample(frame: pd.DataFrame, a: Analysis, spec: Spec
                      ) -> tuple[Sample, dict[str, int]]:
    """The analysis sample with the imputed columns' missing values kept (NaN), and the count of
    missing values per imputed column in it."""
    cols = imputed_columns(a)
    work = frame.copy()
    work[ROW] = np.arange(len(work))
    masks = {c: work[c].isna().to_numpy() for c in cols}
    for c in cols:
        observed = work[c].dropna()
        if observed.empty:
            raise DataError(f"column {c!r} is missing in every row of the extract; it cannot be "
                            "imputed. Remove it from the analysis or fill it in the extract.")
        work.loc[masks[c], c] = observed.iloc[0]  # keeps the row past the complete-case step; NaN again below
    sample = analysis_sample(work, a, spec)
    out = sample.frame
    rows = out[ROW].to_numpy()
    counts = {}
    for c in cols:
        miss = masks[c][rows]
        out.loc[miss, c] = np.nan
        counts[c] = int(miss.sum())
    dropped = tuple(d for d in sample.dropped
                    if not (d[0].startswith("missing ") and d[0][8:] in cols))
    return Sample(out.drop(columns=ROW), sample.n_input, dropped), counts


def outcome_auxiliary(sample: Sample, a: Analysis) -> np.ndarray:
    """The outcome as it enters every imputation model (White & Royston 2009 for survival)."""
    df = sample.frame
    o = a.outcome
    if a.family == "binary":
        return df[[o.event]].to_numpy(float)
    if a.family == "continuous":
        return df[[o.value]].to_numpy(float)
    if a.family == "count":
        assert o.count is not None and o.persontime is not None
        return np.column_stack([df[o.count].to_numpy(float),
                                np.log(df[o.persontime].to_numpy(float))])
    assert o.time is not None and o.event is not None
    entry = df[o.entry].to_numpy(float) if o.entry else None
    event = df[o.event].to_numpy(float)
    return np.column_stack([event, nelson_aalen(df[o.time].to_numpy(float), event, entry)])


def _targets(sample: Sample, a: Analysis, spec: Spec) -> list[Target]:
    out = []
    for c in imputed_columns(a):
        s = sample.frame[c]
        numeric = (pd.api.types.is_numeric_dtype(s) and not pd.api.types.is_bool_dtype(s)
                   and variable_role(c, spec, s) != "factor")
        out.append(Target(c, "numeric" if numeric else "categorical"))
    return out


# What an outcome's fitters keep in ``Outcome.cache`` that depends on the outcome alone (the
# imputed sets share their outcome: it is never imputed); anything keyed by terms is left out,
# as the sets' designs differ.
SHARED_CACHE = ("cox_layout", "matched_layout", "poisson_constant")


class FitsOnly:
    """The fits of one refit without their per-row linear predictors (what combining the
    tests needs, and what refitting a set with the first set's choices reads), with the
    first set's messages and legacy grouping."""

    def __init__(self, fits: list[Any], messages: tuple[str, ...] = (), legacy: Any = None):
        self.fits = fits
        self.messages = messages
        self.legacy = legacy

    def get(self, form: str, adjustment: str) -> Any:
        for f in self.fits:
            if f.form == form and f.adjustment == adjustment and f.selected:
                return f
        return None


def replayed(ff: Any) -> bool:
    """The first set's fits every set repeats: all but the spline candidates AIC did not pick
    (the choice is the first set's)."""
    return not (ff.form == "spline" and not ff.selected)


def _refit_fixed(sample: Sample, a: Analysis, spec: Spec, cohort: str,
                 basis: CommonBasis | None, first: FitsOnly, shared: Outcome) -> Any:
    """One imputed set refitted with the first set's choices: every fit of the first set (but
    the spline candidates AIC did not pick) with the first set's terms, so that the spline,
    test-spline and adjusters' knots, the FP functions (powers, shift and scale) and the legacy
    grouping are the same in every set and each coefficient means the same in all of them
    (Rubin's rules, D1 and D3 average them)."""
    from ..models import failed_fit
    from ..refit.analysis import (
        FormFit,
        Refit,
        _empty_group_message,
        _Fitter,
        build_outcome,
        with_powers_counted,
    )
    from ..terms import FPTerm

    outcome = build_outcome(sample, a)
    for key in SHARED_CACHE:
        if key in shared.cache:
            outcome.cache[key] = shared.cache[key]
    x = sample.frame[a.exposure].to_numpy(float)
    r = Refit(a, cohort, sample, outcome, x, first.legacy, basis, messages=list(first.messages))
    f = _Fitter(r, sample.frame)
    empty = _empty_group_message(first.legacy, x)
    for ff in first.fits:
        if not replayed(ff):
            continue
        terms = ff.exposure_terms
        if ff.form in ("fp", "fp1", "fp2") and not ff.result.ok and not terms:
            r.fits.append(ff)  # the selection itself failed: nothing to refit
            continue
        if empty and any(t is first.legacy for t in terms):
            null = f.run((), ff.adjust_terms)
            res = failed_fit(a.family, null.names, null.n, null.events, empty)
        else:
            res = f.run(terms, ff.adjust_terms)
        if ff.form in ("fp", "fp1", "fp2") and len(terms) == 1 and isinstance(terms[0], FPTerm):
            res = with_powers_counted(res, terms[0])
        r.fits.append(FormFit(ff.form, ff.adjustment, terms, ff.adjust_terms, res, ff.detail,
                              ff.selected))
    return r


def stripped(fits: list[Any]) -> list[Any]:
    """The fits without their n-long linear predictors (memory: M sets of some thirty fits),
    nor the C-index a released predictor left behind (a stripped fit has none, as before)."""
    return [replace(f, result=replace(f.result, linear_predictor=None), c_index=None)
            for f in fits]


def _with_method(df: pd.DataFrame, method: str) -> pd.DataFrame:
    df = df.copy()
    df[METHOD_COLUMN] = method
    return df


# The models the information table's tests compare (each form against the adjustment-only
# "null"; the added test: legacy + test spline against legacy; nonlinearity: test spline
# against linear).
TESTED_FORMS = ("null", "legacy", "linear", "spline", "fp", "test_spline", "legacy+test_spline")


def pooled_logliks(samples_m: list[Sample], a: Analysis, light: list[FitsOnly],
                   outcome: Outcome) -> dict[tuple[str, str], np.ndarray] | None:
    """Each tested model's log-likelihood in every imputed set at its coefficients averaged
    over the sets (what D3 re-evaluates; Meng & Rubin 1992), by (form, coding); None when the
    outcome's fits maximise no plain likelihood (penalised, matched, quasi- or negative
    binomial, sampling weights, cluster): their tests are combined by D1 instead. The sets
    share the outcome and every fit's terms (the first set's), so each design is rebuilt from
    a set's own imputed values and evaluated at the pooled coefficients."""
    from ..models.loglik import loglik_at, supports
    from ..refit.analysis import design

    if not supports(outcome):
        return None
    pooled: dict[tuple[str, str], tuple[Any, np.ndarray]] = {}
    for ff in light[0].fits:
        if ff.form not in TESTED_FORMS or not ff.selected:
            continue
        fits = [lf.get(ff.form, ff.adjustment) for lf in light]
        if all(g is not None and g.result.ok for g in fits):
            pooled[(ff.form, ff.adjustment)] = (ff, np.mean([g.result.coef for g in fits],
                                                            axis=0))
    out = {key: np.full(len(samples_m), np.nan) for key in pooled}
    for m, s in enumerate(samples_m):
        x = s.frame[a.exposure].to_numpy(float)
        columns: dict[str, np.ndarray] = {}  # the adjustment columns, built once per set
        for key, (ff, coef) in pooled.items():
            X, _ = design(s.frame, x, ff.exposure_terms, ff.adjust_terms, columns)
            try:
                out[key][m] = loglik_at(X, outcome, ff.result.names, coef)
            except (ValueError, FloatingPointError):  # left missing: that test is not combined
                log.warning("D3: no log-likelihood of %s (%s) at the pooled coefficients",
                            key[0], key[1])
    return out


def combine_information(tables: list[pd.DataFrame], refits: list[Any], m: int,
                        pooled: dict[tuple[str, str], np.ndarray] | None = None
                        ) -> tuple[pd.DataFrame, str]:
    """The information table over the sets: each form's exposure statistic (against the
    adjustment-only model), the added-beyond-the-groups test (legacy + test spline against
    legacy) and the nonlinearity test (test spline against linear) by D3 (likelihood ratio;
    Meng & Rubin 1992) when ``pooled`` holds the models' log-likelihoods at the pooled
    coefficients (:func:`pooled_logliks`), else by D1 (Wald, on the chosen covariance), each on
    the chi-square scale (k x F); info_kept their ratio; the interaction test by D2;
    C-indices and AICs averaged over the sets (best_form from the averaged AICs)."""
    from ..refit.combine import combine_tables, d1, d2, d3

    out, msg = combine_tables(tables)
    if msg or out.empty:
        return out, msg
    forms = {"legacy": "legacy", "linear": "linear", "spline": "spline", "fp": "fp",
             "test_spline": "test_spline", "legacy_plus_spline": "legacy+test_spline"}

    def test(coding: str, alt: str, null: str, drop_first: bool = False) -> Any:
        """The combined test of model ``alt`` against the nested ``null`` (same coding) on the
        coefficients ``alt`` has beyond ``null``'s exposure terms."""
        fits = [r.get(alt, coding) for r in refits]
        nulls = [r.get(null, coding) for r in refits]
        if any(ff is None or not ff.result.ok for ff in fits + nulls):
            return None
        names = fits[0].exposure_names
        if null == "legacy":  # the added test: the test spline's coefficients
            names = tuple(n for n in names if n not in nulls[0].exposure_names)
        if drop_first:  # nonlinearity: the test spline beyond its linear term
            names = names[1:]
        if not names:
            return None
        if pooled is not None:
            if (alt, coding) not in pooled or (null, coding) not in pooled:
                return None
            lr = [2 * (ff.result.loglik - g.result.loglik) for ff, g in zip(fits, nulls,
                                                                          strict=True)]
            at_pooled = 2 * (pooled[(alt, coding)] - pooled[(null, coding)])
            return d3(lr, at_pooled, len(names))
        idx = [ff.result.index(names) for ff in fits]
        try:
            return d1([ff.result.coef[i] for ff, i in zip(fits, idx, strict=True)],
                      [ff.result.cov[np.ix_(i, i)] for ff, i in zip(fits, idx, strict=True)])
        except (np.linalg.LinAlgError, ValueError):
            return None

    fmi_added, fmi_nonlin = [], []
    for i, coding in enumerate(out["adjustment"]):
        chi2 = {}
        for key, form in forms.items():
            res = test(coding, form, "null")
            chi2[key] = res.chi2 if res is not None else np.nan
            out.loc[out.index[i], f"lr_{key}"] = chi2[key]
        full = chi2["legacy_plus_spline"]
        out.loc[out.index[i], "info_kept"] = (chi2["legacy"] / full if np.isfinite(full)
                                              and full > 0 else np.nan)
        added = test(coding, "legacy+test_spline", "legacy")
        nonlin = test(coding, "test_spline", "linear", drop_first=True)
        for prefix, res in (("added", added), ("nonlinearity", nonlin)):
            out.loc[out.index[i], f"{prefix}_lr"] = res.chi2 if res is not None else np.nan
            out.loc[out.index[i], f"{prefix}_p"] = res.p if res is not None else np.nan
        fmi_added.append(added.fmi if added is not None else np.nan)
        fmi_nonlin.append(nonlin.fmi if nonlin is not None else np.nan)
        k = out["interaction_df"].iloc[i]
        if np.isfinite(k) and k >= 1:
            inter = d2([t["interaction_lr"].iloc[i] for t in tables], int(k))
            out.loc[out.index[i], "interaction_lr"] = inter.chi2
            out.loc[out.index[i], "interaction_p"] = inter.p
        aics = {f: out[f"aic_{f}"].iloc[i] for f in ("legacy", "linear", "spline", "fp")}
        aics = {f: v for f, v in aics.items() if np.isfinite(v)}
        out.loc[out.index[i], "best_form"] = min(aics, key=lambda f: aics[f]) if aics else ""
    if pooled is not None:
        out["statistic"] = (f"D3 likelihood ratio, combined over {m} imputed sets (k x F; "
                            "Meng & Rubin 1992)")
    else:
        per_set = str(tables[0]["statistic"].iloc[0]) if "statistic" in tables[0] else ""
        out["statistic"] = (f"D1 Wald, combined over {m} imputed sets (k x F; Li, Raghunathan "
                            "& Rubin 1991)" + (f"; per set: {per_set}" if per_set else ""))
    out["fmi_added"] = fmi_added
    out["fmi_nonlinearity"] = fmi_nonlin
    return out, ""


def combine_coefficients(tables: list[pd.DataFrame]) -> tuple[pd.DataFrame, str]:
    """The common-knot spline's coefficients over the sets (long: one row per pair i, j): the
    mean coefficient and Rubin's total covariance W + (1 + 1/M) B, B the between-set
    covariance of the coefficient vectors, so that pooling across cohorts sees the imputation
    uncertainty."""
    from ..refit.combine import combine_tables

    out, msg = combine_tables(tables)
    if msg or out.empty:
        return out, msg
    m = len(tables)
    for coding in out["adjustment"].unique():
        rows = (out["adjustment"] == coding).to_numpy()
        i = out.loc[rows, "i"].to_numpy(int)
        j = out.loc[rows, "j"].to_numpy(int)
        diag = i == j
        order = np.argsort(i[diag])
        vectors = np.vstack([t.loc[rows, "coef"].to_numpy(float)[diag][order] for t in tables])
        between = np.atleast_2d(np.cov(vectors.T, ddof=1))
        idx = np.searchsorted(i[diag][order], i), np.searchsorted(i[diag][order], j)
        out.loc[rows, "cov"] = (out.loc[rows, "cov"].to_numpy(float)
                                + (1 + 1 / m) * between[idx])
    return out, ""


def combine_published(tables: list[pd.DataFrame]) -> tuple[pd.DataFrame, str]:
    """The ``as_published`` table over the sets: the groups' ratios and limits by Rubin's rules
    on the log scale (each set's log ratio and its SE from its Wald limits), so that they are
    the ``effects`` table's legacy contrasts; the route's individual and table slopes by
    Rubin's rules (mean estimate, total SE) and ``information_ratio`` from the combined SEs;
    counts and medians averaged (:func:`unbin.refit.combine.combine_tables`)."""
    from ..refit.combine import combine_estimates, combine_log_ratios, combine_tables
    from ..refit.contrasts import Z95

    out, msg = combine_tables(tables)
    if msg or out.empty:
        return out, msg
    combine_log_ratios(tables, out, "ratio", "ratio_lower", "ratio_upper", Z95)
    for est, se in (("individual_estimate", "individual_se"), ("table_estimate", "table_se")):
        combine_estimates(tables, out, est, se)
    with np.errstate(invalid="ignore", divide="ignore"):
        out["information_ratio"] = (out["individual_se"] / out["table_se"]) ** 2
    return out, ""


# replication's columns that follow from the refit estimate and its interval: recomputed from
# the combined ones (a set's own verdict is not the combined analysis')
REPLICATION_DERIVED = ("reported_inside_refit_ci", "refit_inside_reported_ci", "disagrees",
                       "verdict", "message")


def combine_replication(tables: list[pd.DataFrame]) -> tuple[pd.DataFrame, str]:
    """The ``replication`` table over the sets: the refit log ratio (or difference) and SE by
    Rubin's rules (:func:`unbin.refit.combine.combine_tables`), its limits the t interval on
    Barnard-Rubin degrees of freedom (as ``effects``' legacy contrasts), and every column that
    follows from them (difference, SE ratio, the verdict) recomputed from the combined ones."""
    from ..questions.replication import SE_RATIO_TOLERANCE
    from ..refit.combine import combine_tables, rubin

    if not tables or tables[0].empty or (tables[0]["status"] != "ok").any():
        return combine_tables(tables)
    first = tables[0]
    same = [t.assign(**{c: first[c] for c in REPLICATION_DERIVED}) for t in tables]
    out, msg = combine_tables(same)
    if msg:
        return out, msg
    with np.errstate(invalid="ignore", divide="ignore"):
        pooled = rubin(np.vstack([t["estimate"].to_numpy(float) for t in tables]),
                       np.vstack([t["se"].to_numpy(float) for t in tables]))
        lo, hi = pooled.interval()
    ratio = not np.allclose(first["refit_effect"].to_numpy(float),
                            first["estimate"].to_numpy(float))
    tr = np.exp if ratio else (lambda v: v)
    est, se = pooled.estimate, pooled.se
    rep_est, rep_se = (out[c].to_numpy(float) for c in ("reported_estimate", "reported_se"))
    rep_lo, rep_hi = (out[c].to_numpy(float, na_value=np.nan)
                      for c in ("reported_lower", "reported_upper"))
    with np.errstate(invalid="ignore", divide="ignore"):
        se_ratio = np.where(se > 0, rep_se / se, np.nan)
        out["refit_effect"], out["refit_lower"], out["refit_upper"] = tr(est), tr(lo), tr(hi)
        out["difference"] = est - rep_est
        out["difference_se_units"] = np.where(se > 0, (est - rep_est) / se, np.nan)
        out["se_ratio"] = se_ratio
        out["implied_n_ratio"] = np.where(np.isfinite(se_ratio) & (se_ratio > 0),
                                          1 / se_ratio ** 2, np.nan)
    inside = (lo <= rep_est) & (rep_est <= hi)
    refit_in = [bool(a <= tr(e) <= b) if np.isfinite(a) and np.isfinite(b) else None
                for a, b, e in zip(rep_lo, rep_hi, est, strict=True)]
    out["reported_inside_refit_ci"] = inside
    out["refit_inside_reported_ci"] = pd.array(refit_in, dtype="boolean")
    out["disagrees"] = ~inside
    out["verdict"] = np.where(~inside, "estimate differs", np.where(
        np.isfinite(se_ratio) & ~((1 / SE_RATIO_TOLERANCE <= se_ratio)
                                  & (se_ratio <= SE_RATIO_TOLERANCE)),
        "precision differs", "agrees"))
    out["message"] = np.where(inside, "", "the extract may not be the data the paper used (or "
                              "the sample, grouping or model differ)")
    return out, ""


def analyse_imputed(spec: Spec, cohort: str, analysis: str, frame: pd.DataFrame,
                    basis: CommonBasis | None = None, opts: MissingOptions | None = None,
                    resampling: bool = False, questions: tuple[str, ...] | None = None,
                    handover: dict[str, Any] | None = None
                    ) -> tuple[dict[str, pd.DataFrame], dict[str, Any]]:
    """Every fit-job table of one analysis under multiple imputation, and its status record
    (problems recorded, never raised, as in :func:`unbin.pipeline.jobs.analyse`); with
    ``resampling`` also the resampling tables (:func:`imputed_resampling`); ``questions``:
    only these fit-job tables (default all; a resampling job without the fit job's handover
    needs only the ones whose numbers its tables repeat, :data:`RESAMPLING_READS`). A
    ``handover`` dict is filled with what the resampling job needs from this analysis
    (:func:`handover_state`) once its tables are combined; it stays empty when the analysis
    stopped."""
    from ..refit.analysis import refit_analysis

    a = spec.analysis(analysis)
    opts = opts or missing_options(spec, analysis)
    method = f"imputed (M = {opts.imputations})"
    status: dict[str, Any] = {"status": "ok", "message": "", "n_input": len(frame), "n_used": 0,
                              "family": a.family, "exposure": a.exposure}
    tables: dict[str, pd.DataFrame] = {}
    samples = pd.DataFrame({"step": pd.Series(dtype=str), "rows": pd.Series(dtype="int64")})
    try:
        problems = _type_problems(a, frame, spec)
        if problems:
            raise DataError(" ".join(problems))
        sample, counts = incomplete_sample(frame, a, spec)
        samples = pd.DataFrame(
            [("rows in extract", sample.n_input)]
            + [(f"dropped: {reason}", n) for reason, n in sample.dropped]
            + [(f"imputed: missing {c}", n) for c, n in counts.items()]
            + [("analysis sample", sample.n), ("imputed sets", opts.imputations)],
            columns=["step", "rows"])
        status["n_used"] = sample.n
        if sample.n < MIN_SAMPLE_ROWS:
            raise DataError(f"only {sample.n} rows are left after filters and follow-up checks; "
                            "check the filters (see samples.parquet).")
        aux = outcome_auxiliary(sample, a)
        rng = spec.rng(analysis, f"imputation\x00{cohort}")
        try:
            sets = impute_chained(sample.frame, _targets(sample, a, spec), aux,
                                  opts.imputations, opts.iterations, rng)
        except (ValueError, np.linalg.LinAlgError) as exc:
            raise DataError(f"the imputation models could not be fitted ({exc}); check the "
                            "missing values of " + ", ".join(imputed_columns(a))) from exc
        samples_m = [Sample(s, sample.n_input, sample.dropped) for s in sets]
        full = refit_analysis(samples_m[0], a, spec, cohort, basis)  # the choices, once
        notes = [f"{method} of {', '.join(c for c, n in counts.items() if n)}; "
                 + choices_note(full)]
        first = FitsOnly(stripped(full.fits), tuple(full.messages), full.legacy)
        outcome, common = full.outcome, full.basis
        # the first set's refit is handed over (and dropped after its tables: memory)
        set0 = [replace(full, fits=[ff for ff in full.fits if replayed(ff)])]
        del full
        per_set, errors, light, messages, failed = _tables_per_set(
            samples_m, a, spec, cohort, set0, first, outcome, common, questions)
        pooled = pooled_logliks(samples_m, a, light, outcome)
        notes += messages + failed
        lost = _combine_sets(per_set, errors, light, opts, method, tables, notes,
                             f"{cohort}/{analysis}", pooled)
        partial = bool(failed) or lost
        notes.append("information_bootstrap and decision_resampling bootstrap within the "
                     "imputed sets (replicates pooled); confounding and cutpoints use complete "
                     "cases")
        if resampling:
            tables.update(imputed_resampling(spec, cohort, a, frame, samples_m, first, common,
                                             tables.get("information"),
                                             tables.get("thresholds")))
        if handover is not None:
            handover.update(handover_state(sample, sets, first, common))
        if partial:
            status["status"] = "partial"
        status["message"] = " | ".join(dict.fromkeys(notes))
    except Exception as exc:  # recorded, never raised: the other analyses must complete
        from ..pipeline.jobs import failure_status

        status.update(failure_status(exc, f"{cohort}/{analysis}"))
        tables = {}
        if handover is not None:
            handover.clear()
    tables["samples"] = samples
    tables["status"] = pd.DataFrame([status])
    return tables, status


def choices_note(full: Any) -> str:
    """What the first imputed set chose and every set keeps (the status message says it)."""
    knots = []
    for coding in ("legacy", "continuous", "none"):
        f = full.get("spline", coding)
        if f is not None and f.exposure_terms:
            knots.append(f"{coding}: " + ", ".join(f"{k:.4g}"
                                                   for k in f.exposure_terms[0].knots))
    return ("choices made on the first imputed set and kept in every set: spline knots "
            + ("; ".join(knots) if knots else "as specified")
            + "; FP " + "; ".join(f"{f.adjustment}: {f.detail}" for f in full.fits
                                  if f.form == "fp")
            + "; the test spline's and the adjusters' knots, the legacy grouping, and the "
            "curve grid and reference of the first set")


def _tables_per_set(samples_m: list[Sample], a: Analysis, spec: Spec, cohort: str,
                    set0: list[Any], first: FitsOnly, outcome: Outcome,
                    common: CommonBasis | None, questions: tuple[str, ...] | None = None
                    ) -> tuple[dict[str, list[pd.DataFrame]], dict[str, Exception],
                               list[FitsOnly], list[str], list[str]]:
    """Every question's table in every imputed set, one set at a time (its refit, its tables,
    then only its coefficients are kept): the tables per question, the questions that failed,
    the sets' coefficients, and the first set's messages and failed fits. The first set's
    refit is ``set0``'s one element (the choices' refit without the spline candidates AIC did
    not pick; taken out of the list, so that its memory goes with its tables); the other sets
    repeat its fits (:func:`_refit_fixed`)."""
    from ..pipeline.jobs import _builder, failed_fit_messages
    from ..questions import QUESTION_TABLES

    builders = {n: t for n, t in QUESTION_TABLES.items() if questions is None or n in questions}
    per_set: dict[str, list[pd.DataFrame]] = {n: [] for n in builders}
    errors: dict[str, Exception] = {}
    light: list[FitsOnly] = []
    messages: list[str] = []
    failed: list[str] = []
    for k, s in enumerate(samples_m):
        if k == 0:
            r = set0.pop()
            messages, failed = list(r.messages), failed_fit_messages(r.fits)
        else:
            r = _refit_fixed(s, a, spec, cohort, common, first, outcome)
        for name, target in builders.items():
            if name in errors:
                continue
            try:
                per_set[name].append(_builder(target)(r, spec))
            except Exception as exc:
                if not isinstance(exc, UnbinError):
                    log.error("internal error in %s/%s, question %s:\n%s", cohort, a.name,
                              name, traceback.format_exc())
                errors[name] = exc
        light.append(FitsOnly(stripped(r.fits)))
        del r
    return per_set, errors, light, messages, failed


def _combine_sets(per_set: dict[str, list[pd.DataFrame]], errors: dict[str, Exception],
                  light: list[FitsOnly], opts: MissingOptions, method: str,
                  tables: dict[str, pd.DataFrame], notes: list[str], where: str,
                  pooled: dict[tuple[str, str], np.ndarray] | None = None) -> bool:
    """Each question's tables of the imputed sets combined into ``tables`` (Rubin's rules; the
    information tests by D1; the coefficients' total covariance; the first set's density);
    notes appended. True when a question was lost."""
    from ..refit.combine import combine_tables

    lost = False
    for name in per_set:
        try:
            if name in errors:
                raise errors[name]
            if name == "information":
                combined, msg = combine_information(per_set[name], light, opts.imputations,
                                                    pooled)
            elif name == "coefficients":
                combined, msg = combine_coefficients(per_set[name])
            elif name == "as_published":
                combined, msg = combine_published(per_set[name])
            elif name == "replication":
                combined, msg = combine_replication(per_set[name])
            elif name == "density":  # descriptive, suppressed per set: the first set's
                combined, msg = per_set[name][0], ""
            else:
                combined, msg = combine_tables(per_set[name])
            if msg:
                notes.append(f"{name}: {msg}")
            tables[name] = _with_method(combined, method)
        except Exception as exc:
            if not isinstance(exc, UnbinError) and name not in errors:
                log.error("internal error in %s, question %s:\n%s", where, name,
                          traceback.format_exc())
            tables[name] = pd.DataFrame()
            lost = True
            notes.append(f"question {name!r} failed ({type(exc).__name__}: {exc}); its "
                         "table is empty, the other tables are complete")
    return lost


def replicates_per_set(total: int, m: int) -> list[int]:
    """``total`` bootstrap replicates split over ``m`` imputed sets (the first ``total % m`` sets
    take one more), so the pooled bootstrap costs what one bootstrap of ``total`` does."""
    return [total // m + (1 if k < total % m else 0) for k in range(m)]


def set_refits(samples_m: list[Sample], a: Analysis, cohort: str, legacy: Any,
               basis: CommonBasis | None) -> list[Any]:
    """Each imputed set as the resampling questions read it: its sample, outcome and exposure,
    with the first set's legacy grouping, and no fits."""
    from ..refit.analysis import Refit, build_outcome

    return [Refit(a, cohort, s, build_outcome(s, a), s.frame[a.exposure].to_numpy(float),
                  legacy, basis) for s in samples_m]


def pooled_information_bootstrap(refits: list[Any], spec: Spec, first: FitsOnly,
                                 information: pd.DataFrame) -> pd.DataFrame:
    """``information_bootstrap`` of an imputed analysis: the bootstrap within the imputed sets,
    replicates pooled ("MI Boot pooled", Schomaker & Heumann 2018). The
    ``resampling.bootstrap`` replicates are split over the M sets
    (:func:`replicates_per_set`); in set m they resample that set's rows
    (``unbin.questions.kept.replicate_shares``, seeded per set from the spec) and refit the
    null, legacy and legacy + test spline models with the first set's test-spline and
    adjustment knots (the designs the ``information`` table combines); the interval is the
    percentile interval of the shares of all replicates together. The share itself is the
    ``information`` table's, combined over the sets (D3, or D1 where the fits maximise no
    plain likelihood)."""
    from ..questions import kept

    a = refits[0].analysis
    m = len(refits)
    B = spec.resampling.bootstrap
    share = (dict(zip(information["adjustment"], information["info_kept"].astype(float),
                      strict=True)) if "info_kept" in information else {})
    test = first.get("test_spline", "legacy")
    test_term = test.exposure_terms[0] if test is not None and test.exposure_terms else None
    adjust = {c: ff.adjust_terms for c in ("legacy", "continuous")
              if (ff := first.get("null", c)) is not None}
    if B <= 0 or kept.bootstrap_reason(a):  # no interval: the rows say why
        template = kept.information_bootstrap_table(refits[0], spec)
        template["info_kept"] = [share.get(c, np.nan) for c in template["adjustment"]]
        return template
    pooled: dict[str, list[np.ndarray]] = {}
    rows: list[dict[str, object]] = []
    for k, (r, b) in enumerate(zip(refits, replicates_per_set(B, m), strict=True)):
        set_rows, models, ok_rows = kept._point_rows(r, spec, test_term, adjust)
        if k == 0:
            rows = set_rows
        if not ok_rows or b <= 0:
            continue
        shares = kept.replicate_shares(r.family, models, r.outcome,
                                       spec.rng(a.name, f"information-bootstrap\x00set {k}"),
                                       b, a.robust)
        for j, i in enumerate(ok_rows):
            pooled.setdefault(str(set_rows[i]["adjustment"]), []).append(shares[:, j])
    method = (f"bootstrap within each of the {m} imputed sets ({B} replicates split over "
              "them), replicates pooled; the share is the information table's, combined over "
              "the sets")
    for row in rows:
        coding = str(row["adjustment"])
        point = float(share.get(coding, np.nan))
        row["info_kept"] = point
        if not np.isfinite(point):
            row.update(status="failed", message=str(row["message"]) or (
                "the information table has no combined share for this coding"))
            continue
        s = np.concatenate(pooled.get(coding, [np.zeros(0)]))
        s = s[np.isfinite(s)]
        row.update(status="ok", replicates_used=len(s), message=method)
        if len(s) < kept.MIN_REPLICATES:
            row.update(status="failed", message=(
                f"only {len(s)} of {B} bootstrap replicates over the imputed sets could be "
                f"refitted (at least {kept.MIN_REPLICATES} are needed for an interval)"))
            continue
        lo, hi = percentile_limits(s, kept.LEVEL)
        row.update(info_kept_lower=float(lo), info_kept_upper=float(hi))
        if len(s) < B:
            row["message"] = (f"{method}; {B - len(s)} of {B} replicates left out (a model did "
                              "not converge or a design column did not vary among the drawn "
                              "rows)")
    return pd.DataFrame(rows, columns=list(kept.COLUMNS))


def _first_choices(first: FitsOnly) -> dict[str, Any]:
    """The first set's adjustment terms and chosen spline by coding (what decision_resampling
    refits in every set, as the decision tables' models are the first set's)."""
    out: dict[str, Any] = {"adjust": {}, "spline": {}}
    for coding in ("legacy", "continuous"):
        null = first.get("null", coding)
        if null is not None:
            out["adjust"][coding] = null.adjust_terms
        spline = first.get("spline", coding)
        if spline is not None and spline.exposure_terms:
            out["spline"][coding] = spline.exposure_terms
    return out


def pooled_decision_resampling(refits: list[Any], spec: Spec, first: FitsOnly,
                               thresholds: pd.DataFrame | None = None) -> pd.DataFrame:
    """``decision_resampling`` of an imputed analysis: the bootstrap within the imputed sets,
    replicates pooled ("MI Boot pooled", Schomaker & Heumann 2018). The ``resampling.bootstrap``
    replicates are split over the M sets (:func:`replicates_per_set`); each set refits the
    decision models with the first set's choices (spline knots, adjustment terms, legacy
    grouping) and judges each replicate's models in its bootstrap sample and in the set's full
    sample. The percentile intervals and the optimism are over all replicates together;
    ``estimate`` (= ``apparent``) is the per-set values averaged over the sets, as the
    ``net_benefit``, ``calibration``, ``thresholds`` and ``information`` tables combine them
    (the implied thresholds: the combined ``thresholds`` table's at the median risk profile,
    whose numbers of crossings also pick the replicates matched)."""
    from ..questions import decision_resampling as dr

    m = len(refits)
    B = spec.resampling.bootstrap
    fixed = _first_choices(first)
    runs: list[dict[str, Any]] = []
    for k, (r, b) in enumerate(zip(refits, replicates_per_set(B, m), strict=True)):
        got: dict[str, Any] = {}
        table = dr.decision_resampling_table(r, spec, replicates=max(b, 1),
                                             purpose=f"{dr.PURPOSE}\x00set {k}", fixed=fixed,
                                             collect=got)
        if not got:  # skipped or nothing fitted: the first set's table says why
            return table if k == 0 else dr.decision_resampling_table(refits[0], spec)
        if b <= 0:  # fewer replicates than sets: this set gives its apparent values only
            got["boot"], got["test"] = [], []
        runs.append(got)
    apparent = _combined_apparent([g["apparent"] for g in runs], thresholds)
    boot = [bt for g in runs for bt in g["boot"]]
    test = [tt for g in runs for tt in g["test"]]
    x = np.concatenate([r.x for r in refits])
    q01, q99 = (float(v) for v in np.quantile(x, [0.01, 0.99]))
    method = (f"bootstrap within each of the {m} imputed sets ({B} replicates split over "
              "them), replicates pooled; estimates combined over the sets")
    note = " | ".join(dict.fromkeys([n for g in runs for n in g["notes"]] + [method]))
    rows: list[dict[str, Any]] = []
    for key, est in apparent.items():
        if key[0] == "crossings":
            continue
        row: dict[str, Any] = {**runs[0]["base"], "quantity": key[0], "estimate": est,
                               "status": "ok", "reason": "", "note": note}
        row.update(dr._row_labels(key, est, q01, q99))
        # under competing events the Fine–Gray slope is not 1 by construction: it has an interval
        dr._row_interval(row, key, est, apparent, boot, test, B,
                         slope_is_one=not (refits[0].family == "survival"
                                               and refits[0].outcome.cause is not None))
        row["computed_by"] = f"{row['computed_by']} (imputed sets pooled)"
        rows.append(row)
    if not rows:
        rows.append({**runs[0]["base"], "status": "failed",
                     "reason": note or "no model could be fitted"})
    return dr._finish(rows)


def _combined_apparent(sets: list[dict[tuple[Any, ...], float]],
                       thresholds: pd.DataFrame | None = None
                       ) -> dict[tuple[Any, ...], float]:
    """Each quantity's value averaged over the sets that have it; the implied thresholds (and
    their numbers of crossings) those of the combined ``thresholds`` table at the median risk
    profile, else averaged when every set has the same numbers of crossings, else the first
    set's."""
    def crossing_keys(d: dict[tuple[Any, ...], float]) -> dict[tuple[Any, ...], float]:
        return {k: v for k, v in d.items() if k[0] == "crossings"}

    same = all(crossing_keys(d) == crossing_keys(sets[0]) for d in sets[1:])
    out: dict[tuple[Any, ...], float] = {}
    table = _median_profile_crossings(thresholds)
    for key in sets[0]:
        if key[0] in ("crossings", "implied threshold") and table is not None:
            continue
        if key[0] in ("crossings", "implied threshold") and not same:
            out[key] = sets[0][key]
            continue
        values = [d[key] for d in sets if key in d and np.isfinite(d[key])]
        out[key] = float(np.mean(values)) if values else float("nan")
    if table is not None:
        for key in crossing_keys(sets[0]):
            (model, coding), t = key[1], key[2]
            rows = table[(table["model"] == model) & (table["adjustment"] == coding)
                         & np.isclose(table["threshold"].astype(float), t, atol=1e-12)]
            rows = rows.sort_values("crossing")
            out[key] = float(len(rows))
            for j, v in enumerate(rows["exposure_value"].astype(float), start=1):
                out[("implied threshold", key[1], t, j)] = float(v)
    return out


def _median_profile_crossings(thresholds: pd.DataFrame | None) -> pd.DataFrame | None:
    """The combined ``thresholds`` table's crossings at the median risk profile of the whole
    sample (what decision_resampling resamples), or None without that table."""
    need = {"model", "adjustment", "threshold", "profile_quantile", "crossing", "level",
            "exposure_value"}
    if thresholds is None or thresholds.empty or not need <= set(thresholds.columns):
        return None
    q = thresholds["profile_quantile"].astype(float)
    return thresholds[(q == 0.5) & (thresholds["crossing"].astype(float) > 0)
                      & (thresholds["level"] == "all")]


# the fit-job tables whose combined numbers the pooled resampling tables repeat (the
# workflow's resampling job reads them from the fit job)
RESAMPLING_READS = HANDED_TABLES


def resampling_tables(spec: Spec, cohort: str, analysis: str, frame: pd.DataFrame,
                      basis: CommonBasis | None = None) -> dict[str, pd.DataFrame]:
    """The resampling tables of an imputed analysis for the workflow's resampling job: the
    imputation and the sets' fits again (the same seeded draws as the fit job), only the
    tables the resampling tables read, then :func:`imputed_resampling`."""
    from ..questions import RESAMPLING_TABLES

    tables, _ = analyse_imputed(spec, cohort, analysis, frame, basis, resampling=True,
                                questions=RESAMPLING_READS)
    return {n: tables[n] for n in RESAMPLING_TABLES if n in tables}


# What an imputed analysis' fit job hands its resampling job (``jobs.HANDOVER``): this layout.
HANDOVER_FORMAT = 1


def handover_state(sample: Sample, sets: list[pd.DataFrame], first: FitsOnly,
                   basis: CommonBasis | None) -> dict[str, Any]:
    """What the resampling job of an imputed analysis needs from its fit job, so that it
    neither imputes nor refits again: the values imputation put in each imputed set, per
    column the cells missing in the analysis sample (in row order; the column's type after
    filling, which :func:`restored_sets` checks), the first set's fits with the terms every
    set keeps (without the per-row linear predictors, as :class:`FitsOnly` holds them, and
    without the fitters' extras), its messages and legacy grouping, and the common basis."""
    filled: dict[str, tuple[list[np.ndarray], list[str]]] = {}
    for c in sample.frame.columns:
        miss = sample.frame[c].isna().to_numpy()
        if miss.any() and not sets[0][c].isna().to_numpy()[miss].any():
            filled[c] = ([s[c].to_numpy()[miss] for s in sets], [str(s[c].dtype) for s in sets])
    light = FitsOnly([replace(f, result=replace(f.result, extra={})) for f in first.fits],
                     first.messages, first.legacy)
    return {"rows": sample.n, "imputations": len(sets), "filled": filled, "first": light,
            "basis": basis}


def restored_sets(sample: Sample, state: dict[str, Any]) -> list[Sample]:
    """The imputed sets of :func:`handover_state` rebuilt on the analysis sample (the same
    frames imputation gave: each column's missing cells set to the values it drew). A
    ValueError when they do not fit the sample (another extract or spec)."""
    if state["rows"] != sample.n:
        raise ValueError(f"the fit job's imputed sets have {state['rows']} rows, the sample "
                         f"{sample.n}")
    out = []
    for m in range(state["imputations"]):
        cur = sample.frame.copy()
        for c, (values, types) in state["filled"].items():
            miss = cur[c].isna().to_numpy() if c in cur else np.zeros(0, dtype=bool)
            if c not in cur or int(miss.sum()) != len(values[m]):
                raise ValueError(f"column {c!r}: the fit job imputed other cells")
            cur.loc[miss, c] = values[m]
            if str(cur[c].dtype) != types[m]:
                raise ValueError(f"column {c!r} restored as {cur[c].dtype}, imputed as "
                                 f"{types[m]}")
        out.append(Sample(cur, sample.n_input, sample.dropped))
    return out


def save_handover(path: str | Path, state: dict[str, Any]) -> None:
    """``state`` (empty: nothing to hand over; complete cases, or the analysis stopped) to
    ``path``, written whole or not at all. A pickle: the file passes between two jobs of one
    run of one unbin version (the rerun digests hold the version) and is read by no one else."""
    from .. import __version__

    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "wb") as fh:
        pickle.dump({"format": HANDOVER_FORMAT, "unbin": __version__, "state": state}, fh,
                    protocol=pickle.HIGHEST_PROTOCOL)
    tmp.replace(path)


def load_handover(path: str | Path) -> dict[str, Any] | None:
    """The state :func:`save_handover` wrote, or None when another layout or unbin version
    wrote the file."""
    from .. import __version__

    with open(path, "rb") as fh:
        saved = pickle.load(fh)  # noqa: S301 - this run's own fit job wrote it
    if saved.get("format") != HANDOVER_FORMAT or saved.get("unbin") != __version__:
        return None
    state: dict[str, Any] = saved["state"]
    return state


def resampling_from_fit(spec: Spec, cohort: str, analysis: str, frame: pd.DataFrame,
                        handover: str | Path) -> dict[str, pd.DataFrame]:
    """The resampling tables of an imputed analysis from what its fit job handed over (the
    workflow's resampling job): the imputed sets rebuilt from the values the fit job drew,
    the first set's choices, and the combined ``information`` and ``thresholds`` tables the
    fit job wrote beside ``handover``; then :func:`imputed_resampling`, as
    :func:`resampling_tables` does after imputing and refitting every set again. No tables
    when the fit job stopped before combining the sets (its status says why); the whole
    computation again (:func:`resampling_tables`) when the handover does not fit."""
    from ..questions import KEY_COLUMNS
    from ..results.tables import read_table

    state = load_handover(handover)
    if state is not None and not state:
        return {}
    a = spec.analysis(analysis)
    try:
        if state is None:
            raise ValueError("written by another unbin version")
        sample, _ = incomplete_sample(frame, a, spec)
        samples_m = restored_sets(sample, state)
    except (ValueError, UnbinError) as exc:
        log.warning("%s/%s: the fit job's imputed sets cannot be used (%s); imputing and "
                    "refitting them again", cohort, analysis, exc)
        return resampling_tables(spec, cohort, analysis, frame)
    folder = Path(handover).parent
    read = {n: read_table(folder / f"{n}.parquet").drop(columns=list(KEY_COLUMNS),
                                                         errors="ignore")
            for n in RESAMPLING_READS}
    return imputed_resampling(spec, cohort, a, frame, samples_m, state["first"], state["basis"],
                              read["information"], read["thresholds"])


COMPLETE_CASES = ("complete cases: the rows with a missing value are left out of this table "
                  "(it is not imputed)")


def _complete_case_resampling(spec: Spec, cohort: str, analysis: str, frame: pd.DataFrame,
                              only: tuple[str, ...] = ("confounding", "cutpoints")
                              ) -> dict[str, pd.DataFrame]:
    """The resampling questions ``only`` on the complete-case sample (they are not imputed);
    every row's message says so."""
    from ..pipeline.jobs import _builder
    from ..questions import RESAMPLING_TABLES
    from ..refit.analysis import bare_refit

    a = spec.analysis(analysis)
    out: dict[str, pd.DataFrame] = {}
    try:
        sample = analysis_sample(frame, a, spec)
        if sample.n < MIN_SAMPLE_ROWS:
            return out
        r = bare_refit(sample, a, spec, cohort)
        for name in only:
            df = _builder(RESAMPLING_TABLES[name])(r, spec)
            if "message" in df and len(df):
                df["message"] = [COMPLETE_CASES + (f"; {m}" if isinstance(m, str) and m else "")
                                 for m in df["message"]]
            out[name] = df
    except UnbinError:
        pass
    return out


def imputed_resampling(spec: Spec, cohort: str, a: Analysis, frame: pd.DataFrame,
                       samples_m: list[Sample], first: FitsOnly, basis: CommonBasis | None,
                       information: pd.DataFrame | None,
                       thresholds: pd.DataFrame | None = None) -> dict[str, pd.DataFrame]:
    """The resampling tables of an imputed analysis: information_bootstrap and
    decision_resampling bootstrap within the imputed sets and pool the replicates;
    confounding and cutpoints are on complete cases (their rows say so)."""
    try:
        out = _complete_case_resampling(spec, cohort, a.name, frame)
    except Exception:  # logged; the imputed tables and the pooled ones still complete
        log.error("internal error in %s/%s, complete-case resampling:\n%s", cohort, a.name,
                  traceback.format_exc())
        out = {}
    refits = set_refits(samples_m, a, cohort, first.legacy, basis)
    builders = {
        "information_bootstrap": lambda: pooled_information_bootstrap(
            refits, spec, first, information if information is not None else pd.DataFrame()),
        "decision_resampling": lambda: pooled_decision_resampling(refits, spec, first,
                                                                  thresholds)}
    method = f"imputed (M = {len(samples_m)})"
    for name, build in builders.items():
        try:
            out[name] = _with_method(build(), method)
        except Exception as exc:
            if not isinstance(exc, UnbinError):
                log.error("internal error in %s/%s, question %s:\n%s", cohort, a.name, name,
                          traceback.format_exc())
            out[name] = pd.DataFrame()
    return out
