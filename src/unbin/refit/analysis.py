"""Every fit of one analysis on one cohort: legacy groups, linear, spline (k by AIC), fractional
polynomial (closed-test function selection), the test spline alone and beside the legacy groups,
adjustment only and crude — each with legacy-grouped and with continuous (spline) adjustment, all
on the same sample.

The *test spline* has ``continuous.test_knots`` knots at the default quantiles of the exposure:
its knots are fixed before the outcome is seen, so the likelihood-ratio tests built on it
(nonlinearity, added beyond the groups) keep their nominal level. The spline whose knot count AIC
picks is the one drawn; tests on it would be anti-conservative, because the same data chose it.

A fractional polynomial's powers are estimated too: the fp1/fp2/fp fits count them in
``n_params`` (FP1: 2 parameters for the exposure, FP2: 4; Royston & Sauerbrei 2008), so that
their AIC is comparable with the other forms'."""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from functools import cached_property
from typing import Any

import numpy as np
import pandas as pd

from ..consortium.basis import CommonBasis, combine, sample_summary
from ..data import Sample
from ..models import Outcome, fit
from ..models.base import FitResult, failed_fit
from ..models.discrimination import c_index, forget_c_indices
from ..spec import Analysis, Spec
from ..terms import (
    CategoricalTerm,
    FPTerm,
    GroupedTerm,
    LinearTerm,
    SplineTerm,
    Term,
    default_knots,
)
from ..terms.legacy import legacy_term
from ..terms.roles import variable_role
from .fp_selection import select_fp
from .modifier import modifier_term

ADJUSTMENTS = ("legacy", "continuous")
# The forms whose per-row linear predictor the absolute-risk questions read (under continuous
# adjustment, beside the legacy groups under legacy adjustment: unbin.questions.decisions);
# every other fit keeps its C-index instead of its n predictor values (see
# ``_release_predictors``).
RISK_FORMS = ("linear", "spline", "fp")
EPV_MIN = 10  # events per estimated coefficient (Peduzzi et al. 1996; common practice)


@dataclass(frozen=True)
class FormFit:
    """One fitted model: the exposure in one form, with one adjustment coding."""

    form: str  # null | legacy | linear | spline | fp | fp1 | fp2 | test_spline | legacy+test_spline
    adjustment: str  # legacy | continuous | none
    exposure_terms: tuple[Term, ...]
    adjust_terms: tuple[Term, ...]
    result: FitResult
    detail: str = ""
    selected: bool = True
    c_index: float | None = None  # kept when the linear predictor was released

    def concordance(self, outcome: Outcome) -> float:
        """The fit's C-index (AUC or Harrell's C; NaN where not defined or without a fit),
        from its linear predictor, or the value kept when that was released."""
        if not self.result.ok:
            return float("nan")
        lp = self.result.linear_predictor
        if lp is not None:
            return c_index(outcome, lp)
        return float("nan") if self.c_index is None else self.c_index

    @property
    def exposure_names(self) -> tuple[str, ...]:
        return tuple(n for t in self.exposure_terms for n in t.names())

    def exposure_coef(self) -> tuple[np.ndarray, np.ndarray]:
        """Coefficients and covariance of the exposure columns only."""
        names = self.exposure_names
        if not names:
            return np.zeros(0), np.zeros((0, 0))
        idx = self.result.index(names)
        return self.result.coef[idx], self.result.cov[np.ix_(idx, idx)]

    def exposure_basis(self, x: np.ndarray) -> np.ndarray:
        if not self.exposure_terms:
            return np.zeros((len(np.atleast_1d(x)), 0))
        return np.column_stack([t.basis(np.atleast_1d(x)) for t in self.exposure_terms])


