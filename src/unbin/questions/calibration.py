"""Calibration of every risk model the decision questions use, one table per analysis
(``calibration``).

For each model of :func:`unbin.questions.decisions.decision_models` (the legacy groups with
legacy adjustment; linear, spline and fractional polynomial with continuous adjustment; the
spline x level model) the predicted risk of every sample row comes from
:mod:`unbin.refit.risk` (``RiskFit.risk``), and the table gives the levels of the calibration
hierarchy (Van Calster et al. 2016, J Clin Epidemiol 74:167):

- ``row_kind = "intercept"`` (calibration-in-the-large). Binary: the intercept ``a`` of the
  logistic model ``logit P(y) = a + logit(p)`` (the predicted log odds as offset; 0 when the
  mean predicted risk equals the observed one). Survival at the horizon ``h``: ``log(O/E)``,
  the intercept of a Poisson model of the events up to ``h`` with the expected numbers as offset
  (Crowson, Atkinson & Therneau 2016, Stat Methods Med Res 25:1692): ``E_i`` is the row's
  predicted cumulative hazard at ``h``, ``-log(1 - p_i)``, spread over its follow-up up to ``h``
  (after delayed entry) in the shape of the Breslow baseline of the predictions
  (:func:`survival_expected`; for a Cox model's own predictions O = E exactly).
- ``row_kind = "slope"`` (Cox 1958, Biometrika 45:562). Binary: ``b`` in
  ``logit P(y) = a + b logit(p)``. Survival: the coefficient of a Cox model (same strata and
  delayed entry) on ``log(-log(1 - p))``, the log cumulative hazard at the horizon. 1 is ideal;
  below 1 the predictions are too extreme.
- ``row_kind = "tenth"``: the rows in tenths of predicted risk (tied risks stay together, so a
  model with few distinct risks has fewer groups): mean predicted risk beside the observed one,
  binary the share of events with Wilson's score interval, survival ``1 - S(h)`` by Kaplan-Meier
  (delayed entry honoured, strata ignored) with Greenwood's variance on the log(-log) scale.
  A tenth whose event count is withheld by small-cell suppression (complementary rule,
  :mod:`unbin.questions.disclosure`) has its observed risk and counts withheld.
- ``row_kind = "smooth"``: a flexible calibration curve at :data:`SMOOTH_POINTS` predicted
  risks between the 1st and 99th percentile of the predictions: binary, a logistic model of
  ``y`` on a restricted cubic spline (:data:`SMOOTH_KNOTS` knots) of ``logit(p)``; survival, a
  Cox model on a spline of ``log(-log(1 - p))`` read at the horizon through its Breslow baseline
  (Austin, Harrell & van Klaveren 2020, Stat Med 39:2714; strata ignored). Pointwise 95%
  limits by the delta method (survival: the baseline held fixed). Not drawn for fewer than
  :data:`SMOOTH_MIN_DISTINCT` distinct predicted risks (the legacy groups: tenths only).

The models are judged on the rows they were fitted to: maximum likelihood makes the apparent
intercept 0 and slope 1 for every model with its own intercept or baseline, so those two rows
say only that the fit converged; the resampling table ``decision_resampling`` gives the
optimism-corrected slope (Harrell, Lee & Mark 1996). The tenths and the smooth curve show where
a form misses the risk locally. Count and continuous outcomes have no event probability: one
row says so. Sampling weights and clusters are not used here (unweighted rows).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd
from scipy import special

from ..models import Outcome, fit
from ..models.cox import Layout, baseline_cumhaz
from ..models.survival import cox_layout
from ..refit.analysis import Refit
from ..refit.contrasts import Z95
from ..refit.risk import RiskFit, link
from ..spec import Spec
from ..terms import SplineTerm
from . import disclosure
from .decisions import EVENT_FAMILIES, decision_models, design_not_used, typed_table
from .net_benefit import TimeOrder

TENTHS = 10
SMOOTH_POINTS = 25
SMOOTH_KNOTS = 3
SMOOTH_MIN_DISTINCT = 5  # fewer distinct predicted risks (the legacy groups): tenths only
APPARENT = ("apparent: judged on the rows the model was fitted to (intercept 0 and slope 1 by "
            "construction); see decision_resampling for the optimism-corrected slope")

COLUMNS = ("model", "adjustment", "detail", "row_kind", "group", "n_rows", "events",
           "mean_predicted", "observed", "observed_lower", "observed_upper", "estimate",
           "lower", "upper", "risk_scale", "horizon", "computed_by", "status", "reason", "note",
           "caution")


# --------------------------------------------------------------------------- building blocks


def wilson_interval(events: np.ndarray, n: np.ndarray, z: float = Z95,
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Wilson's (1927) score interval for a binomial proportion, element-wise."""
    e, m = np.asarray(events, dtype=float), np.asarray(n, dtype=float)
    p = e / m
    centre = (p + z * z / (2 * m)) / (1 + z * z / m)
    half = z * np.sqrt(p * (1 - p) / m + z * z / (4 * m * m)) / (1 + z * z / m)
    return centre - half, centre + half


