"""Bootstrap intervals and optimism for the decision numbers, one table per analysis
(``decision_resampling``).

The models are those the decision questions read (:mod:`unbin.questions.decisions`), refitted
here on the analysis sample: the legacy groups and the spline (knot count by AIC, as in the
refit) each with legacy and with continuous adjustment (for ``delta_c`` in both codings, as in
the ``information`` table), and the linear exposure with continuous adjustment; the risk rules
use the legacy groups with legacy adjustment and the linear and spline forms with continuous
adjustment.
Fractional polynomials are not resampled (their power selection would have to be repeated in
every replicate). With an effect modifier, the implied thresholds here are read at the median
risk profile of the whole sample (``level`` all), not per level.

``resampling.bootstrap`` replicates (seeded from the spec:
``spec.rng(analysis, "decision_resampling")``) are drawn once and shared by every model; they
resample the analysis' design (``unbin.models.weighted.design_resample_weights``: rows, whole
clusters with ``cluster``, each copy keeping its weight; frequency-weighted rows without a
cluster by the individuals they stand for), and each replicate's measures are read on its drawn
rows as the full sample's are on its rows. Knots,
legacy cuts and the spline's knot count stay as in the full sample. Each replicate's models are
refitted by Newton's method from the full-sample estimates on frequency weights (logistic:
vectorised over replicates, :class:`unbin.models.weighted.WeightedGLM`; survival:
:func:`unbin.models.weighted.weighted_cox_designs`, with the replicate's own Breslow baseline
for the risk at the horizon). A survival replicate's C indices in its drawn rows and in the full
sample come from one sort of the replicate model's score
(:func:`unbin.models.cox.concordance.concordances`: the drawn rows as draw counts on the full
sample's time order, the same integer pair counts as the repeated rows). Every C index here,
apparent or replicate, compares the scores rounded to ``SCORE_DECIMALS`` decimals, as
:func:`unbin.models.discrimination.c_index` does, so that rows whose scores differ by
rounding tie in the optimism as in the apparent value.

Competing events (``outcome.competing``): the risks are those of the decision tables
(:func:`unbin.refit.risk.competing_risk_fit`), the cumulative incidence of the event of
interest by the horizon from the Fine–Gray model of each risk model's design
(:func:`unbin.models.competing.fit_fine_gray`), and every net benefit's observed incidence is
the Aalen–Johansen estimate (:func:`unbin.questions.net_benefit.net_benefit_km` with the
cause codes), so the full-sample net benefits, calibration slopes and implied thresholds are
the ``net_benefit``, ``calibration`` and ``thresholds`` tables' numbers. Each replicate
refits those Fine–Gray models on its drawn rows (the censoring and entry weights
re-estimated there, as in :func:`unbin.models.competing.fine_gray_bootstrap_cov`; Newton
steps from the full-sample estimate, coefficients and baseline only) and reads their risks
with its own baseline. The C index and delta C stay those of the cause-specific
Cox models (as in the ``information`` table). The calibration slope (a Cox model of the event
of interest, competing events censored, on the Fine–Gray ``log(-log(1 - p))``) is then not 1
by construction in the sample the model was fitted to: it gets a percentile interval too.

Rows (``quantity``):

- "C index" per model and adjustment, "delta C" (spline minus legacy groups) per
  adjustment, "net benefit" per rule and spec threshold, "calibration slope" per risk model:
  ``estimate`` is the full-sample (apparent) value, ``lower``/``upper`` the 2.5th and 97.5th
  percentiles of the replicates' values in their own bootstrap samples (percentile interval),
  and Harrell's bootstrap optimism correction (Harrell, Lee & Mark 1996, Stat Med 15:361;
  Steyerberg 2019, ch. 17): ``optimism`` is the mean over replicates of (the replicate model's
  value in its bootstrap sample minus its value in the original sample), ``corrected`` =
  ``apparent`` - ``optimism``. A rule that is not fitted (treat all, the legacy cut rule) has
  optimism 0. The calibration slope's apparent value is 1 (maximum likelihood); its corrected
  value is the mean slope of the replicate models in the original sample (the shrinkage
  factor). With competing events (above) the apparent slope is the calibration table's and
  ``corrected`` is apparent minus optimism, as for the other rows.
- "implied threshold" per model, spec threshold and crossing: the exposure value at which the
  model's risk at the median risk profile (the rest of the linear predictor at its median in the
  sample; in a replicate, in its bootstrap sample) crosses the threshold, as in the
  ``thresholds`` table; the interval is over the replicates with the same number of crossings
  (``replicates_matched`` says how many); ``beyond_central_range`` is true when the estimate
  lies outside the exposure's 1st-99th percentile (``exposure_p01``, ``exposure_p99``), where
  the curve rests on few rows.

Binary and survival outcomes only (a row says so for the others). Every row carries the
caution on thresholds and decision rules.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import pandas as pd
from scipy import special

from ..models import Outcome, fit
from ..models.base import FitResult
from ..models.competing import fine_gray_replicate, fit_fine_gray
from ..models.compiled import wanted
from ..models.cox import (
    concordance,
    concordance_order,
    prepare_layout,
    refit_near,
)
from ..models.cox.baseline import DrawnHorizon, baseline_steps
from ..models.cox.concordance import scores_concordances
from ..models.discrimination import auc, c_index, compared_score, drawn_aucs
from ..models.percentile_limits import percentile_limits
from ..models.weighted import (
    Replicates,
    WeightedGLM,
    design_resample_replicates,
    design_resample_weights,
    expit_into,
    replicate_rows,
    weighted_cox_designs,
)
from ..refit.analysis import Refit, adjustment_terms, design
from ..refit.risk import cumhaz_at, horizon_for, link, risk_scale
from ..refit.sampling_design import bootstrap_reason
from ..spec import Spec
from ..terms import LinearTerm, SplineTerm, Term
from .decisions import EVENT_FAMILIES, thresholds_for, typed_table
from .job_fits import job_fit
from .net_benefit import (
    legacy_rules,
    logistic_rules_drawn_and_full,
    net_benefit_counts,
    net_benefit_risk,
)

PURPOSE = "decision_resampling"
FORMS = ("legacy", "linear", "spline")
CODINGS = ("legacy", "continuous")
RISK_MODELS = (("legacy", "legacy"), ("linear", "continuous"), ("spline", "continuous"))
CURVE_MODELS = (("linear", "continuous"), ("spline", "continuous"))
# the models refitted: the risk rules', and legacy and spline in both codings for delta C
NEEDED = frozenset({*RISK_MODELS, *((f, c) for f in ("legacy", "spline") for c in CODINGS)})

COLUMNS = ("quantity", "rule", "model", "adjustment", "threshold", "crossing", "estimate",
           "lower", "upper", "apparent", "optimism", "corrected", "replicates_matched",
           "beyond_central_range", "exposure_p01", "exposure_p99", "bootstrap_ok",
           "bootstrap_failed", "risk_scale", "horizon", "computed_by", "status", "reason",
           "note", "caution")
TEXT = ("quantity", "rule", "model", "adjustment", "risk_scale", "computed_by", "status",
        "reason", "note", "caution")
COUNTS = ("crossing", "replicates_matched", "bootstrap_ok", "bootstrap_failed")


@dataclass
class Model:
    form: str
    coding: str
    X: np.ndarray
    k: int  # exposure columns first
    terms: tuple[Term, ...]
    adjust: tuple[Term, ...]
    res: FitResult


class _Sample:
    """The rows a model is judged on (indices into the analysis sample) and what is read there:
    risk at the horizon, C-index, net benefit, calibration slope."""

    def __init__(self, r: Refit, idx: np.ndarray, horizon: float | None,
                 weights: np.ndarray | None = None, layout: Any = None,
                 base: _Sample | None = None):
        o = r.outcome
        # the analysis sample (its _Sample) when these rows are read there as draw counts
        # (a replicate's drawn rows without weights): survival net benefits on its rows
        self.base = base
        self.idx, self.family, self.h = idx, r.family, horizon
        # the whole analysis sample in its order (idx = 0 .. n - 1)
        self._whole = (base is None and idx.size == r.outcome.n
                       and bool(np.array_equal(idx, np.arange(idx.size))))
        self.w = weights if weights is not None or o.weights is None else o.weights[idx]
        self.y = np.asarray(o.y, dtype=float)[idx]
        self.time = None if o.time is None else o.time[idx]
        self.entry = None if o.entry is None else o.entry[idx]
        self.strata = None if o.strata is None else o.strata[idx]
        # competing events: every row's cause code, for the Aalen–Johansen incidence
        self.cause = None if o.cause is None else np.asarray(o.cause)[idx]
        self.event_of_interest = o.event_of_interest
        self._order: Any = None
        self._counts: np.ndarray | None = None
        self._fcounts: np.ndarray | None = None
        self._drawn_horizon: DrawnHorizon | None = None
        # the Cox layout of these rows (unweighted): given when the replicate's refits made it
        self._layout: Any = layout
        self._outcome: Outcome | None = None
        self._at_horizon: _AtHorizon | None = None
        # the net benefits of the rules that are not fitted: the same in every evaluation on
        # these rows (the full sample is judged once per replicate)
        self.fixed_rules: dict[tuple[Any, ...], float] | None = None

    def rows_of(self, v: np.ndarray) -> np.ndarray:
        """``v[self.idx]`` (``v`` one value per row of the analysis sample): ``v`` itself when
        these rows are the whole sample in its order (no copy)."""
        if self.idx.size == v.shape[0] and self._whole:
            return v
        return v[self.idx]

    def row_counts(self, n: int) -> np.ndarray:
        """How often each of the analysis sample's ``n`` rows is among these rows."""
        if self._counts is None:
            self._counts = np.bincount(self.idx, minlength=n)
        return self._counts

    def float_counts(self, n: int) -> np.ndarray:
        """:meth:`row_counts` as floats (the weights of sums over the analysis sample)."""
        if self._fcounts is None:
            self._fcounts = self.row_counts(n).astype(float)
        return self._fcounts

    def drawn_horizon(self) -> DrawnHorizon:
        """The Breslow baseline at the horizon of any draw of these rows
        (:class:`unbin.models.cox.baseline.DrawnHorizon` on their layout, made once)."""
        if self._drawn_horizon is None:
            assert self.h is not None
            self._drawn_horizon = DrawnHorizon(self.layout(), self.h, self.strata)
        return self._drawn_horizon

    def layout(self) -> Any:
        """The Cox layout of these rows (sort, risk sets), made once and shared by the models."""
        if self._layout is None:
            self._layout = prepare_layout(self.time, self.y, entry=self.entry,
                                          strata=self.strata)
        return self._layout

    def time_order(self) -> Any:
        """Harrell's C's time order of these rows (made once, shared by every score)."""
        if self._order is None:
            self._order = concordance_order(self.time, self.y, self.entry, self.strata)
        return self._order

    def c_index(self, lp: np.ndarray) -> float:
        """The C index (AUC) of ``lp`` on these rows, scores compared as
        :func:`unbin.models.discrimination.c_index` compares them (``compared_score``)."""
        if self.w is not None:  # pairs weighted w_i w_j (unbin.models.discrimination)
            return c_index(Outcome(self.family, self.y, time=self.time, entry=self.entry,
                                   strata=self.strata, weights=self.w), lp)
        score = compared_score(lp)
        if self.family == "binary":
            return pair_auc(self.y, score)
        return float(concordance(self.time, score, self.y, entry=self.entry, strata=self.strata,
                                 time_order=self.time_order()))

    def net_benefit(self, pt: np.ndarray, risk: np.ndarray | None = None,
                    positive: np.ndarray | None = None) -> np.ndarray:
        if positive is None:
            positive = np.zeros(len(self.y), dtype=bool)
        if self.family == "binary":
            out = (net_benefit_risk(self.y, risk, pt) if risk is not None
                   else net_benefit_counts(self.y, positive, pt))
            return out[0]
        assert self.time is not None and self.h is not None
        if self._at_horizon is None:
            self._at_horizon = _AtHorizon(self.time, self.y, self.entry, self.h, self.cause,
                                          self.event_of_interest)
        return self._at_horizon.net_benefit(pt, positive, risk)

    def net_benefit_of_rows(self, pt: np.ndarray, risk: np.ndarray | None = None,
                            positive: np.ndarray | None = None) -> np.ndarray:
        """:meth:`net_benefit` with ``risk``/``positive`` given for every row of the analysis
        sample (not only these rows; one of the two): read on ``base``'s rows with these rows' draw counts
        when they have a base (the same numbers as on the repeated rows), else on
        ``[self.idx]``."""
        if self.base is None or self.family == "binary":
            return self.net_benefit(pt, None if risk is None else risk[self.idx],
                                    None if positive is None else positive[self.idx])
        base = self.base
        assert base.time is not None and base.h is not None
        if base._at_horizon is None:
            base._at_horizon = _AtHorizon(base.time, base.y, base.entry, base.h, base.cause,
                                          base.event_of_interest)
        return base._at_horizon.net_benefit(pt, positive, risk,
                                            self.row_counts(len(base.idx)))

    def slope(self, z: np.ndarray) -> float:
        """Calibration slope of the linear predictor on the risk's link scale (Cox 1958)."""
        if self.family == "binary":
            return logistic_slope(self.y, z)
        if self._outcome is None:  # one Outcome, so its cached layout serves every model
            self._outcome = Outcome("survival", self.y, time=self.time, entry=self.entry,
                                    strata=self.strata)
        zc = (z - z.mean())[:, None]
        if self.y.any():  # from a slope of 1, which the replicate models are near
            # the rows' own layout (the Outcome's is laid out from the same arrays)
            near = refit_near(zc, self.layout(), [1.0])
            if near is not None:
                return float(near[0])
        res = fit("survival", zc, self._outcome, ("z",))
        return float(res.coef[0]) if res.ok else float("nan")