@dataclass
class Refit:
    """All fits of one analysis on one cohort, plus what the questions need to read them."""

    analysis: Analysis
    cohort: str
    sample: Sample
    outcome: Outcome
    x: np.ndarray
    legacy: GroupedTerm
    basis: CommonBasis | None = None
    fits: list[FormFit] = field(default_factory=list)
    messages: list[str] = field(default_factory=list)

    def get(self, form: str, adjustment: str) -> FormFit | None:
        for f in self.fits:
            if f.form == form and f.adjustment == adjustment and f.selected:
                return f
        return None

    @property
    def family(self) -> str:
        return self.analysis.family

    @cached_property
    def legacy_codes(self) -> np.ndarray:
        """Each row's legacy group (``legacy.codes(x)``), computed once: the questions read the
        groups' rows many times."""
        return self.legacy.codes(self.x)

    @property
    def reference_value(self) -> float:
        """The median exposure of the legacy reference group: the curves' reference point."""
        return float(np.median(self.x[self.legacy_codes == self.legacy.reference]))

    @property
    def curve_reference(self) -> float:
        """The curves' reference value: the common basis' (shared across cohorts) when there is
        one, else the median of the legacy reference group."""
        return self.basis.reference if self.basis is not None else self.reference_value

    def group_values(self, g: int) -> np.ndarray:
        return self.x[self.legacy_codes == g]


def build_outcome(sample: Sample, a: Analysis) -> Outcome:
    df = sample.frame
    o = a.outcome
    # weights and clusters: every fit of the analysis carries them (unbin.models.robust)
    w = df[a.weights.column].to_numpy(float) if a.weights is not None else None
    kind = a.weights.kind if a.weights is not None else "frequency"
    cl = np.asarray(pd.factorize(df[a.cluster], sort=True)[0]) if a.cluster else None
    if o.type == "binary":
        return Outcome("binary", df[o.event].to_numpy(float), weights=w, weight_kind=kind,
                       cluster=cl, **binary_design(df, a))
    if o.type == "continuous":
        return Outcome("continuous", df[o.value].to_numpy(float), weights=w, weight_kind=kind, cluster=cl)
    if o.type == "count":
        return Outcome("count", df[o.count].to_numpy(float),
                       offset=np.log(df[o.persontime].to_numpy(float)),
                       dispersion=o.count_model, weights=w, weight_kind=kind, cluster=cl)
    strata = None
    if a.strata:
        strata = df.groupby(list(a.strata), sort=True).ngroup().to_numpy()
    event = df[o.event].to_numpy(float)
    cause = event if o.has_competing else None  # competing events: censored in y
    return Outcome("survival", (event == o.event_of_interest).astype(float) if o.has_competing
                   else event, time=df[o.time].to_numpy(float),
                   entry=df[o.entry].to_numpy(float) if o.entry else None, strata=strata,
                   weights=w, weight_kind=kind, cluster=cl, cause=cause,
                   event_of_interest=o.event_of_interest,
                   penalty="firth" if a.design.firth else "none")


def binary_design(df: pd.DataFrame, a: Analysis) -> dict[str, Any]:
    """The Outcome fields of the analysis' design block: the matched sets as strata
    (conditional logistic regression) and Firth's penalty."""
    out: dict[str, Any] = {}
    if a.design.matched_set:
        out["strata"] = np.asarray(pd.factorize(df[a.design.matched_set], sort=True)[0])
    if a.design.firth:
        out["penalty"] = "firth"
    return out


def adjustment_terms(df: pd.DataFrame, a: Analysis, spec: Spec, coding: str) -> tuple[Term, ...]:
    """Adjustment variables as the legacy analysis had them (grouped where a grouping is declared,
    otherwise as they are) or continuously (numeric variables as restricted cubic splines). The
    effect modifier ``by`` enters last, as the factor of its levels in both codings
    (:func:`unbin.refit.modifier.modifier_term`); a grouped numeric modifier also enters as its spline
    in the continuous coding, and never twice when it is an adjuster too."""
    terms: list[Term] = []
    by = modifier_term(df, a, spec)
    for v in dict.fromkeys([*a.adjust, *([a.by] if a.by else [])]):
        role = variable_role(v, spec, df[v])
        if v == a.by and by is not None:
            # The modifier's factor enters below. Continuously adjusted, a grouped numeric
            # modifier also enters as its own spline, as any numeric adjuster does: the levels
            # then carry the step at the cuts, the spline the trend within them.
            if coding == "legacy" or not isinstance(by, GroupedTerm):
                continue
        if role == "grouped" and coding == "legacy":
            terms.append(legacy_term(df[v].to_numpy(float), v, spec))
            continue
        if role == "factor":
            terms.append(CategoricalTerm.from_data(v, df[v]))
            continue
        x = df[v].to_numpy(float)
        if coding == "legacy":
            terms.append(LinearTerm(v))
        else:
            try:
                terms.append(SplineTerm(v, default_knots(x, a.continuous.adjust_knots)))
            except ValueError:
                terms.append(LinearTerm(v))
    if by is not None:  # the effect modifier's levels, as a factor in both codings
        terms.append(by)
    return tuple(terms)


