"""Residual confounding: how much of the confounding the legacy grouped adjustment leaves.

The exposure's effect is estimated three ways on the same sample: crude (no adjustment variables;
survival strata are kept), with the legacy adjustment (grouped where a grouping is declared,
other numeric variables linear, factors as factors) and with continuous adjustment (numeric
variables as restricted cubic splines). The share of the confounding that the grouped adjustment
leaves (Becher 1992, Stat Med 11:1747) is

    share_left = (e_grouped - e_continuous) / (e_crude - e_continuous),

``share_removed`` its complement: the quantity Cochran (1968, Biometrics 24:295) tabulated for a
normal confounder cut into c equal-frequency groups (63.7, 79.3, 86.1, 89.7 % for c = 2..5).

Contrast. Rows: the exposure linear (``exposure_form = "linear"``: its 75th vs 25th percentile)
and in the legacy groups (``"legacy"``: the group farthest from the legacy reference group vs
that reference). Both run in the legacy paper's direction, comparison vs reference: when the
comparison group lies below the reference, the linear contrast is 25th vs 75th percentile.
``comparison``/``reference`` name the two ends, ``x_value``/``x_reference`` their exposure values
(group medians for the legacy form).

Scales (``scale_kind``). Odds and hazard ratios are not collapsible: adjusting for a predictor of
the outcome moves them even when it is independent of the exposure, so a change-in-estimate on
the model scale mixes confounding with non-collapsibility (Greenland, Robins & Pearl 1999, Stat
Sci 14:29). The ``"marginal"`` rows (``primary`` marks the default one) therefore compare
standardised (g-computation) contrasts, ``unbin.refit.standardise``: each model's predictions with
every row's exposure set to the comparison and to the reference value, averaged over the sample
— risk ratio (log scale in ``estimate_*``) and risk difference (binary; survival: the risk by
the analysis' ``horizon`` from the Cox model's standardised survival, Breslow baseline; with
competing events the standardised cumulative incidence of the event of interest from
cause-specific Cox models of every cause on the same design, ``cif_risks``, so that competing
events lower the risk as they do in the decision tables; ``risk_kind`` says which), rate
ratio (count: expected events per person-time), mean difference (continuous). With no
confounding the crude and adjusted marginal contrasts estimate the same quantity. Their ``se_*``
are bootstrap standard deviations and ``lower_*``/``upper_*`` bootstrap percentile limits. The
``"conditional"`` row keeps the model-scale contrast (log odds/hazard/rate ratio or mean
difference; ``se_*`` from the model, Wald limits) and splits its
change-in-estimate, ``confounding = e_crude - e_continuous``, into

    change_confounding       = e_crude - m_continuous
    change_noncollapsibility = m_continuous - e_continuous,

where ``m_continuous`` is the continuously adjusted model's marginal contrast mapped to the model
scale (``unbin.refit.standardise.on_model_scale``: the log odds ratio of the standardised risks; for
survival the log ratio of the standardised cumulative hazards at the horizon — with competing
events those of the cause-specific model, one minus its standardised cause-specific survival,
the scale of the conditional cause-specific hazard ratio; the log rate ratio or the mean
difference, which equal the conditional ones, so the non-collapsibility part is 0 for counts
and linear models). The crude model's contrast is its own marginal one (except with
survival strata, whose mixing then falls into the confounding part).

Bootstrap. Intervals are percentiles over ``resampling.bootstrap`` replicates that resample
the analysis' design (``unbin.models.weighted.design_resample_weights``: rows; whole clusters
with ``cluster``; each copy keeping its sampling or frequency weight; without a cluster,
frequency-weighted rows by the individuals they stand for), drawn once and shared by every model, so all estimates of a replicate come from the same
resampled data; groupings, knots and contrast values stay as in the full sample. A replicate is
refitted by Newton's method from the full-sample estimate on frequency weights — vectorised over
replicates for the linear, logistic and Poisson models; negative binomial (NB2) count models by the
analysis' own fitter on each drawn data set (``unbin.models.drawn_refits``, alpha re-estimated:
the same estimator as the full sample's); for survival ``unbin.models.cox.fit_cox`` on the
resampled rows, whose sort and risk sets are laid out once per replicate for all designs — and
its standardised means come from the refitted coefficients by matrix products (survival: the
replicate's own Breslow baseline; with competing events each competing cause's Cox model is
refitted on the replicate's rows too, from its full-sample estimate). A replicate fails for a row (counted in ``bootstrap_failed``,
left out of ``bootstrap_ok``) when one of the row's three estimates is missing: a design column
without variation, no convergence, (logistic) fitted risks running to 0 or 1, or an undefined
standardised contrast. ``confounding_clear`` is false when the interval of the confounding
(crude - continuous) covers 0 — the share is then a ratio of noise and should not be read.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd

from ..models import EFFECT_SCALE, fit
from ..models.base import FitResult, Outcome
from ..models.cox import Layout, fit_cox, prepare_layout, refit_replicate
from ..models.cox.baseline import DrawnHorizon
from ..models.drawn_refits import coefficients, drawn_fits, needs_own_fitter
from ..models.percentile_limits import percentile_limits
from ..models.survival import cox_layout
from ..models.weighted import (
    _CHUNK_CELLS,
    WeightedGLM,
    compact_copies,
    cox_near_starts,
    cox_replicate_refits,
    design_resample_replicates,
    design_resample_weights,
    replicate_copies,
    replicate_rows,
    weighted_cox_designs,
)
from ..refit.analysis import Refit, adjustment_terms, design
from ..refit.contrasts import Z95
from ..refit.risk import horizon_for
from ..refit.sampling_design import marginal_reason
from ..refit.standardise import (
    MEASURES,
    CauseBaseline,
    IncidenceWithheld,
    cause_baseline,
    cif_risks,
    contrast,
    cox_risks,
    drawn_cox_risks,
    glm_means,
    on_model_scale,
)
from ..spec import Spec
from ..terms import GroupedTerm, LinearTerm, Term
from .job_fits import job_fit

TABLE = "confounding"
# ``risk_kind``: what the standardised absolute risks of a survival row are
RISK_SURVIVAL = "1 - survival (Cox model)"
RISK_INCIDENCE = "cumulative incidence (cause-specific Cox models of every cause)"
RISK_CAUSE_SPECIFIC = "1 - cause-specific survival (competing events censored)"
# The standardised cumulative incidence (refit/standardise.cif_risks) is interpolated over the
# rows' relative hazards (refit/incidence_sum), nodes x event times up to the horizon per
# design and evaluation; where the interpolation cannot be used (relative hazards too large or
# too spread for the event times' increments) it walks every distinct row through every event
# time. That row-by-row sum is refused above this many cells per evaluation for the estimate,
# and above it summed over the bootstrap's evaluations for the bootstrap (about a CPU-minute;
# a limit of the implementation, not a statistical choice): those rows, or their intervals,
# are then not computed and the message says why.
INCIDENCE_CELLS = 5e10


@dataclass
class _Design:
    X: np.ndarray
    k: int  # the exposure is X's first k columns
    at: tuple[np.ndarray, np.ndarray]  # exposure basis at the comparison and reference values
    res: FitResult
    others: tuple[FitResult, ...] = field(default=())  # competing causes' Cox models
    _groups: np.ndarray | None = None

    @property
    def groups(self) -> np.ndarray:
        """Each row's pattern of the adjustment columns ``X[:, k:]`` (numbered; rows of one
        pattern have the same relative hazards), found once for every evaluation."""
        if self._groups is None:
            rest = self.X[:, self.k:]
            if rest.shape[1] == 0:
                self._groups = np.zeros(self.X.shape[0], dtype=np.int64)
            else:
                order = np.lexsort(rest.T[::-1])
                s = rest[order]
                new = np.r_[True, np.any(s[1:] != s[:-1], axis=1)]
                self._groups = np.empty(rest.shape[0], dtype=np.int64)
                self._groups[order] = np.cumsum(new) - 1
        return self._groups


class _Designs:
    """Designs of one analysis, fitted once each (identical term lists share a fit)."""

    def __init__(self, r: Refit, horizon: float | None):
        self.r, self.horizon = r, horizon
        self.items: dict[str, _Design] = {}
        self.notes: dict[str, str] = {}
        self._means: dict[str, np.ndarray] = {}
        self._cs_means: dict[str, np.ndarray] = {}
        o = r.outcome
        # competing events: the event of interest first, then every other cause in the sample
        self.causes: tuple[int, ...] = ()
        # per design, why its standardised cumulative incidences (or their bootstrap) are not
        # computed (cif_risks' IncidenceWithheld)
        self.incidence_off: dict[str, str] = {}
        self.incidence_boot_off: dict[str, str] = {}
        self._cause_outcomes: list[Outcome] = []
        if r.family == "survival" and o.cause is not None:
            others = [int(c) for c in np.unique(o.cause) if c != 0 and c != o.event_of_interest]
            if others:
                self.causes = (o.event_of_interest, *others)
                self._cause_outcomes = [replace(o, y=(o.cause == c).astype(float), cause=None,
                                                cache={}) for c in others]

    @property
    def marginal_ok(self) -> bool:
        return self.r.family != "survival" or self.horizon is not None

    def add(self, exposure: tuple[Term, ...], adjust: tuple[Term, ...],
            at: tuple[np.ndarray, np.ndarray]) -> str:
        key = repr((exposure, adjust))
        if key not in self.items:
            X, names = design(self.r.sample.frame, self.r.x, exposure, adjust)
            k = sum(len(t.names()) for t in exposure)
            others = tuple(fit("survival", X, oc, names) for oc in self._cause_outcomes)
            self.items[key] = _Design(X, k, at, job_fit(self.r, X, names, exposure, adjust),
                                      others)
        return key

    @property
    def risk_kind(self) -> str:
        """What the marginal rows' absolute risks are (``""`` outside survival)."""
        if self.r.family != "survival":
            return ""
        return RISK_INCIDENCE if self.causes else RISK_SURVIVAL

    def _d(self, key: str) -> np.ndarray:
        at = self.items[key].at
        return at[0] - at[1]

    def estimate(self, key: str) -> tuple[float, float]:
        """The conditional contrast (model scale) and its standard error."""
        it = self.items[key]
        if not it.res.ok:
            return float("nan"), float("nan")
        lo = 1 if self.r.family != "survival" else 0  # after the intercept
        b, V = it.res.coef[lo:lo + it.k], it.res.cov[lo:lo + it.k, lo:lo + it.k]
        d = self._d(key)
        return float(d @ b), float(np.sqrt(max(float(d @ V @ d), 0.0)))

    def means(self, key: str) -> np.ndarray:
        """Standardised means at the comparison and the reference value (full sample); with
        competing events the standardised cumulative incidences of the event of interest."""
        if not self.causes:
            return self.cs_means(key)
        if key not in self._means:
            it, o = self.items[key], self.r.outcome
            out = np.full(2, np.nan)
            failed = [f"the Cox model of competing cause {c} did not fit: {f.message}"
                      for c, f in zip(self.causes[1:], it.others, strict=True) if not f.ok]
            if failed:
                self.notes[key] = "; ".join(failed)
            elif it.res.ok and self.marginal_ok:
                assert o.time is not None and o.cause is not None and self.horizon is not None
                try:
                    out, self.notes[key] = cif_risks(
                        it.X, it.k, [it.res.coef, *(f.coef for f in it.others)], it.at, o.time,
                        o.cause, self.causes, self.horizon, entry=o.entry, strata=o.strata,
                        layout=cox_layout(o), max_cells=INCIDENCE_CELLS, groups=it.groups)
                except IncidenceWithheld as e:
                    self.incidence_off[key] = self.notes[key] = (
                        f"{e}: not computed; the conditional rows and the 1 - cause-specific "
                        "survival of the other tables still are")
            self._means[key] = out
        return self._means[key]

    def cs_means(self, key: str) -> np.ndarray:
        """Standardised means of the design's own model (full sample): for survival one minus
        the standardised (cause-specific, with competing events) survival by the horizon."""
        if key not in self._cs_means:
            it, o = self.items[key], self.r.outcome
            out = np.full(2, np.nan)
            if it.res.ok and self.marginal_ok:
                if self.r.family == "survival":
                    assert o.time is not None and self.horizon is not None
                    out, note = cox_risks(it.X, it.k, it.res.coef, it.at, o.time, o.y,
                                          self.horizon, entry=o.entry, strata=o.strata,
                                          layout=cox_layout(o))
                    if not self.causes:
                        self.notes[key] = note
                else:
                    out = glm_means(self.r.family, it.X, it.k, it.res.coef, it.at,
                                    np.ones((1, o.n)), o.offset)[0]
            self._cs_means[key] = out
        return self._cs_means[key]

    def bootstrap(self, rng: np.random.Generator, replicates: int
                  ) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray], dict[str, np.ndarray]]:
        """Per design, the conditional contrast (B,), the standardised means (B, 2) and those
        of the design's own model (``cs_means``; the same dict without competing events) in
        every replicate; the replicates are shared by all designs, and the means come from
        each replicate's coefficients by matrix products (no refit of the design's model;
        with competing events each other cause's model is refitted)."""
        r, o = self.r, self.r.outcome
        n = o.n
        cond = {k: np.full(replicates, np.nan) for k in self.items}
        marg = {k: np.full((replicates, 2), np.nan) for k in self.items}
        marg_cs = ({k: np.full((replicates, 2), np.nan) for k in self.items} if self.causes
                   else marg)
        layouts: dict[tuple[int, int], Layout | None] = {}
        # without competing events or weights: each replicate's standardised survival from
        # its draw counts on the sample's rows and event times (drawn_cox_risks)
        at_h = (DrawnHorizon(cox_layout(o), self.horizon, o.strata)
                if r.family == "survival" and self.marginal_ok and not self.causes
                and o.weights is None and self.horizon is not None else None)
        p_max = max((v.X.shape[1] for v in self.items.values()), default=0)
        chunk = max(1, _CHUNK_CELLS // (n * (p_max + 1)))
        ok = [(key, it) for key, it in self.items.items() if it.res.ok]
        if r.family != "survival":
            return self._glm_bootstrap(rng, replicates, chunk, ok, cond, marg)
        for c0 in range(0, replicates, chunk):
            W = design_resample_weights(rng, o, min(chunk, replicates - c0))
            if r.family == "survival":  # all designs on each replicate's rows and Cox layout
                # each other cause's model refitted on all the chunk's replicates at once
                others = {(key, c): cox_replicate_refits(
                              oc, [it.X], cox_near_starts(oc, [it.X], [full.coef]), W)[0]
                          for key, it in ok if self.causes and self.marginal_ok
                          and key not in self.incidence_off
                          and key not in self.incidence_boot_off
                          for c, full, oc in zip(self.causes[1:], it.others,
                                                 self._cause_outcomes, strict=True) if full.ok}

                def risks(b: int, j: int, Xm: np.ndarray | None, m: np.ndarray, layout: Any,
                          coef: np.ndarray, c0: int = c0, W: np.ndarray = W,
                          others: dict[tuple[str, int], Any] = others) -> None:
                    key, it = ok[j]
                    assert o.time is not None and self.horizon is not None
                    if at_h is not None:
                        marg_cs[key][c0 + b] = drawn_cox_risks(at_h, it.X, it.k, coef, it.at,
                                                               W[b])
                        return
                    if Xm is None:
                        Xm = it.X[m]

                    def pick(v: np.ndarray | None) -> np.ndarray | None:
                        return None if v is None else v[m]

                    try:
                        # the event of interest's baseline, shared by its standardised
                        # survival and the cumulative incidence
                        base = cause_baseline(Xm, coef, o.time[m], o.y[m], entry=pick(o.entry),
                                              strata=pick(o.strata), layout=layout)
                        marg_cs[key][c0 + b] = cox_risks(Xm, it.k, coef, it.at, o.time[m],
                                                         o.y[m], self.horizon,
                                                         entry=pick(o.entry),
                                                         strata=pick(o.strata), layout=layout,
                                                         baseline=base)[0]
                        if self.causes and key not in self.incidence_off \
                                and key not in self.incidence_boot_off:
                            marg[key][c0 + b] = self._replicate_incidence(
                                c0 + b, it, Xm, m, coef, layout, layouts,
                                replicate_rows(o, W[b])[1], replicates, base,
                                {c: got.coef[b] for (k, c), got in others.items()
                                 if k == key and got is not None and got.done[b]})
                    except IncidenceWithheld as e:
                        self.incidence_boot_off[key] = (
                            f"the bootstrap of {e} (summed over the {replicates} replicates): "
                            "the estimates are shown without an interval; lower "
                            "resampling.bootstrap for one")
                    except ValueError:
                        pass
                coefs = weighted_cox_designs([(it.X, it.res.coef) for _, it in ok], o, W,
                                             risks if self.marginal_ok else None)
                for (key, it), coef in zip(ok, coefs, strict=True):
                    cond[key][c0:c0 + len(W)] = coef[:, :it.k] @ self._d(key)
        return cond, marg, marg_cs

    def _glm_bootstrap(self, rng: np.random.Generator, replicates: int, chunk: int,
                       ok: list[tuple[str, _Design]], cond: dict[str, np.ndarray],
                       marg: dict[str, np.ndarray],
                       ) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray],
                                  dict[str, np.ndarray]]:
        """:meth:`bootstrap` of the linear, logistic and Poisson designs: the replicates drawn
        at once, kept compact (``design_resample_replicates``: draw counts as small integers;
        the same draws from ``rng`` as drawing them in chunks, one replicate after another),
        each design refitted on all of them at once where the sample is large
        (``WeightedGLM.whole``), else chunk by chunk; the standardised means of a design
        refitted at once in one blocked pass over the rows (``glm_means`` on the compact
        copies), else chunk by chunk."""
        r, o = self.r, self.r.outcome
        R = design_resample_replicates(rng, o, replicates)
        copies = compact_copies(o, R)  # the drawn rows' copies, compact (None: chunk by chunk)
        if needs_own_fitter(o):  # NB2: each replicate refitted by the analysis' own fitter
            refits = drawn_fits([it.X for _, it in ok], o, R)
            drawn = copies if copies is not None else replicate_copies(o, R)
            for j, (key, it) in enumerate(ok):
                coef = coefficients([fs[j] for fs in refits], it.X.shape[1])
                cond[key][:] = coef[:, 1:1 + it.k] @ self._d(key)
                marg[key][:] = glm_means(r.family, it.X, it.k, coef, it.at, drawn, o.offset)
            return cond, marg, marg
        for key, it in ok:  # each design standardised once, for every chunk
            g = WeightedGLM(r.family, it.X, o, it.res.coef)
            whole = g.coef(R) if g.whole else None
            # (the linear model's means need no exponential: they stay chunk by chunk, whose
            # sums the confounding share's limits, a ratio of differences, are sensitive to)
            if whole is not None and copies is not None and r.family != "continuous":
                # every replicate's standardised means in one pass over the rows
                cond[key][:] = whole[:, 1:1 + it.k] @ self._d(key)
                marg[key][:] = glm_means(r.family, it.X, it.k, whole, it.at, copies, o.offset)
                del g, whole
                continue
            for c0 in range(0, replicates, chunk):
                W = R.part(c0, c0 + chunk)
                coef = g.coef(W) if whole is None else whole[c0:c0 + len(W)]
                cond[key][c0:c0 + len(W)] = coef[:, 1:1 + it.k] @ self._d(key)
                # standardised over the drawn rows as the full sample's over its rows
                marg[key][c0:c0 + len(W)] = glm_means(r.family, it.X, it.k, coef, it.at,
                                                      replicate_copies(o, W), o.offset)
            # the design's standardised copy goes before the next one's is made
            del g, whole
        return cond, marg, marg

    def _replicate_incidence(self, b: int, it: _Design, Xm: np.ndarray, m: np.ndarray,
                             coef: np.ndarray, layout: Layout,
                             layouts: dict[tuple[int, int], Layout | None],
                             case: np.ndarray | None = None, replicates: int = 1,
                             base: CauseBaseline | None = None,
                             refitted: dict[int, np.ndarray] | None = None) -> np.ndarray:
        """A replicate's standardised cumulative incidences of one design: each competing
        cause's Cox model refitted on the replicate's rows ``m`` (from its full-sample
        estimate; the layouts of a replicate shared by the designs), NaN when one fails; a
        row-by-row sum is allowed ``INCIDENCE_CELLS`` cells over the ``replicates`` and the
        full sample; ``base``: the event of interest's baseline on those rows when the caller
        has it (``standardise.cause_baseline``); ``refitted``: the causes whose refit is done
        already (by cause code, the batched refits of the chunk's replicates)."""
        o = self.r.outcome
        assert o.time is not None and o.cause is not None and self.horizon is not None
        entry = None if o.entry is None else o.entry[m]
        strata = None if o.strata is None else o.strata[m]
        cause = o.cause[m]
        coefs, lays = [coef], []
        for c, full, oc in zip(self.causes[1:], it.others, self._cause_outcomes, strict=True):
            if not full.ok:
                return np.full(2, np.nan)
            if (b, c) not in layouts:
                for old in [k for k in layouts if k[0] != b]:
                    del layouts[old]
                try:
                    layouts[(b, c)] = prepare_layout(o.time[m], (cause == c).astype(float),
                                                     entry=entry, strata=strata, weights=case)
                except ValueError:
                    layouts[(b, c)] = None
            lay = layouts[(b, c)]
            if lay is None:
                return np.full(2, np.nan)
            # secant steps from the full-sample estimate, as the design's own model's refit
            # (models.weighted.weighted_cox_designs); Newton's fit where they do not settle
            coef_c = None if refitted is None else refitted.get(c)
            if coef_c is None:
                near = cox_near_starts(oc, [it.X], [full.coef])[0]
                got = None if near is None else refit_replicate(near, it.X, m, lay)
                coef_c = None if got is None else got[0]
            if coef_c is None:
                fitted = fit_cox(Xm, o.time[m], (cause == c).astype(float), entry=entry,
                                 strata=strata, weights=case, init=full.coef, layout=lay)
                if not fitted.converged:
                    return np.full(2, np.nan)
                coef_c = fitted.coef
            if not np.all(np.isfinite(coef_c)):
                return np.full(2, np.nan)
            coefs.append(coef_c)
            lays.append(lay)
        return cif_risks(Xm, it.k, coefs, it.at, o.time[m], cause, self.causes, self.horizon,
                         entry=entry, strata=strata, layout=layout, other_layouts=lays,
                         max_cells=INCIDENCE_CELLS / (replicates + 1), groups=it.groups[m],
                         baseline=base, with_note=False)[0]