def km_risk(time: np.ndarray, event: np.ndarray, horizon: float,
            entry: np.ndarray | None = None, z: float = Z95) -> tuple[float, float, float]:
    """Kaplan-Meier risk ``1 - S(horizon)`` with its 95% limits: Greenwood's variance on the
    log(-log S) scale (Kalbfleisch & Prentice 2002). Limits are NaN when S is 0 or 1."""
    t = np.asarray(time, dtype=float)
    e = np.asarray(event, dtype=float) > 0
    if t.size == 0:
        return float("nan"), float("nan"), float("nan")
    u, d = np.unique(t[e & (t <= horizon)], return_counts=True)
    if u.size == 0:
        return 0.0, float("nan"), float("nan")
    exited = np.searchsorted(np.sort(t), u, side="left")
    entered = (np.full(u.size, t.size) if entry is None else
               np.searchsorted(np.sort(np.asarray(entry, dtype=float)), u, side="left"))
    return _km_risk_limits(d, entered - exited, z)


def _km_risk_limits(d: np.ndarray, at_risk: np.ndarray, z: float = Z95,
                    ) -> tuple[float, float, float]:
    """:func:`km_risk` from the event and at-risk counts at the event times up to the
    horizon (at least one)."""
    at_risk = at_risk.astype(float)
    s = float(np.prod(1.0 - d / at_risk))
    if s <= 0.0 or s >= 1.0:
        return 1.0 - s, float("nan"), float("nan")
    with np.errstate(divide="ignore"):
        green = float(np.sum(d / (at_risk * (at_risk - d))))
    se = np.sqrt(green) / abs(np.log(s))
    lo_s, hi_s = s ** np.exp(z * se), s ** np.exp(-z * se)
    return 1.0 - s, 1.0 - hi_s, 1.0 - lo_s


def km_risk_of(order: TimeOrder, inside: np.ndarray, horizon: float,
               z: float = Z95) -> tuple[float, float, float]:
    """:func:`km_risk` of the rows ``inside`` (a row mask) of the sample sorted in ``order``
    (the same numbers, without sorting the subset)."""
    by_time, by_entry = order.in_order(np.asarray(inside, dtype=bool))
    if not by_time.any():
        return float("nan"), float("nan"), float("nan")
    d, at_risk = order.steps(horizon, by_time, by_entry)
    if d.size == 0:
        return 0.0, float("nan"), float("nan")
    return _km_risk_limits(d, at_risk, z)


def risk_groups(pred: np.ndarray, groups: int = TENTHS) -> np.ndarray:
    """Group codes 0.. of the rows by quantiles of predicted risk; tied risks share a group."""
    p = np.asarray(pred, dtype=float)
    edges = np.unique(np.quantile(p, np.linspace(0, 1, groups + 1)[1:-1]))
    return np.searchsorted(edges, p, side="right")