def design(df: pd.DataFrame, x: np.ndarray, exposure: tuple[Term, ...],
           adjust: tuple[Term, ...], cache: dict[str, np.ndarray] | None = None,
           ) -> tuple[np.ndarray, tuple[str, ...]]:
    """The design matrix (exposure columns, then adjustment columns) and its column names.
    ``cache`` keeps the adjustment terms' columns between calls on the same rows (an analysis
    fits dozens of exposure forms against the same few adjustment sets)."""
    def adjust_basis(t: Term) -> np.ndarray:
        key = repr(t)
        if cache is not None and key in cache:
            return cache[key]
        col = df[t.variable].to_numpy()
        b = t.basis(col if isinstance(t, CategoricalTerm) else col.astype(float))
        b = np.asarray(b, dtype=float).reshape(len(x), -1)
        if cache is not None:
            cache[key] = b
        return b

    cols = [np.asarray(t.basis(x), dtype=float).reshape(len(x), -1) for t in exposure]
    cols += [adjust_basis(t) for t in adjust]
    names = tuple(n for t in (*exposure, *adjust) for n in t.names())
    # np.hstack copies each part row block by row block; writing the parts one column range
    # at a time into a preallocated array touched every row of it once per part (at a million
    # rows 42 against 30 ms for a design of 11 columns in 5 parts)
    X = np.hstack(cols) if cols else np.empty((len(x), 0))
    return X, names


class _Fitter:
    """Fits designs for one analysis and caches them (identical codings are fitted once)."""

    def __init__(self, refit: Refit, df: pd.DataFrame):
        self.r = refit
        self.df = df
        self.cache: dict[tuple[str, ...], FitResult] = {}
        self.columns: dict[str, np.ndarray] = {}  # adjustment columns, built once

    @staticmethod
    def _key(exposure: tuple[Term, ...], adjust: tuple[Term, ...]) -> tuple[str, ...]:
        return tuple(repr(t) for t in (*exposure, *adjust))

    def drop_predictor(self, exposure: tuple[Term, ...], adjust: tuple[Term, ...]) -> None:
        """Forget the per-row linear predictor of a fit no table uses (a losing FP candidate):
        n values each, which over an analysis' dozens of candidates is most of a job's memory
        on a registry-sized sample."""
        key = self._key(exposure, adjust)
        if key in self.cache:
            self.cache[key] = replace(self.cache[key], linear_predictor=None)

    def run(self, exposure: tuple[Term, ...], adjust: tuple[Term, ...]) -> FitResult:
        key = self._key(exposure, adjust)
        if key not in self.cache:
            X, names = design(self.df, self.r.x, exposure, adjust, self.columns)
            res = fit(self.r.family, X, self.r.outcome, names)
            self.cache[key] = _epv_warning(res)
        return self.cache[key]


def needs_predictor(f: FormFit) -> bool:
    """Whether a question reads this fit's per-row linear predictor (the absolute risks of
    unbin.questions.decisions); the others need only its C-index."""
    return ((f.adjustment == "continuous" and f.form in RISK_FORMS)
            or (f.form == "legacy" and f.adjustment == "legacy"))