@dataclass(frozen=True)
class _Form:
    """One exposure form of the contrast: its terms, the two ends compared (names and exposure
    values) and the basis rows at which the models are evaluated."""

    form: str
    comparison: str
    reference: str
    terms: tuple[Term, ...]
    x_value: float
    x_reference: float
    at: tuple[np.ndarray, np.ndarray]

    @property
    def contrast(self) -> str:
        if self.form == "linear":
            return self.comparison.replace(" percentile", "") + f" vs {self.reference}"
        return f"{self.comparison} vs {self.reference}"


def _exposure_forms(r: Refit) -> list[_Form]:
    """The linear form (75th vs 25th percentile) and the legacy groups (the group farthest from
    the legacy reference vs the reference), both in the legacy paper's direction: when the
    comparison group lies below the reference, the linear contrast is 25th vs 75th."""
    term = r.legacy
    codes = term.codes(r.x)
    ref = term.reference
    present = [g for g in range(len(term.labels)) if g != ref and np.any(codes == g)]
    comp = max(present, key=lambda g: (abs(g - ref), g)) if present else None
    up = comp is None or comp > ref
    q25, q75 = (float(v) for v in np.percentile(r.x, [25, 75]))
    lin = (LinearTerm(r.analysis.exposure),)
    x1, x0, l1, l0 = ((q75, q25, "75th", "25th") if up else (q25, q75, "25th", "75th"))
    forms = [_Form("linear", f"{l1} percentile", f"{l0} percentile", lin, x1, x0,
                   (np.array([x1]), np.array([x0])))]
    if comp is not None and np.any(codes == ref):
        x1 = float(np.median(r.x[codes == comp]))
        x0 = float(np.median(r.x[codes == ref]))
        forms.append(_Form("legacy", term.labels[comp], term.labels[ref], (term,), x1, x0,
                           (term.basis([x1])[0], term.basis([x0])[0])))
    return forms