def logistic_intercept(y: np.ndarray, lp: np.ndarray) -> tuple[float, float]:
    """Calibration-in-the-large, binary: ``a`` in logit P(y) = a + lp (lp as offset), by
    Newton's method, with its standard error from the information."""
    y = np.asarray(y, dtype=float)
    a = 0.0
    for _ in range(100):
        mu = special.expit(a + lp)
        info = float(np.sum(mu * (1 - mu)))
        step = float(np.sum(y - mu)) / info
        a += step
        if abs(step) < 1e-12:
            break
    mu = special.expit(a + lp)
    return a, float(1.0 / np.sqrt(np.sum(mu * (1 - mu))))


def survival_expected(z: np.ndarray, time: np.ndarray, event: np.ndarray,
                      entry: np.ndarray | None, strata: np.ndarray | None,
                      horizon: float, layout: Layout | None = None) -> np.ndarray:
    """Each row's expected events up to the horizon under the predictions ``z`` (the log
    cumulative hazard at the horizon, ``log(-log(1 - p))``): ``exp(z_i)`` spread over time in
    the shape of the Breslow baseline of ``z`` in the row's stratum, ``exp(z_i) (B(min(t_i, h)) -
    B(entry_i)) / B(h)``. The shape is estimated; the level is the prediction's own, so a risk
    predicted too high gives O/E below 1 (for a Cox model's own predictions O = E).
    ``layout``: the Cox layout of these times, events, entries and strata (no weights), when
    the caller has it (the same baseline, without preparing it again)."""
    centre = float(np.mean(z))
    base = baseline_cumhaz((z - centre)[:, None], time, event, [1.0], entry=entry, strata=strata,
                           layout=layout)
    labels = np.zeros(len(z), dtype=np.int64) if strata is None else np.asarray(strata)
    stop = np.minimum(time, horizon)
    out = np.zeros(len(z))
    for lab, part in base.groupby("stratum", sort=True):
        tt = part["time"].to_numpy(float)
        ch = np.concatenate([[0.0], part["cumhaz"].to_numpy(float)])
        at_h = ch[np.searchsorted(tt, horizon, side="right")]
        rows = labels == lab
        if at_h <= 0:
            continue
        share = ch[np.searchsorted(tt, stop[rows], side="right")]
        if entry is not None:
            share = share - ch[np.searchsorted(tt, entry[rows], side="right")]
        out[rows] = np.exp(z[rows]) * np.maximum(share, 0.0) / at_h
    return out


def oe_intercept(z: np.ndarray, time: np.ndarray, event: np.ndarray, entry: np.ndarray | None,
                 strata: np.ndarray | None, horizon: float,
                 layout: Layout | None = None) -> tuple[float, float]:
    """Calibration-in-the-large at the horizon: log(O/E) (the intercept of a Poisson model of
    the events up to the horizon with log expected events as offset) and its SE 1/sqrt(O)."""
    expected = float(np.sum(survival_expected(z, time, event, entry, strata, horizon, layout)))
    observed = float(np.sum(np.asarray(event, dtype=float)[np.asarray(time) <= horizon]))
    if observed <= 0 or expected <= 0:
        return float("nan"), float("nan")
    return float(np.log(observed / expected)), float(1.0 / np.sqrt(observed))


def _spline(lp: np.ndarray) -> SplineTerm | None:
    try:
        return SplineTerm.at_quantiles("lp", lp, SMOOTH_KNOTS)
    except ValueError:
        return None