def _release_predictors(r: Refit, f: _Fitter, coding: str, later: set[tuple[str, ...]],
                        ) -> None:
    """The fits of ``coding`` that no question reads row by row keep their C-index (the value
    the fits table would compute from the same predictor) and drop the predictor: n values
    each, a third of a fit job's memory at registry size. The fitter's copy goes too, unless a
    later coding has the same adjustment terms (it then reuses these very fits)."""
    released = []
    for i, ff in enumerate(r.fits):
        if (ff.adjustment != coding or not ff.result.ok or needs_predictor(ff)
                or ff.result.linear_predictor is None):
            continue
        value = c_index(r.outcome, ff.result.linear_predictor)
        r.fits[i] = replace(ff, result=replace(ff.result, linear_predictor=None), c_index=value)
        released.append(ff)
    adjust = tuple(repr(t) for t in released[0].adjust_terms) if released else ()
    if released and adjust not in later:
        for ff in released:
            f.drop_predictor(ff.exposure_terms, ff.adjust_terms)
    # the C-index memo holds its predictors too: keep the entries of predictors still held
    forget_c_indices(r.outcome, [*(ff.result.linear_predictor for ff in r.fits),
                                 *(res.linear_predictor for res in f.cache.values())])


def with_predictor(r: Refit, f: FormFit) -> FitResult:
    """The fit's result with its per-row linear predictor; a released one is computed again
    by fitting the same design on the same rows (the same fit)."""
    res = f.result
    if not res.ok or res.linear_predictor is not None:
        return res
    X, names = design(r.sample.frame, r.x, f.exposure_terms, f.adjust_terms)
    again = fit(r.family, X, r.outcome, names)
    return replace(res, linear_predictor=again.linear_predictor)


def _epv_warning(res: FitResult) -> FitResult:
    if not res.ok or res.family == "continuous" or res.events is None:
        return res
    k = len([n for n in res.names if n != "(intercept)"])
    events = res.events if res.family != "binary" else min(res.events, res.n - res.events)
    if k and events / k < EPV_MIN:
        msg = (f"{events} events for {k} coefficients ({events / k:.1f} per coefficient, below "
               f"the usual minimum of {EPV_MIN}): estimates may be unstable and optimistic.")
        return replace(res, warnings=(*res.warnings, msg))
    return res


def _empty_group_message(term: GroupedTerm, x: np.ndarray) -> str:
    counts = np.bincount(term.codes(x), minlength=len(term.labels))
    empty = [term.labels[j] for j in range(len(term.labels)) if counts[j] == 0]
    if empty:
        return (f"legacy group(s) {empty} of {term.variable!r} are empty in the analysis sample "
                f"(cuts {list(term.cuts)}); the legacy contrast cannot be estimated. Check the "
                "cuts against the data's range.")
    return ""


def with_powers_counted(res: FitResult, term: FPTerm) -> FitResult:
    """The fit with the FP powers counted as estimated parameters (Royston & Sauerbrei 2008:
    FP1 spends 2 df on the exposure, FP2 4), so its AIC and BIC are comparable with the other
    forms'. Only the counting changes; coefficients and likelihood are the fit's own."""
    if not res.ok:
        return res
    return replace(res, n_params=res.n_params + len(term.powers))


def test_spline_term(a: Analysis, x: np.ndarray) -> SplineTerm:
    """The spline behind every test (nonlinearity, added beyond the groups, exposure x level
    interaction): ``continuous.test_knots`` knots at the default quantiles of the exposure, fixed
    before the outcome is seen. Raises ValueError when the exposure has too few values."""
    return SplineTerm.at_quantiles(a.exposure, x, a.continuous.test_knots)


def test_spline_detail(term: SplineTerm) -> str:
    """The test spline's description with its knots (what the information table cites)."""
    knots = ", ".join(f"{k:.4g}" for k in term.knots)
    return f"restricted cubic spline, {len(term.knots)} fixed knots at {knots}"