class _AtHorizon:
    """The Kaplan–Meier survival (Aalen–Johansen cumulative incidence with ``cause``) at the
    horizon among any subset of one sample's rows, for the survival net benefits
    (:func:`unbin.questions.net_benefit.net_benefit_km`, whose numbers these are, bit for bit).

    Every row's place among the sample's event times up to the horizon (any cause) is found
    once; a subset's at-risk and event counts at those times are then bincounts of its rows.
    An event time of the sample that holds no event of the subset adds a factor of exactly 1
    to the product-limit and 0 to the incidence's sum, so the subset's estimate on the
    sample's times equals the one on its own; its risk-set counts are whole numbers, exact in
    any order of summation. Rows without a weight only (as ``net_benefit_km``)."""

    def __init__(self, time: np.ndarray, event: np.ndarray, entry: np.ndarray | None,
                 horizon: float, cause: np.ndarray | None, event_of_interest: int):
        t = np.asarray(time, dtype=float)
        self.n, self.horizon, self.competing = t.size, horizon, cause is not None
        c = (np.asarray(cause, dtype=float) if cause is not None
             else (np.asarray(event, dtype=float) > 0).astype(float))
        hit = (c != 0) & (t <= horizon)
        self.grid = np.unique(t[hit])
        self.K = self.grid.size
        # at risk at the grid times [lo, hi): entered before the time, still there at it
        self.hi = np.searchsorted(self.grid, t, side="right")
        self.lo = (np.zeros(t.size, dtype=np.int64) if entry is None
                   else np.searchsorted(self.grid, np.asarray(entry, dtype=float),
                                        side="right"))
        self.at = np.where(hit, self.hi - 1, -1)  # a row's event's grid index (-1: none)
        self.mine = hit & (c == event_of_interest) if cause is not None else hit
        # the rows with an event by the horizon (of interest) and their grid indices
        self.ev_rows = np.flatnonzero(hit)
        self.ev_at = self.at[self.ev_rows]
        self.mine_rows = np.flatnonzero(self.mine)
        self.mine_at = self.at[self.mine_rows]
        # the last risk rule's groups and bins (_rule_bins), with the risk array they are of
        self._bins: tuple[Any, ...] | None = None

    def _counts(self, mask: np.ndarray, counts: np.ndarray | None = None,
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        K = self.K
        # each row's count in the subset (0 outside it): whole numbers, so every sum below is
        # exact, the same as over the subset's rows alone
        w = (mask.astype(float) if counts is None
             else np.where(mask, counts, 0).astype(float))
        Y = np.cumsum(np.bincount(self.lo, w, minlength=K + 1)
                      - np.bincount(self.hi, w, minlength=K + 1))[:K]
        d_all = np.bincount(self.ev_at, w[self.ev_rows], minlength=K)
        d_1 = np.bincount(self.mine_at, w[self.mine_rows], minlength=K)
        return Y, d_all, d_1

    def _rule_bins(self, ascending: np.ndarray, risk: np.ndarray,
                   ) -> tuple[np.ndarray, tuple[np.ndarray, ...]]:
        """Each row's group for the rules "treat when ``risk`` >= p_t" (the number of the
        ``ascending`` thresholds its risk reaches) and the (group, grid index) bins of every
        row's risk-set entry and exit and of every event (of interest) by the horizon. Kept
        for the last ``risk`` array (by identity) and thresholds: a bootstrap replicate's
        model is read on its drawn rows and on the full sample from the same risks, and only
        the rows' weights differ between the two."""
        key = ascending.tobytes()
        got = self._bins
        if got is not None and got[0] is risk and got[1] == key:
            return got[2], got[3]
        group = np.zeros(self.n, dtype=np.intp)
        for t in ascending:
            group += risk >= t
        span, K = self.K + 1, self.K
        bins = () if K == 0 else (group * span + self.lo, group * span + self.hi,
                                  group[self.ev_rows] * K + self.ev_at,
                                  group[self.mine_rows] * K + self.mine_at)
        self._bins = (risk, key, group, bins)
        return group, bins

    def _rule_counts(self, group: np.ndarray, bins: tuple[np.ndarray, ...], G: int,
                     w: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """:meth:`_counts` of the G nested subsets "``group`` > g" (g = 0 .. G - 1; ``group``
        a whole number 0 .. G per row) at once, each row with weight ``w`` (whole numbers):
        every row's risk-set entry and exit and every event binned by (group, grid index)
        (``bins``, :meth:`_rule_bins`) in one pass each, then summed over the groups above g.
        Returns (G, K) arrays Y, d_all, d_1 and each subset's summed weight (G,). Whole
        numbers throughout, so every sum is exact: the same numbers as :meth:`_counts` of
        each subset."""
        K = self.K
        span = K + 1
        lo, hi, ev, mine = bins

        def binned(at: np.ndarray, rows: np.ndarray | None, size: int) -> np.ndarray:
            wr = w if rows is None else w[rows]
            out = np.bincount(at, wr, minlength=(G + 1) * size)
            # the rows of the groups above g: a reverse cumulative sum over the groups
            return np.cumsum(out.reshape(G + 1, size)[::-1], axis=0)[::-1][1:]

        Y = np.cumsum(binned(lo, None, span) - binned(hi, None, span), axis=1)[:, :K]
        d_all = binned(ev, self.ev_rows, K)
        d_1 = binned(mine, self.mine_rows, K)
        size = np.cumsum(np.bincount(group, w, minlength=G + 1)[::-1])[::-1][1:]
        return Y, d_all, d_1, size

    def survival(self, mask: np.ndarray, counts: np.ndarray | None = None) -> float:
        """S(h) among ``mask``'s rows (each repeated ``counts`` times when given: whole
        numbers, so the risk-set and event counts are the same whole numbers as those of the
        repeated rows): 1 - the incidence of the event of interest with competing events,
        else the Kaplan–Meier estimate."""
        if self.K == 0:
            return 1.0
        return self._survival_of(*self._counts(mask, counts))

    def _survival_of(self, Y: np.ndarray, d_all: np.ndarray, d_1: np.ndarray) -> float:
        """:meth:`survival` from a subset's risk-set and event counts on the grid."""
        if not self.competing:  # km_survival: the product over the subset's own event times
            has = d_all > 0
            if not has.any():
                return 1.0
            return float(np.prod(1.0 - d_all[has] / Y[has]))
        with np.errstate(invalid="ignore", divide="ignore"):
            step = np.where(Y > 0, d_all / Y, 0.0)
            haz1 = np.where(Y > 0, d_1 / Y, 0.0)
        S = np.cumprod(1.0 - step)
        S_before = np.concatenate([[1.0], S[:-1]])
        if not d_all.any():  # the subset has no event by the horizon: incidence 0
            return 1.0
        # the incidence at the subset's last event time up to the horizon
        last = int(np.flatnonzero(d_all)[-1])
        return 1.0 - float(np.cumsum(S_before * haz1)[last])

    def net_benefit(self, thresholds: np.ndarray, positive: np.ndarray | None,
                    risk: np.ndarray | None, counts: np.ndarray | None = None) -> np.ndarray:
        """``net_benefit_km(...)[0]``: NB per threshold of the rule ``positive`` (n,) or of
        "treat when ``risk`` >= p_t". With ``counts`` (whole numbers, one per row), of the
        rows repeated as often as they say (a bootstrap replicate's drawn rows): the share
        treated is the same quotient of whole numbers as ``mask.mean()`` of the repeated
        rows, the product-limit the same (``survival``)."""
        if risk is not None:
            return self._risk_rule(np.asarray(thresholds, dtype=float), risk, counts)
        tp = np.zeros(len(thresholds))
        fp = np.zeros(len(thresholds))
        done: dict[bytes, tuple[float, float]] = {}
        total = None if counts is None else int(counts.sum())
        for g in range(len(thresholds)):
            mask = np.asarray(positive, dtype=bool) if risk is None else risk >= thresholds[g]
            share = (float(mask.mean()) if counts is None or total is None
                     else int(counts[mask].sum()) / total)
            if share == 0:
                continue
            key = np.packbits(mask).tobytes()
            if key not in done:
                s = self.survival(mask, counts)
                done[key] = ((1.0 - s) * share, s * share)
            tp[g], fp[g] = done[key]
        return np.asarray(tp - fp * thresholds / (1.0 - thresholds))

    def _risk_rule(self, thresholds: np.ndarray, risk: np.ndarray,
                   counts: np.ndarray | None) -> np.ndarray:
        """:meth:`net_benefit` of "treat when ``risk`` >= p_t" at every threshold from one
        pass over the rows: the rules are nested (a higher threshold treats a subset), so each
        row's group is the number of thresholds (in increasing order) its risk reaches, and
        the subset treated at the g-th is the rows of a group above g (:meth:`_rule_counts`;
        a risk that is not a number reaches none). The same whole-number counts, shares and
        product-limits as the rule's mask at each threshold."""
        G = thresholds.size
        up = np.argsort(thresholds, kind="stable")
        group, bins = self._rule_bins(thresholds[up], risk)
        w = np.ones(self.n) if counts is None else np.asarray(counts, dtype=float)
        total = float(self.n) if counts is None else float(w.sum())
        tp = np.zeros(G)
        fp = np.zeros(G)
        if self.K == 0:
            Y = d_all = d_1 = np.zeros((G, 0))
            size = np.cumsum(np.bincount(group, w, minlength=G + 1)[::-1])[::-1][1:]
        else:
            Y, d_all, d_1, size = self._rule_counts(group, bins, G, w)
        for rank, g in enumerate(up):
            share = size[rank] / total
            if share == 0:
                continue
            s = 1.0 if self.K == 0 else self._survival_of(Y[rank], d_all[rank], d_1[rank])
            tp[g], fp[g] = (1.0 - s) * share, s * share
        return np.asarray(tp - fp * thresholds / (1.0 - thresholds))


def pair_auc(y: np.ndarray, score: np.ndarray) -> float:
    """:func:`unbin.models.discrimination.auc`, the same number: the Mann–Whitney count of
    (event, non-event) pairs in which the event scores higher (ties one half) from one sort
    of the non-events' scores instead of the ranks of all rows. The count is a multiple of
    one half, exact in floating point either way, so the two divide the same numerator."""
    e = np.asarray(y, dtype=bool)
    s = np.asarray(score, dtype=float)
    n1, n0 = int(e.sum()), int((~e).sum())
    if n1 == 0 or n0 == 0 or np.isnan(s).any():
        return auc(e, s)
    others = np.sort(s[~e])
    cases = s[e]
    below = int(np.searchsorted(others, cases, side="left").sum())
    not_above = int(np.searchsorted(others, cases, side="right").sum())
    return float((below + not_above) / 2 / (n1 * n0))


def logistic_slope(y: np.ndarray, z: np.ndarray) -> float:
    """b in logit P(y) = a + b z by Newton's method (two parameters); NaN without convergence.
    The 2 x 2 information and the score are five sums over the rows (no n x 2 design), taken
    a block of ``_SLOPE_ROWS`` rows at a time so that each step's passes (b zc + a, expit,
    mu (1 - mu), y - mu, w zc) stay in cache (the same sums to rounding; from
    ``SLOPE_SUMS_FROM_ROWS`` rows the five sums of a block are one compiled pass,
    ``unbin.models.compiled.slope_sums``). Newton starts from the predictor as it is
    (a = mean z, b = 1), the maximum when z is the log odds of a model fitted to these rows and
    near it for a bootstrap replicate's model (fewer steps than from the outcome's log odds;
    the same maximum)."""
    y = np.asarray(y, dtype=float)
    z = np.asarray(z, dtype=float)
    centre = float(np.mean(z))
    zc = z - centre
    n = len(zc)
    a, b = (centre if np.isfinite(centre)
            else float(special.logit(np.clip(y.mean(), 1e-6, 1 - 1e-6)))), 1.0
    sums: Callable[[np.ndarray, np.ndarray, np.ndarray], np.ndarray] | None = None
    if wanted(n, SLOPE_SUMS_FROM_ROWS):
        from ..models.compiled.slope_sums import slope_sums

        sums = slope_sums
    # a block's arrays made once and overwritten at each step
    mu, w, r, wz = (np.empty(min(n, _SLOPE_ROWS) if sums is None or k == 0 else 0)
                    for k in range(4))
    for _ in range(50):
        h00 = h01 = h11 = g0 = g1 = 0.0
        for r0 in range(0, n, _SLOPE_ROWS):
            zb, yb = zc[r0:r0 + _SLOPE_ROWS], y[r0:r0 + _SLOPE_ROWS]
            m = len(zb)
            mub = mu[:m]
            np.multiply(zb, b, out=mub)
            mub += a
            expit_into(mub, mub)
            if sums is not None:
                s5 = sums(zb, yb, mub)
                h00 += float(s5[0])
                h01 += float(s5[1])
                h11 += float(s5[2])
                g0 += float(s5[3])
                g1 += float(s5[4])
                continue
            wb, rb, wzb = w[:m], r[:m], wz[:m]
            np.subtract(1.0, mub, out=wb)
            wb *= mub
            np.subtract(yb, mub, out=rb)
            np.multiply(wb, zb, out=wzb)
            h00 += float(wb.sum())
            h01 += float(wzb.sum())
            h11 += float(wzb @ zb)
            g0 += float(rb.sum())
            g1 += float(rb @ zb)
        det = h00 * h11 - h01 * h01
        if not (np.isfinite(det) and det > 0):
            return float("nan")
        s0, s1 = (h11 * g0 - h01 * g1) / det, (h00 * g1 - h01 * g0) / det
        a, b = a + s0, b + s1
        if max(abs(s0), abs(s1)) < 1e-10:
            return b
    return float("nan")


# From this many rows a block's sums of :func:`logistic_slope` are one compiled pass
# (DEVELOPERS.md, "Compiled kernels").
SLOPE_SUMS_FROM_ROWS = 50_000
_SLOPE_ROWS = 32768  # rows of a block of the calibration slope's sums (5 arrays of 256 kB)


def _log_base(on: _Sample, lp_m: np.ndarray, horizon: float, strata_all: np.ndarray | None,
              n: int) -> tuple[np.ndarray, float]:
    """log H0_s(h) per stratum label from the Breslow baseline of the rows of ``on`` with
    linear predictor ``lp_m`` (centred), as a lookup for every row of the sample, and the
    centre."""
    centre = float(np.mean(lp_m))
    base = baseline_steps((lp_m - centre)[:, None], on.time, on.y, [1.0], entry=on.entry,
                          strata=on.strata, layout=on.layout())
    h0, _, _ = cumhaz_at(base, strata_all, n, horizon)
    with np.errstate(divide="ignore"):
        return np.log(h0), centre


def fitted_models(r: Refit, spec: Spec, fixed: dict[str, Any] | None = None
                  ) -> tuple[dict[tuple[str, str], Model], list[str]]:
    """The models refitted (module docstring); ``fixed`` (an imputed set: the first set's
    choices) gives, by coding, the adjustment terms (``"adjust"``) and the spline's terms
    (``"spline"``) instead of placing them on this sample."""
    a, df, x = r.analysis, r.sample.frame, r.x
    opts = a.continuous
    notes: list[str] = []
    models: dict[tuple[str, str], Model] = {}
    cache: dict[str, np.ndarray] = {}
    same_adjust: tuple[Term, ...] | None = None
    for coding in CODINGS:
        adjust = (fixed["adjust"][coding] if fixed and coding in fixed["adjust"]
                  else adjustment_terms(df, a, spec, coding))
        if same_adjust is None:
            same_adjust = adjust
        cands: dict[str, list[tuple[Term, ...]]] = {
            "legacy": [(r.legacy,)], "linear": [(LinearTerm(a.exposure),)]}
        if fixed and coding in fixed["spline"]:
            cands["spline"] = [fixed["spline"][coding]]
        elif opts.knot_values is not None:
            cands["spline"] = [(SplineTerm(a.exposure, opts.knot_values),)]
        else:
            cands["spline"] = []
            for k in opts.spline_knots:
                try:
                    cands["spline"].append((SplineTerm.at_quantiles(a.exposure, x, k),))
                except ValueError:
                    continue
        for form in FORMS:
            if (form, coding) not in NEEDED:
                continue
            best: Model | None = None
            same = models.get((form, CODINGS[0]))
            if coding != CODINGS[0] and same is not None and adjust == same_adjust:
                models[(form, coding)] = same  # no adjusters coded differently: one model
                continue
            for terms in cands[form]:
                X, names = design(df, x, terms, adjust, cache)
                res = job_fit(r, X, names, terms, adjust)
                k = sum(len(t.names()) for t in terms)
                if res.ok and (best is None or res.aic < best.res.aic):
                    best = Model(form, coding, X, k, terms, adjust, res)
            if best is None:
                notes.append(f"{form} with {coding} adjustment did not fit")
            else:
                models[(form, coding)] = best
    return models, notes


def _curve(mdl: Model, coef: np.ndarray, family: str) -> Callable[[np.ndarray], np.ndarray]:
    lo = 1 if family == "binary" else 0
    b = coef[lo:lo + mdl.k]

    def f(v: np.ndarray) -> np.ndarray:
        return np.asarray(_exposure_basis(mdl, v) @ b, dtype=float)

    return f


def _exposure_basis(mdl: Model, v: np.ndarray) -> np.ndarray:
    """The model's exposure columns at the exposure values ``v``."""
    return np.column_stack([t.basis(np.atleast_1d(v)) for t in mdl.terms])


def _percentiles(values: np.ndarray) -> tuple[float, float]:
    v = values[np.isfinite(values)]
    if v.size < 2:
        return float("nan"), float("nan")
    lo, hi = percentile_limits(v, 0.95)
    return lo, hi


def _skip_reason(r: Refit, spec: Spec, horizon: float | None) -> str | None:
    """Why the table has nothing to resample for this analysis, or None."""
    if r.family not in EVENT_FAMILIES:
        return (f"the decision numbers need the probability of an event (binary or survival); "
                f"a {r.family} outcome has none")
    if r.family == "survival" and horizon is None:
        return "no horizon for the survival risk: give outcome.horizon or the study-level horizon"
    if spec.resampling.bootstrap <= 0:
        return "resampling.bootstrap is 0 (switched off)"
    return bootstrap_reason(r.analysis) or None


def _replicate_coefs(r: Refit, models: dict[tuple[str, str], Model],
                     W: np.ndarray | Replicates,
                     layouts: dict[int, Any] | None = None,
                     ) -> dict[tuple[str, str], np.ndarray]:
    """Every model's coefficients refitted in every replicate (rows of the result); a model
    shared by two keys is refitted once. Survival: ``layouts`` (when given) receives, per
    replicate, the Cox layout of its drawn rows that the refits used (when the outcome has no
    weights, so that it is the unweighted layout the replicate's other numbers need)."""
    o = r.outcome
    keys = list(models)
    unique = list({id(models[k]): k for k in keys}.values())
    if r.family == "binary":
        fitted = {k: WeightedGLM("binary", models[k].X, o, models[k].res.coef).coef(W)
                  for k in unique}
    else:
        def keep(b: int, j: int, Xm: np.ndarray | None, m: np.ndarray, layout: Any,
                 coef: np.ndarray) -> None:
            if layouts is not None and o.weights is None:
                layouts.setdefault(b, layout)

        dense = W if isinstance(W, np.ndarray) else W.dense()
        outs = weighted_cox_designs([(models[k].X, models[k].res.coef) for k in unique], o,
                                    dense, keep)
        fitted = dict(zip(unique, outs, strict=True))
    first = {id(models[k]): k for k in unique}
    return {k: fitted[first[id(models[k])]] for k in keys}


def _replicate_weights(rng: np.random.Generator, outcome: Outcome, replicates: int,
                       ) -> Iterator[np.ndarray]:
    """The rows of ``design_resample_weights(rng, outcome, replicates)``, drawn one replicate
    at a time when asked for: the same draws from the same generator (its stream is used in
    the same order), without holding the replicates x rows array (400 MB at 1,000,000 rows
    and 50 replicates)."""
    for _ in range(replicates):
        yield design_resample_weights(rng, outcome, 1)[0]


# A risk model's coefficients and every analysis-sample row's z on the risk scale, or None
# when it did not fit (or some row's risk is 0).
RiskZ = tuple[np.ndarray, np.ndarray] | None


def fine_gray_risks(r: Refit, models: dict[tuple[str, str], Model], horizon: float,
                    rows: np.ndarray | None = None, weights: np.ndarray | None = None,
                    starts: dict[tuple[str, str], RiskZ] | None = None,
                    ) -> tuple[dict[tuple[str, str], RiskZ], list[str]]:
    """Competing events: the Fine–Gray model of each risk model's design (as
    :func:`unbin.refit.risk.competing_risk_fit` reads the decision tables' risks) fitted on
    ``rows`` (a replicate's drawn rows, repeated as drawn, with their ``weights``; None: the
    analysis sample), the censoring and entry weights re-estimated on them
    (:func:`unbin.models.competing.fit_fine_gray`), and every sample row's
    ``z = log Lambda0_s(h) + X b`` with that fit's baseline; and a note per model that did
    not fit. A replicate's fits start from the full-sample ones (``starts``: this function's
    result on the analysis sample; :func:`_fine_gray_near`)."""
    o = r.outcome
    assert o.cause is not None
    sample = o if rows is None else replace(o.subset(rows), weights=weights, cluster=None)
    out: dict[tuple[str, str], RiskZ] = {}
    notes: list[str] = []
    done: dict[int, RiskZ] = {}
    for k in RISK_MODELS:
        m = models.get(k)
        if m is None:
            continue
        if id(m) not in done:
            start = None if rows is None or starts is None else starts.get(k)
            if start is None:
                X = m.X if rows is None else m.X[rows]
                res = fit_fine_gray(X, sample, np.asarray(sample.cause), o.event_of_interest,
                                    m.res.names)
                coef = res.coef if res.ok and np.all(np.isfinite(res.coef)) else None
                base = res.extra.get("baseline") if coef is not None else None
                message = res.message
            else:  # a replicate: coefficients only, from the full-sample estimate
                assert rows is not None
                coef, base = _fine_gray_near(m.X, rows, sample, o, start[0])
                message = "no convergence from the full-sample estimate"
            got: RiskZ = None
            if coef is not None:
                h0, _, _ = cumhaz_at(base, o.strata, o.n, horizon)
                with np.errstate(divide="ignore"):
                    z = np.log(h0) + m.X @ coef
                got = (np.asarray(coef, dtype=float), z) if np.all(np.isfinite(z)) else None
                if got is None:
                    notes.append(f"{k[0]} with {k[1]} adjustment: the Fine–Gray risk is 0 for "
                                 "some rows (no event of interest before the horizon)")
            else:
                notes.append(f"the Fine–Gray model of {k[0]} with {k[1]} adjustment did not "
                             f"fit: {message}")
            done[id(m)] = got
        out[k] = done[id(m)]
    return out, notes


def _fine_gray_near(X: np.ndarray, rows: np.ndarray, sample: Outcome, full: Outcome,
                    start: np.ndarray) -> tuple[np.ndarray | None, Any]:
    """A replicate's Fine–Gray coefficients and Breslow baseline (at covariates 0) as
    :func:`unbin.models.competing.fit_fine_gray` gives them, without its sandwich variance,
    which the replicate does not need: secant steps from ``start`` that begin with the full
    sample ``full``'s information (its design ``X``; the replicate's rows ``rows``, its
    outcome ``sample``; :func:`unbin.models.competing.fine_gray_replicate`)."""
    return fine_gray_replicate(X, rows, sample, full, start)


class _Evaluator:
    """What each quantity is in one evaluation: the models' coefficients, the rows they were
    fitted on and the rows they are judged on."""

    def __init__(self, r: Refit, models: dict[tuple[str, str], Model], pt: np.ndarray,
                 horizon: float | None):
        self.r, self.models, self.pt, self.horizon = r, models, pt, horizon
        self.keys = list(models)
        # competing events: the risks are the Fine–Gray models' (fine_gray_risks), not the
        # cause-specific models', whose maximum likelihood does not make the slope 1
        self.competing = r.family == "survival" and r.outcome.cause is not None
        self.rules = legacy_rules(r.legacy, r.x)[:1]
        # per curve model (by identity), its exposure columns at every sample row: the same
        # in every replicate (the knots stay the full sample's), made once
        self._basis_x: dict[int, np.ndarray] = {}
        # the risks of the last predictors (by identity, holding them): a replicate's model
        # is judged on its drawn rows and on the full sample from the same z
        self._risks: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        # binary: the full sample's outcomes as bool (the C indices' events), made once
        self._event: np.ndarray | None = None
        # binary: the risk rules' net benefits on the full sample of the last replicate
        # predictors (by identity, holding them), made with those on the drawn rows
        self._full_rules: dict[int, tuple[np.ndarray, np.ndarray]] = {}

    def z_of(self, k: tuple[str, str], coef: np.ndarray, fit: _Sample) -> np.ndarray | None:
        """Every row's linear predictor on the risk's link scale (log odds; survival the log
        cumulative hazard at the horizon, baseline from the fitting rows ``fit``)."""
        X = self.models[k].X
        if self.r.family == "binary":
            return np.asarray(coef[0] + X @ coef[1:])
        assert self.horizon is not None
        lp = X @ coef
        if fit.base is not None and fit.w is None:
            # a replicate's drawn rows as draw counts on the sample's rows: the baseline at
            # the horizon on the sample's event times (DrawnHorizon), no gather or sort
            counts = fit.float_counts(self.r.outcome.n)
            centre = float(counts @ lp) / fit.idx.size
            at_h = fit.base.drawn_horizon()
            with np.errstate(divide="ignore"):
                log_h0 = at_h.per_row(np.log(at_h.cumhaz(lp - centre, counts)))
        else:
            log_h0, centre = _log_base(fit, lp[fit.idx], self.horizon,
                                       self.r.outcome.strata, self.r.outcome.n)
        z = log_h0 + lp - centre
        return z if np.all(np.isfinite(z)) else None

    def predictors(self, coef_by: dict[tuple[str, str], np.ndarray], fit: _Sample,
                   ) -> dict[int, np.ndarray | None]:
        """z of every distinct model (by identity) fitted on ``fit``'s rows."""
        out: dict[int, np.ndarray | None] = {}
        for k in self.keys:
            if id(self.models[k]) not in out:
                c = coef_by[k]
                out[id(self.models[k])] = (self.z_of(k, c, fit) if np.all(np.isfinite(c))
                                           else None)
        return out

    def risk(self, z: np.ndarray) -> np.ndarray:
        return (np.asarray(special.expit(z)) if self.r.family == "binary"
                else np.asarray(-np.expm1(-np.exp(z))))

    def risk_of(self, z: np.ndarray) -> np.ndarray:
        """:meth:`risk` of a predictor, kept for the last few predictors (the same array)."""
        hit = self._risks.get(id(z))
        if hit is not None and hit[0] is z:
            return hit[1]
        if len(self._risks) >= len(RISK_MODELS):
            del self._risks[next(iter(self._risks))]
        out = self.risk(z)
        self._risks[id(z)] = (z, out)
        return out

    def replicate_c(self, zs: dict[int, np.ndarray | None], drawn: _Sample, full: _Sample,
                    ) -> tuple[dict[int, float], dict[int, float]] | None:
        """Harrell's C (binary: the AUC) of every model of a replicate in its drawn data set
        and in the full sample at once (without weights; else None): the drawn rows are the
        full sample's rows repeated as drawn, so one sort by score serves both, with the
        drawn rows as draw counts (survival: and one time order, the full sample's,
        :func:`unbin.models.cox.concordance.concordances`; binary:
        :func:`unbin.models.discrimination.drawn_aucs`), the same numbers as the C index of
        the repeated rows. Scores are compared as the point estimate compares them: rounded
        to ``SCORE_DECIMALS`` decimals (:func:`unbin.models.discrimination.compared_score`),
        so rows whose scores agree to that many decimals tie here as there."""
        if drawn.w is not None or full.w is not None:
            return None
        counts = drawn.row_counts(self.r.outcome.n)
        in_drawn: dict[int, float] = {}
        in_full: dict[int, float] = {}
        if self.r.family == "binary":  # one call per model (drawn_aucs), the pair_auc values
            if self._event is None:
                self._event = np.asarray(full.y) > 0
            for key, z in zs.items():
                got = None if z is None else drawn_aucs(self._event, full.rows_of(z), counts)
                if got is not None:
                    in_drawn[key], in_full[key] = got
            return in_drawn, in_full
        # one call for all the replicate's models: the counts' time order and pairs are
        # made once, and the work arrays go with the call
        keys = [key for key, z in zs.items() if z is not None]
        got_all = scores_concordances(full.time_order(),
                                      (compared_score(full.rows_of(z)) for key, z in zs.items()
                                       if z is not None), [counts, None])
        for key, (d, f) in zip(keys, got_all, strict=True):
            in_drawn[key], in_full[key] = d, f
        return in_drawn, in_full

    def measures(self, coef_by: dict[tuple[str, str], np.ndarray],
                 zs: dict[int, np.ndarray | None], fit: _Sample, on: _Sample,
                 apparent_run: bool = False,
                 risks: dict[tuple[str, str], RiskZ] | None = None,
                 implied: bool = True, c_of: dict[int, float] | None = None,
                 ) -> dict[tuple[Any, ...], float]:
        """Every quantity of the models with coefficients ``coef_by`` (fitted on ``fit``)
        judged on ``on``'s rows; ``risks`` (competing events) the risk models' Fine–Gray
        coefficients and z fitted on the same rows (:func:`fine_gray_risks`). The implied
        thresholds (which depend on ``fit`` only) are left out when ``implied`` is false.
        ``c_of``: the models' C indices on ``on`` when already known (:meth:`replicate_c`)."""
        out: dict[tuple[Any, ...], float] = {}
        cixs: dict[int, float] = dict(c_of) if c_of is not None else {}
        for k in self.keys:
            z = zs[id(self.models[k])]
            if z is not None:
                if id(self.models[k]) not in cixs:
                    cixs[id(self.models[k])] = on.c_index(on.rows_of(z))
                out[("C index", k)] = cixs[id(self.models[k])]
            if k not in RISK_MODELS:
                continue
            risk = (risks.get(k) if risks is not None
                    else None if z is None else (coef_by[k], z))
            if risk is None:
                continue
            self._risk_measures(out, k, risk[1], fit, on, apparent_run)
            if implied and k in CURVE_MODELS:
                self._crossings(out, k, risk[0], risk[1], fit)
        for coding in CODINGS:
            s = out.get(("C index", ("spline", coding)))
            g = out.get(("C index", ("legacy", coding)))
            if s is not None and g is not None:
                out[("delta C", coding)] = s - g
        self._fixed_rules(out, on)
        return out

    def _risk_measures(self, out: dict[tuple[Any, ...], float], k: tuple[str, str],
                       z: np.ndarray, fit: _Sample, on: _Sample, apparent_run: bool) -> None:
        """Net benefit of the model's risk rule and its calibration slope on ``on``; ``z``
        the model's z of every sample row."""
        pt = self.pt
        if self.r.family == "binary" and on.w is None and pt.size:
            # on the sample's rows with ``on``'s draw counts: no repeated rows to form
            nb = self._binary_rules(z, on)
            zo = None
        elif on.base is not None and on.w is None and pt.size:
            # on the sample's rows with ``on``'s draw counts (as for binary outcomes)
            nb = on.net_benefit_of_rows(pt, risk=self.risk_of(z))
            zo = None
        else:
            zo = on.rows_of(z)
            # the whole sample (zo is z): the risks the drawn rows' reading made (risk_of)
            risk = self.risk_of(z) if zo is z else self.risk(zo)
            nb = on.net_benefit(pt, risk=risk) if pt.size else np.zeros(0)
        for t, v in zip(pt, nb, strict=True):
            out[("net benefit", f"risk: {k[0]}", t)] = float(v)
        # in the sample the model was fitted to, the slope is 1 (maximum likelihood)
        # (not for the Fine–Gray risks under competing events: the slope is the
        # cause-specific Cox model's on their z, as in the calibration table)
        out[("calibration slope", k)] = (1.0 if on is fit and not apparent_run
                                         and not self.competing
                                         else on.slope(on.rows_of(z) if zo is None else zo))

    def _binary_rules(self, z: np.ndarray, on: _Sample) -> np.ndarray:
        """The net benefits of a logistic model's risk rule (log odds ``z`` of every sample
        row) on ``on``'s rows as draw counts. A replicate's drawn rows are read first, and
        with them the full sample's (one pass, :func:`unbin.questions.net_benefit.
        logistic_rules_drawn_and_full`), kept for the replicate's reading on the full sample
        (the same array ``z``)."""
        n = self.r.outcome.n
        if self._event is None:
            self._event = np.asarray(self.r.outcome.y) > 0
        if on._whole:
            hit = self._full_rules.pop(id(z), None)
            if hit is not None and hit[0] is z:
                return hit[1]
            return net_benefit_risk(self._event, self.risk_of(z), self.pt,
                                    on.row_counts(n))[0]
        drawn, whole = logistic_rules_drawn_and_full(self._event, z, self.pt,
                                                     on.row_counts(n))
        if len(self._full_rules) >= 2 * len(RISK_MODELS):  # a replicate's at most
            del self._full_rules[next(iter(self._full_rules))]
        self._full_rules[id(z)] = (z, whole)
        return drawn

    def _crossings(self, out: dict[tuple[Any, ...], float], k: tuple[str, str],
                   c: np.ndarray, z: np.ndarray, fit: _Sample) -> None:
        """The implied thresholds of the model's curve at the median risk profile of ``fit``."""
        from .thresholds import crossings  # scipy.optimize: imported by the jobs that need it

        r = self.r
        mdl = self.models[k]
        f = _curve(mdl, c, r.family)
        basis = self._basis_x.get(id(mdl))
        if basis is None:
            basis = self._basis_x[id(mdl)] = _exposure_basis(mdl, r.x)
        lo = 1 if r.family == "binary" else 0
        rest = _median_of_rows(z - np.asarray(basis @ c[lo:lo + mdl.k], dtype=float), fit,
                               r.outcome.n)
        lo_x, hi_x = float(r.x.min()), float(r.x.max())
        for t in self.pt:
            found, _ = crossings(f, lo_x, hi_x, float(link(r.family, t)) - rest)
            out[("crossings", k, t)] = float(len(found))
            for j, (xv, _d) in enumerate(found, start=1):
                out[("implied threshold", k, t, j)] = xv

    def _fixed_rules(self, out: dict[tuple[Any, ...], float], on: _Sample) -> None:
        """Net benefit of the rules that are not fitted: the legacy cut and treat all (the
        same on the same rows in every evaluation: computed once per sample)."""
        if on.fixed_rules is None:
            pt = self.pt
            fixed: dict[tuple[Any, ...], float] = {}
            for name, mask in self.rules:
                for t, v in zip(pt, on.net_benefit_of_rows(pt, positive=mask), strict=True):
                    fixed[("net benefit", name, t)] = float(v)
            everyone = np.ones(self.r.outcome.n, dtype=bool)
            for t, v in zip(pt, on.net_benefit_of_rows(pt, positive=everyone), strict=True):
                fixed[("net benefit", "treat all", t)] = float(v)
            on.fixed_rules = fixed
        out.update(on.fixed_rules)


def _median_of_rows(v: np.ndarray, on: _Sample, n: int) -> float:
    """``np.median(v[on.idx])`` (``v`` one value per row of the analysis sample), the same
    number: from ``MIDDLE_FROM_ROWS`` rows the middle values of ``v`` with ``on``'s draw counts
    (``unbin.models.compiled.weighted_median``: no gather, no partition), the mean of the two
    for an even count as numpy takes it."""
    total = on.idx.size
    if total and wanted(n, MIDDLE_FROM_ROWS):
        from ..models.compiled.weighted_median import middle_pair

        half = total // 2
        status, a, b = middle_pair(np.ascontiguousarray(v, dtype=float), on.row_counts(n),
                                   half - 1 if total % 2 == 0 else half, half)
        if status == 1:
            return float("nan")
        if status == 0:
            return float(b if total % 2 else (a + b) / 2)
    return float(np.median(v[on.idx]))


# From this many rows :func:`_median_of_rows` is one compiled selection (DEVELOPERS.md,
# "Compiled kernels").
MIDDLE_FROM_ROWS = 50_000


def _row_labels(key: tuple[Any, ...], est: float, q01: float, q99: float) -> dict[str, Any]:
    """The columns that say which quantity a row is (model, adjustment, rule, threshold...)."""
    kind = key[0]
    if kind in ("C index", "calibration slope"):
        return {"model": key[1][0], "adjustment": key[1][1]}
    if kind == "delta C":
        return {"model": "spline - legacy", "adjustment": key[1]}
    if kind == "net benefit":
        out: dict[str, Any] = {"rule": key[1], "threshold": key[2]}
        if key[1].startswith("risk: "):
            mk = next(k for k in RISK_MODELS if key[1] == f"risk: {k[0]}")
            out.update(model=mk[0], adjustment=mk[1])
        return out
    k, t, j = key[1], key[2], key[3]  # implied threshold
    return {"model": k[0], "adjustment": k[1], "threshold": t, "crossing": j,
            "exposure_p01": q01, "exposure_p99": q99,
            "beyond_central_range": float(not q01 <= est <= q99)}


def _row_interval(row: dict[str, Any], key: tuple[Any, ...], est: float,
                  apparent: dict[tuple[Any, ...], float], boot: list[dict[tuple[Any, ...], float]],
                  test: list[dict[tuple[Any, ...], float]], B: int,
                  slope_is_one: bool = True) -> None:
    """The row's percentile interval, optimism and replicate counts (module docstring)."""
    kind = key[0]
    if kind == "implied threshold":
        n_full = apparent[("crossings", key[1], key[2])]
        same = [bt.get(key, np.nan) for bt in boot
                if bt.get(("crossings", key[1], key[2])) == n_full]
        vals = np.asarray(same, dtype=float)
        row["replicates_matched"] = int(np.isfinite(vals).sum())
        row["lower"], row["upper"] = _percentiles(vals)
        row["computed_by"] = "percentile bootstrap over replicates with as many crossings"
    else:
        vals = np.asarray([bt.get(key, np.nan) for bt in boot], dtype=float)
        row["lower"], row["upper"] = _percentiles(vals)
        diffs = np.asarray([bt.get(key, np.nan) - tt.get(key, np.nan)
                            for bt, tt in zip(boot, test, strict=True)], dtype=float)
        ok = np.isfinite(diffs)
        opt = float(diffs[ok].mean()) if ok.any() else float("nan")
        if kind == "net benefit" and not str(row["rule"]).startswith("risk: "):
            opt = 0.0  # a fixed rule (treat all, the legacy cut) is not fitted
        if kind == "calibration slope" and slope_is_one:  # 1 in every bootstrap sample
            row["lower"] = row["upper"] = float("nan")
        row.update(apparent=est, optimism=opt, corrected=est - opt)
        row["computed_by"] = "percentile bootstrap; Harrell's optimism correction"
        vals = diffs
    row["bootstrap_ok"] = int(np.isfinite(vals).sum())
    row["bootstrap_failed"] = B - row["bootstrap_ok"]


def decision_resampling_table(r: Refit, spec: Spec, replicates: int | None = None,
                              purpose: str = PURPOSE, fixed: dict[str, Any] | None = None,
                              collect: dict[str, Any] | None = None) -> pd.DataFrame:
    """Bootstrap intervals and optimism-corrected values of C, net benefit and thresholds.

    For an imputed set (``unbin.pipeline.imputed``): ``replicates`` of them drawn from
    ``spec.rng(analysis, purpose)``, the first set's choices ``fixed`` (:func:`fitted_models`),
    and ``collect`` receives the apparent values and each replicate's (to be pooled)."""
    a = r.analysis
    horizon = horizon_for(a, spec) if r.family == "survival" else None
    base: dict[str, Any] = {"risk_scale": risk_scale(a, spec).label, "horizon": horizon}
    B = spec.resampling.bootstrap if replicates is None else replicates
    skip = _skip_reason(r, spec, horizon)
    if skip is not None:
        return _finish([{**base, "status": "skipped", "reason": skip}])
    models, notes = fitted_models(r, spec, fixed)
    n = r.outcome.n
    rng = spec.rng(a.name, purpose)
    # binary: every replicate at once (vectorised); survival: one replicate at a time, whose
    # refits lay out its drawn rows once for all of its numbers, its weights drawn when it
    # comes (no replicates x rows array)
    drawn_all = (design_resample_replicates(rng, r.outcome, B) if r.family == "binary"
                 else None)  # compact: draw counts as small integers
    W = (drawn_all.rows() if drawn_all is not None
         else _replicate_weights(rng, r.outcome, B))
    coefs = _replicate_coefs(r, models, drawn_all) if drawn_all is not None else None
    ev = _Evaluator(r, models, np.asarray(thresholds_for(a, spec), dtype=float), horizon)
    full = _Sample(r, np.arange(n), horizon)
    own = {k: models[k].res.coef for k in ev.keys}
    risks: dict[tuple[str, str], RiskZ] | None = None
    if ev.competing:
        assert horizon is not None
        risks, fg_notes = fine_gray_risks(r, models, horizon)
        notes += fg_notes
    apparent = ev.measures(own, ev.predictors(own, full), full, full, apparent_run=True,
                           risks=risks)
    boot: list[dict[tuple[Any, ...], float]] = []
    test: list[dict[tuple[Any, ...], float]] = []
    for b, w_b in enumerate(W):
        rows_b, weights_b = replicate_rows(r.outcome, w_b)
        layouts: dict[int, Any] = {}
        if coefs is None:
            cb = {k: c[0] for k, c in _replicate_coefs(r, models, w_b[None, :], layouts).items()}
        else:
            cb = {k: coefs[k][b] for k in ev.keys}
        drawn = _Sample(r, rows_b, horizon, weights_b, layouts.get(0),
                        full if weights_b is None and r.family == "survival" else None)
        zs = ev.predictors(cb, drawn)
        risks_b = None
        if ev.competing:  # the Fine–Gray models refitted on the drawn rows
            assert horizon is not None
            risks_b = fine_gray_risks(r, models, horizon, rows_b, weights_b, risks)[0]
        both = ev.replicate_c(zs, drawn, full)
        boot.append(ev.measures(cb, zs, drawn, drawn, risks=risks_b,
                                c_of=None if both is None else both[0]))
        # the implied thresholds read the fitting rows only: the same as in ``boot``
        test.append(ev.measures(cb, zs, drawn, full, risks=risks_b, implied=False,
                                c_of=None if both is None else both[1]))
        # the replicate's rows, layout and predictors go before the next one's refits
        del rows_b, weights_b, layouts, drawn, zs, risks_b, both, w_b
    q01, q99 = (float(v) for v in np.quantile(r.x, [0.01, 0.99]))
    if collect is not None:
        collect.update(apparent=apparent, boot=boot, test=test, notes=notes, base=base)
    rows: list[dict[str, Any]] = []
    note = " | ".join(notes)
    for key, est in apparent.items():
        if key[0] == "crossings":
            continue
        row: dict[str, Any] = {**base, "quantity": key[0], "estimate": est, "status": "ok",
                               "reason": "", "note": note}
        row.update(_row_labels(key, est, q01, q99))
        _row_interval(row, key, est, apparent, boot, test, B, slope_is_one=not ev.competing)
        rows.append(row)
    if not rows:
        rows.append({**base, "status": "failed", "reason": note or "no model could be fitted"})
    return _finish(rows)


def _finish(rows: list[dict[str, Any]]) -> pd.DataFrame:
    """The rows in :data:`COLUMNS` order with the caution, text as str, counts as Int64."""
    return typed_table(rows, COLUMNS, TEXT, COUNTS, ("beyond_central_range",))