def smooth_binary(y: np.ndarray, pred: np.ndarray, grid: np.ndarray,
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Observed risk at the predicted risks ``grid`` from a logistic model of y on a
    restricted cubic spline of logit(p), with pointwise 95% limits (delta method)."""
    lp = link("binary", np.clip(pred, 1e-12, 1 - 1e-12))
    term = _spline(lp)
    if term is None:
        nan = np.full(grid.shape, np.nan)
        return nan, nan, nan
    X = np.asarray(term.basis(lp), dtype=float)
    res = fit("binary", X, Outcome("binary", np.asarray(y, dtype=float)), term.names())
    if not res.ok:
        nan = np.full(grid.shape, np.nan)
        return nan, nan, nan
    G = np.column_stack([np.ones(len(grid)),
                         term.basis(link("binary", grid))])
    eta = G @ res.coef
    se = np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", G, res.cov, G), 0.0))
    return special.expit(eta), special.expit(eta - Z95 * se), special.expit(eta + Z95 * se)


def smooth_survival(rf: RiskFit, outcome: Outcome, grid: np.ndarray, horizon: float,
                    shared: dict[str, Outcome] | None = None,
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Observed risk by the horizon at the predicted risks ``grid`` from a Cox model on a
    restricted cubic spline of log(-log(1 - p)), read through its Breslow baseline (strata
    ignored, as in the tenths' Kaplan-Meier); 95% limits by the delta method with the baseline
    fixed."""
    assert outcome.time is not None
    z = rf.exposure_rows + rf.rest
    nan = np.full(grid.shape, np.nan)
    term = _spline(z)
    if term is None:
        return nan, nan, nan
    X = np.asarray(term.basis(z), dtype=float)
    o = _derived(shared, "unstratified", lambda: Outcome(
        "survival", outcome.y, time=outcome.time, entry=outcome.entry))
    res = fit("survival", X, o, term.names())
    if not res.ok:
        return nan, nan, nan
    Xc = X - X.mean(axis=0)
    base = baseline_cumhaz(Xc, outcome.time, outcome.y, res.coef, entry=outcome.entry,
                           strata=None, layout=cox_layout(o))  # the fit's own layout
    tt = base["time"].to_numpy(float)
    pos = int(np.searchsorted(tt, horizon, side="right")) - 1
    if pos < 0:
        return nan, nan, nan
    h0 = float(base["cumhaz"].to_numpy(float)[pos])
    G = np.asarray(term.basis(link("survival", np.clip(grid, 1e-12, 1 - 1e-12))),
                   dtype=float) - X.mean(axis=0)
    eta = G @ res.coef
    se = np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", G, res.cov, G), 0.0))

    def risk(v: np.ndarray) -> np.ndarray:
        return np.asarray(-np.expm1(-h0 * np.exp(v)))

    return risk(eta), risk(eta - Z95 * se), risk(eta + Z95 * se)


# --------------------------------------------------------------------------- one model


def _derived(shared: dict[str, Outcome] | None, key: str,
             make: Callable[[], Outcome]) -> Outcome:
    """An outcome derived from the analysis' one, made once per table when ``shared`` is
    given: its cache (the Cox layout: sort order, risk sets) then serves every model."""
    if shared is None:
        return make()
    if key not in shared:
        shared[key] = make()
    return shared[key]


def _intercept_and_slope(rf: RiskFit, outcome: Outcome, pred: np.ndarray, y: np.ndarray,
                         z: np.ndarray | None, common: dict[str, Any],
                         shared: dict[str, Outcome] | None = None) -> list[dict[str, Any]]:
    """The calibration intercept and slope rows (``z``: survival's log(-log(1 - p)))."""
    h = rf.scale.horizon
    if z is not None:
        assert outcome.time is not None and h is not None
        o = _derived(shared, "stratified", lambda: Outcome(
            "survival", y, time=outcome.time, entry=outcome.entry, strata=outcome.strata))
        # the expected events' baseline and the slope's fit share that outcome's layout
        a, se_a = oe_intercept(z, outcome.time, y, outcome.entry, outcome.strata, h,
                               cox_layout(o))
        by = f"log(O/E), Poisson with expected events up to {h:g}"
        res = fit("survival", z[:, None], o, ("cloglog_risk",))
        method = "Cox model on log(-log(1 - p))"
        slope_i = 0
    else:
        lp = np.asarray(link("binary", np.clip(pred, 1e-12, 1 - 1e-12)))
        a, se_a = logistic_intercept(y, lp)
        by = "logistic, logit(p) as offset"
        res = fit("binary", lp[:, None], Outcome("binary", y), ("logit_risk",))
        method = "logistic on logit(p)"
        slope_i = 1
    rows = [{**common, "row_kind": "intercept", "estimate": a, "lower": a - Z95 * se_a,
             "upper": a + Z95 * se_a, "computed_by": by}]
    if res.ok:
        b, se_b = float(res.coef[slope_i]), float(np.sqrt(res.cov[slope_i, slope_i]))
        rows.append({**common, "row_kind": "slope", "estimate": b, "lower": b - Z95 * se_b,
                     "upper": b + Z95 * se_b, "computed_by": method})
    else:
        rows.append({**common, "row_kind": "slope", "computed_by": method, "status": "failed",
                     "reason": res.message})
    return rows


def _tenth_rows(pred: np.ndarray, y: np.ndarray, outcome: Outcome, h: float | None,
                survival: bool, min_cell: int, common: dict[str, Any],
                order: TimeOrder | None = None) -> list[dict[str, Any]]:
    """Observed against mean predicted risk in tenths of predicted risk, small cells withheld.
    ``order``: the sample's rows in time order, shared by every model's tenths."""
    time, entry = outcome.time, outcome.entry
    codes = risk_groups(pred)
    groups = np.unique(codes)
    n_g = np.array([int(np.sum(codes == g)) for g in groups])
    if survival:
        assert time is not None
        ev_g = np.array([int(np.sum(y[(codes == g) & (time <= h)])) for g in groups])
    else:
        ev_g = np.array([int(np.sum(y[codes == g])) for g in groups])
    shown = disclosure.complementary([int(v) for v in ev_g], min_cell)
    rows: list[dict[str, Any]] = []
    for k, g in enumerate(groups):
        inside = codes == g
        row = {**common, "row_kind": "tenth", "group": float(k + 1), "n_rows": n_g[k],
               "mean_predicted": float(np.mean(pred[inside]))}
        if shown[k] is None:
            rows.append({**row, "events": None, "note": common["note"] + " | observed withheld "
                         f"(small-cell suppression, min_cell {min_cell})"})
            continue
        if survival:
            assert h is not None and time is not None
            if order is None:
                order = TimeOrder(time, y, entry)
            obs, lo, hi = km_risk_of(order, inside, h)
            m = f"Kaplan-Meier at {h:g}, Greenwood log(-log) limits"
        else:
            obs = ev_g[k] / n_g[k]
            lo_a, hi_a = wilson_interval(np.array([ev_g[k]]), np.array([n_g[k]]))
            lo, hi = float(lo_a[0]), float(hi_a[0])
            m = "events/n, Wilson limits"
        rows.append({**row, "events": ev_g[k], "observed": obs, "observed_lower": lo,
                     "observed_upper": hi, "computed_by": m})
    return rows


def _smooth_rows(rf: RiskFit, outcome: Outcome, pred: np.ndarray, y: np.ndarray,
                 h: float | None, survival: bool, common: dict[str, Any],
                 shared: dict[str, Outcome] | None = None) -> list[dict[str, Any]]:
    """The flexible calibration curve between the 1st and 99th percentiles of predicted risk
    (none when too few distinct predictions)."""
    lo_p, hi_p = np.quantile(pred, [0.01, 0.99])
    if not (np.unique(pred).size >= SMOOTH_MIN_DISTINCT and hi_p > lo_p):
        return []
    grid = np.linspace(lo_p, hi_p, SMOOTH_POINTS)
    if survival:
        assert h is not None
        obs_s, lo_s, hi_s = smooth_survival(rf, outcome, grid, h, shared)
        m = f"Cox on a {SMOOTH_KNOTS}-knot spline of log(-log(1 - p)), at {h:g}"
    else:
        obs_s, lo_s, hi_s = smooth_binary(y, pred, grid)
        m = f"logistic on a {SMOOTH_KNOTS}-knot spline of logit(p)"
    return [{**common, "row_kind": "smooth", "group": float(k + 1), "mean_predicted": grid[k],
             "observed": obs_s[k], "observed_lower": lo_s[k], "observed_upper": hi_s[k],
             "computed_by": m} for k in range(len(grid))]


def calibration_rows(rf: RiskFit, outcome: Outcome, min_cell: int,
                     shared: dict[str, Outcome] | None = None,
                     order: TimeOrder | None = None) -> list[dict[str, Any]]:
    """Every calibration row of one model on the risk scale (module docstring). ``shared``
    keeps the outcomes derived from ``outcome`` for the next model of the same sample,
    ``order`` the sample's rows in time order (survival: made here when not given)."""
    pred = np.asarray(rf.risk, dtype=float)
    y = np.asarray(outcome.y, dtype=float)
    common = {"model": rf.model, "adjustment": rf.adjustment, "detail": rf.detail,
              "status": "ok", "reason": "",
              "note": " | ".join(v for v in (APPARENT, rf.note, design_not_used(outcome)) if v)}
    if not np.all(np.isfinite(pred)):
        return [{**common, "status": "failed",
                 "reason": "predicted risks are not finite for some rows"}]
    h = rf.scale.horizon
    survival = rf.family == "survival"
    z = None
    if survival:
        z = rf.exposure_rows + rf.rest
        if not np.all(np.isfinite(z)):
            return [{**common, "status": "failed",
                     "reason": "predicted risk 0 for some rows (no event before the horizon); "
                               "choose a later horizon"}]
    return (_intercept_and_slope(rf, outcome, pred, y, z, common, shared)
            + _tenth_rows(pred, y, outcome, h, survival, min_cell, common, order)
            + _smooth_rows(rf, outcome, pred, y, h, survival, common, shared))


def calibration_table(r: Refit, spec: Spec) -> pd.DataFrame:
    """Calibration of each decision model: intercept, slope, risk tenths and a flexible curve."""
    d = decision_models(r, spec)
    base: dict[str, Any] = {"risk_scale": d.scale.label, "horizon": d.scale.horizon}
    if r.family not in EVENT_FAMILIES:
        return _finish([{**base, "status": "skipped", "reason":
                         f"calibration of a risk needs the probability of an event (binary or "
                         f"survival outcome); a {r.family} outcome has none ({d.scale.label})"}])
    if d.reason:
        return _finish([{**base, "status": "skipped", "reason": d.reason}])
    rows: list[dict[str, Any]] = []
    for model, adjustment, message in d.failed:
        rows.append({**base, "model": model, "adjustment": adjustment, "status": "failed",
                     "reason": message})
    fits = ([d.legacy] if d.legacy is not None else []) + list(d.curves)
    shared: dict[str, Outcome] = {}  # every model's calibration fits share their layouts
    o = r.outcome  # and their tenths' Kaplan-Meier estimates one time order
    order = (TimeOrder(o.time, o.y, o.entry) if r.family == "survival" and o.time is not None
             else None)
    for rf in fits:
        try:
            rows += [{**base, **row} for row in calibration_rows(rf, r.outcome, spec.min_cell,
                                                                 shared, order)]
        except (ValueError, np.linalg.LinAlgError) as exc:
            rows.append({**base, "model": rf.model, "adjustment": rf.adjustment,
                         "status": "failed", "reason": f"calibration could not be computed: "
                                                       f"{exc}"})
    return _finish(rows)


TEXT = ("model", "adjustment", "detail", "row_kind", "risk_scale", "computed_by", "status",
        "reason", "note", "caution")
COUNTS = ("group", "n_rows", "events")


def _finish(rows: list[dict[str, Any]]) -> pd.DataFrame:
    """The rows in :data:`COLUMNS` order with the caution, text as str, counts as Int64."""
    return typed_table(rows, COLUMNS, TEXT, COUNTS, ())