def refit_analysis(sample: Sample, a: Analysis, spec: Spec, cohort: str,
                   basis: CommonBasis | None = None) -> Refit:
    """All fits of one analysis. ``basis`` is the common basis across cohorts; without one the
    cohort's own sample gives it (the same values as the single-cohort defaults)."""
    df = sample.frame
    x = df[a.exposure].to_numpy(float)
    legacy = legacy_term(x, a.exposure, spec)
    if basis is None:
        basis = combine([sample_summary(x, legacy, a.continuous)], a.continuous)
    r = Refit(a, cohort, sample, build_outcome(sample, a), x, legacy, basis)
    f = _Fitter(r, df)
    opts = a.continuous
    empty = _empty_group_message(legacy, x)
    spline_terms: list[SplineTerm] = []
    if opts.knot_values is not None:
        spline_terms.append(SplineTerm(a.exposure, opts.knot_values))
    else:
        for k in opts.spline_knots:
            try:
                spline_terms.append(SplineTerm.at_quantiles(a.exposure, x, k))
            except ValueError as exc:
                r.messages.append(str(exc))
    test_term: SplineTerm | None = None
    try:
        test_term = test_spline_term(a, x)
    except ValueError as exc:
        r.messages.append(f"test spline ({opts.test_knots} knots; continuous.test_knots): {exc} "
                          "The nonlinearity and added-beyond-the-groups tests are not computed.")
    codings: list[tuple[str, tuple[Term, ...]]] = [
        (c, adjustment_terms(df, a, spec, c)) for c in ADJUSTMENTS]
    codings.append(("none", ()))
    adjust_keys = [tuple(repr(t) for t in adjust) for _, adjust in codings]
    for position, (coding, adjust) in enumerate(codings):
        null = f.run((), adjust)
        r.fits.append(FormFit("null", coding, (), adjust, null, "adjustment only"))
        if empty:
            res = failed_fit(a.family, null.names, null.n, null.events, empty)
        else:
            res = f.run((legacy,), adjust)
        r.fits.append(FormFit("legacy", coding, (legacy,), adjust, res, legacy.describe()))
        lin_term = LinearTerm(a.exposure)
        linear = f.run((lin_term,), adjust)
        if "linear" in opts.forms or "fp" in opts.forms or coding == "none":
            r.fits.append(FormFit("linear", coding, (lin_term,), adjust, linear, "linear"))
        best_spline: FormFit | None = None
        if ("spline" in opts.forms or coding == "none") and spline_terms:
            cands = [FormFit("spline", coding, (t,), adjust, f.run((t,), adjust), t.describe(),
                             False) for t in spline_terms]
            ok = [c for c in cands if c.result.ok]
            if ok:
                best_spline = min(ok, key=lambda c: c.result.aic)
            for c in cands:
                r.fits.append(replace(c, selected=c is best_spline))
            if coding != "none":
                # The spline on the common knots: its coefficients go into the cohort bundle.
                term = SplineTerm(a.exposure, basis.knots)
                r.fits.append(FormFit("common_spline", coding, (term,), adjust,
                                      f.run((term,), adjust), f"{term.describe()} (common)"))
        if test_term is not None:
            # The tests' spline (knots fixed before the outcome is seen), under every coding.
            detail = test_spline_detail(test_term)
            r.fits.append(FormFit("test_spline", coding, (test_term,), adjust,
                                  f.run((test_term,), adjust), detail))
            if not empty:
                r.fits.append(FormFit("legacy+test_spline", coding, (legacy, test_term), adjust,
                                      f.run((legacy, test_term), adjust),
                                      f"legacy groups + {detail}"))
        if "fp" in opts.forms and coding != "none":
            if not (null.ok and linear.ok):
                r.fits.append(FormFit("fp", coding, (), adjust, failed_fit(
                    a.family, null.names, null.n, null.events,
                    "fractional polynomial selection needs the null and linear fits, which "
                    "failed"), "FP: failed"))
            else:
                rows, chosen = select_fp(f, adjust, x, a.exposure, opts.fp_alpha, null, linear)
                r.fits += [replace(row, adjustment=coding) for row in rows]
                r.fits.append(replace(chosen, adjustment=coding))
        _release_predictors(r, f, coding, set(adjust_keys[position + 1:]))
    return r


def bare_refit(sample: Sample, a: Analysis, spec: Spec, cohort: str) -> Refit:
    """The analysis sample, outcome and legacy grouping without any fits (for questions that
    fit their own models, such as the resampling ones)."""
    x = sample.frame[a.exposure].to_numpy(float)
    return Refit(a, cohort, sample, build_outcome(sample, a), x, legacy_term(x, a.exposure, spec))