COLUMNS = ("exposure_form", "contrast", "comparison", "reference", "x_value", "x_reference",
           "scope", "grouping", "scale_kind", "scale", "primary", "horizon", "risk_kind", "n",
           *(f"{c}_{w}" for w in ("crude", "grouped", "continuous")
             for c in ("estimate", "se", "lower", "upper")),
           "confounding", "confounding_lower", "confounding_upper",
           "confounding_clear", "residual", "share_left", "share_left_lower", "share_left_upper",
           "share_removed", "change_confounding", "change_confounding_lower",
           "change_confounding_upper", "change_noncollapsibility",
           "change_noncollapsibility_lower", "change_noncollapsibility_upper", "bootstrap",
           "bootstrap_ok", "bootstrap_failed", "largest", "effect_crude", "effect_grouped",
           "effect_continuous", "status", "message")
_RATIO_SCALES = {"odds ratio", "hazard ratio", "rate ratio", "risk ratio"}


def _compare(est: np.ndarray, boot: np.ndarray | None, n_boot: int,
             notes: list[str]) -> tuple[dict[str, Any], np.ndarray | None]:
    """Confounding, residual and share from (crude, grouped, continuous) estimates, with
    percentile intervals from the replicates ``boot`` (B, 3); a replicate in which any of the
    three is missing counts as failed. Also returns the rows of the usable replicates."""
    c, g, m = (float(v) for v in est)
    total, resid = c - m, g - m
    share = resid / total if np.isfinite(total) and total != 0 else float("nan")
    row: dict[str, Any] = {"confounding": total, "residual": resid, "share_left": share,
                           "share_removed": 1.0 - share}
    if boot is None:
        return row, None
    ok = np.all(np.isfinite(boot), axis=1)
    row["bootstrap_ok"], row["bootstrap_failed"] = int(ok.sum()), n_boot - int(ok.sum())
    if ok.sum() < max(2, n_boot // 2):
        notes.append(f"only {int(ok.sum())} of {n_boot} bootstrap replicates could be "
                     "refitted; no interval")
        return row, None
    b = boot[ok]
    tot = b[:, 0] - b[:, 2]
    with np.errstate(divide="ignore", invalid="ignore"):
        s = (b[:, 1] - b[:, 2]) / tot
    if np.isfinite(s).sum() >= 2:
        row["share_left_lower"], row["share_left_upper"] = percentile_limits(s[np.isfinite(s)])
    lo, hi = percentile_limits(tot)
    row["confounding_lower"], row["confounding_upper"] = lo, hi
    row["confounding_clear"] = bool(lo > 0 or hi < 0)
    if not row["confounding_clear"]:
        notes.append("the confounding (crude - continuous) is not clearly different from zero "
                     "(its bootstrap interval covers 0), so the share is unstable")
    return row, b


_ESTIMATES = ("crude", "grouped", "continuous")
# A planned row: the exposure form, the scope, its adjustment terms, and the design keys of the
# crude, grouped and continuous estimates.
_Planned = tuple[_Form, str, tuple[Term, ...], tuple[str, str, str]]


def confounding_table(r: Refit, spec: Spec) -> pd.DataFrame:
    """The share of the confounding the legacy grouped adjustment leaves (module docstring)."""
    a = r.analysis
    df = r.sample.frame
    legacy_adj = adjustment_terms(df, a, spec, "legacy")
    cont_adj = adjustment_terms(df, a, spec, "continuous")
    if not legacy_adj:
        return pd.DataFrame([{"exposure_form": "", "scope": "all", "n": r.outcome.n,
                              "scale": EFFECT_SCALE[r.family], "status": "skipped",
                              "message": "no adjustment variables: there is no confounding "
                                         "adjustment to compare"}], columns=list(COLUMNS))
    if marginal_reason(a):
        return pd.DataFrame([{"exposure_form": "", "scope": "all", "n": r.outcome.n,
                              "scale": EFFECT_SCALE[r.family], "status": "skipped",
                              "message": marginal_reason(a)}], columns=list(COLUMNS))
    horizon = horizon_for(a, spec) if r.family == "survival" else None
    designs = _Designs(r, horizon)
    plan = _plan(r, designs, _scopes(legacy_adj, cont_adj), cont_adj)
    n_bootstrap = spec.resampling.bootstrap
    boot_conditional: dict[str, np.ndarray] = {}
    boot_marginal: dict[str, np.ndarray] = {}
    boot_own: dict[str, np.ndarray] = {}  # the designs' own models' means (conditional split)
    if n_bootstrap > 0:
        for key in designs.items:  # the estimates first: a withheld one is not bootstrapped
            designs.means(key)
        boot_conditional, boot_marginal, boot_own = designs.bootstrap(
            spec.rng(a.name, "confounding-bootstrap"), n_bootstrap)
    rows = []
    for f, scope, adj, keys in plan:
        base: dict[str, Any] = {
            "exposure_form": f.form, "contrast": f.contrast, "comparison": f.comparison,
            "reference": f.reference, "x_value": f.x_value, "x_reference": f.x_reference,
            "scope": scope, "n": r.outcome.n, "bootstrap": n_bootstrap, "horizon": horizon,
            "grouping": "; ".join(f"{t.variable}: {t.describe()}" for t in adj
                                  if isinstance(t, GroupedTerm)) or "none grouped"}
        fails = [designs.items[k].res.message for k in keys if not designs.items[k].res.ok]
        rows += _marginal_rows(r.family, designs, keys, base, fails, boot_marginal, n_bootstrap)
        rows.append(_conditional_row(r.family, designs, keys, base, fails, boot_conditional,
                                     boot_own, n_bootstrap))
    return _finish(pd.DataFrame(rows, columns=list(COLUMNS)))


def _scopes(legacy_adj: tuple[Term, ...],
            cont_adj: tuple[Term, ...]) -> list[tuple[str, tuple[Term, ...]]]:
    """The adjustment of each grouped scope: every grouped variable as the legacy paper had it
    ("all"), then each grouped variable alone grouped, the others continuous."""
    scopes: list[tuple[str, tuple[Term, ...]]] = [("all", legacy_adj)]
    for t in legacy_adj:
        if isinstance(t, GroupedTerm):
            scopes.append((t.variable, tuple(t if u.variable == t.variable else u
                                             for u in cont_adj)))
    return scopes


def _plan(r: Refit, designs: _Designs, scopes: list[tuple[str, tuple[Term, ...]]],
          cont_adj: tuple[Term, ...]) -> list[_Planned]:
    """Registers every design once (the crude and continuous ones are shared by the scopes) and
    lists the rows: exposure form x scope, with the keys of their three estimates."""
    plan: list[_Planned] = []
    for f in _exposure_forms(r):
        crude = designs.add(f.terms, (), f.at)
        cont = designs.add(f.terms, cont_adj, f.at)
        for scope, adj in scopes:
            plan.append((f, scope, adj, (crude, designs.add(f.terms, adj, f.at), cont)))
    return plan


def _marginal_rows(family: str, designs: _Designs, keys: tuple[str, str, str],
                   base: dict[str, Any], fails: list[str], boot_marginal: dict[str, np.ndarray],
                   n_bootstrap: int) -> list[dict[str, Any]]:
    """One row per marginal (standardised) scale of the family: the three contrasts, their
    bootstrap SDs and percentile limits, and the confounding comparison."""
    means = [designs.means(k) for k in keys]
    rows = []
    for scale, kind in MEASURES[family]:
        notes = list(fails) + [designs.notes[k] for k in keys if designs.notes.get(k)]
        est = np.array([contrast(kind, mu[0], mu[1]) for mu in means])
        boot = (np.column_stack([contrast(kind, boot_marginal[k][:, 0], boot_marginal[k][:, 1])
                                 for k in keys]) if boot_marginal else None)
        off = [designs.incidence_off[k] for k in keys if k in designs.incidence_off]
        boot_off = [designs.incidence_boot_off[k] for k in keys
                    if k in designs.incidence_boot_off]
        if off:  # no estimates, so no replicates to count either
            boot = None
        elif boot_off and boot is not None:
            boot = None
            notes += boot_off
        row, used = _compare(est, boot, n_bootstrap, notes)
        sd, lims = np.full(3, np.nan), np.full((2, 3), np.nan)
        if used is not None:
            sd, lims = used.std(axis=0, ddof=1), percentile_limits(used, axis=0)
        row.update(base, scale_kind="marginal", scale=scale,
                   primary=scale == MEASURES[family][0][0], risk_kind=designs.risk_kind)
        for i, what in enumerate(_ESTIMATES):
            row[f"estimate_{what}"], row[f"se_{what}"] = float(est[i]), float(sd[i])
            row[f"lower_{what}"], row[f"upper_{what}"] = float(lims[0, i]), float(lims[1, i])
        row["status"] = "ok" if np.isfinite(row["share_left"]) else "failed"
        if off:
            row["status"] = "skipped"
        if not designs.marginal_ok:
            row["status"] = "skipped"
            notes = ["no horizon for the standardised risks: give outcome.horizon or the "
                     "study-level horizon"]
        row["message"] = "; ".join(dict.fromkeys(notes))
        rows.append(row)
    return rows


def _conditional_row(family: str, designs: _Designs, keys: tuple[str, str, str],
                     base: dict[str, Any], fails: list[str],
                     boot_conditional: dict[str, np.ndarray],
                     boot_marginal: dict[str, np.ndarray], n_bootstrap: int) -> dict[str, Any]:
    """The conditional (model-scale) contrasts, Wald limits, and the change-in-estimate split
    into its confounding and non-collapsibility parts."""
    notes = list(fails)
    cond = [designs.estimate(k) for k in keys]
    est = np.array([e for e, _ in cond])
    boot = np.column_stack([boot_conditional[k] for k in keys]) if boot_conditional else None
    row, _ = _compare(est, boot, n_bootstrap, notes)
    row.update(base, scale_kind="conditional", scale=EFFECT_SCALE[family], primary=False,
               risk_kind=RISK_CAUSE_SPECIFIC if designs.causes else designs.risk_kind)
    for (e, se), what in zip(cond, _ESTIMATES, strict=True):
        row[f"estimate_{what}"], row[f"se_{what}"] = e, se
        row[f"lower_{what}"], row[f"upper_{what}"] = e - Z95 * se, e + Z95 * se
    marginal_continuous = float(on_model_scale(family, *designs.cs_means(keys[2])))
    row["change_confounding"] = est[0] - marginal_continuous
    row["change_noncollapsibility"] = marginal_continuous - est[2]
    if boot is not None and boot_marginal:
        bm = on_model_scale(family, boot_marginal[keys[2]][:, 0], boot_marginal[keys[2]][:, 1])
        good = np.all(np.isfinite(boot), axis=1) & np.isfinite(bm)
        if good.sum() >= max(2, n_bootstrap // 2):
            for col, v in (("change_confounding", boot[good, 0] - bm[good]),
                           ("change_noncollapsibility", bm[good] - boot[good, 2])):
                row[f"{col}_lower"], row[f"{col}_upper"] = percentile_limits(v)
    row["status"] = "ok" if np.isfinite(row["share_left"]) else "failed"
    row["message"] = "; ".join(dict.fromkeys(notes))
    return row


def _finish(out: pd.DataFrame) -> pd.DataFrame:
    """The effects on the reported scale, the scope whose grouping leaves the most, and the
    columns' dtypes."""
    for i in out.index:
        sc = out.at[i, "scale"]
        for what in _ESTIMATES:
            e = out.at[i, f"estimate_{what}"]
            out.at[i, f"effect_{what}"] = float(np.exp(e)) if sc in _RATIO_SCALES else e
    single = out["scope"] != "all"
    out["largest"] = False
    for _, g in out[single & out["share_left"].notna()].groupby(
            ["exposure_form", "scale_kind", "scale"], sort=False):
        out.loc[g["share_left"].idxmax(), "largest"] = True
    for col in ("bootstrap", "bootstrap_ok", "bootstrap_failed", "n"):
        out[col] = out[col].astype("Int64")
    for col in ("largest", "primary"):
        out[col] = out[col].fillna(False).astype(bool)
    out["confounding_clear"] = out["confounding_clear"].astype("boolean")
    return out


def summary_line(df: pd.DataFrame) -> str:
    """One line for the terminal summary: the share of the confounding the legacy adjustment
    leaves, per analysis, on the marginal (standardised) scale for the linear exposure form,
    and the confounder whose grouping leaves the most."""
    if df.empty or "scope" not in df:
        return "Residual confounding: no analyses."
    parts = []
    for name, g in df.groupby("analysis", sort=False):
        lin = g[g["exposure_form"] == "linear"]
        if "primary" in lin:
            lin = lin[lin["primary"].fillna(False).astype(bool)]
        allrow = lin[lin["scope"] == "all"]
        if allrow.empty or pd.isna(allrow["share_left"].iloc[0]):
            parts.append(f"{name} –")
            continue
        row = allrow.iloc[0]
        clear = row["confounding_clear"]
        if pd.notna(clear) and not bool(clear):
            parts.append(f"{name} little confounding")
            continue
        ci = ""
        if pd.notna(row["share_left_lower"]):
            ci = f" ({100 * row['share_left_lower']:.0f}–{100 * row['share_left_upper']:.0f})"
        worst = lin[lin["largest"].astype(bool)]
        who = f", most by {worst['scope'].iloc[0]}" if len(worst) else ""
        parts.append(f"{name} {100 * row['share_left']:.0f}%{ci}{who}")
    return ("Residual confounding (share the legacy adjustment leaves; standardised contrast "
            "of the exposure's quartiles): " + "; ".join(parts))
