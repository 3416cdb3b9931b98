"""Absolute risk from any fitted model of an analysis.

Every family's prediction is an inverse link of one linear predictor ``z``:

- binary: the probability of the event, ``expit(z)`` with ``z = intercept + X b``;
- survival: the risk of the event by the horizon, ``1 - exp(-H0_s(h) exp(X b))``, i.e.
  ``1 - exp(-exp(z))`` with ``z = log H0_s(h) + X b`` (Breslow baseline of the row's stratum
  ``s`` from :func:`unbin.models.cox.baseline_cumhaz`, read as a step function at the horizon ``h``);
  with competing events (``outcome.competing``) the risk is the cumulative incidence of the
  event of interest by the horizon from the Fine–Gray model of the same design (same exposure
  form, same adjusters), ``1 - exp(-Lambda0_s(h) exp(X b))`` with the subdistribution
  hazard's coefficients and baseline (:mod:`unbin.models.competing`; Fine & Gray 1999), so
  ``z = log Lambda0_s(h) + X b`` with the Fine–Gray ``b``: the same inverse link, a different
  model. (One minus the cause-specific model's survival would overstate the risk: the
  competing events remove people before they can have the event of interest.)
- count: the expected number of events per one unit of person-time, ``exp(z)`` with
  ``z = intercept + X b`` (the log person-time offset left out);
- continuous: the predicted mean, ``z`` itself (a "threshold" is then one on the mean).

``z`` splits into the exposure's part ``f(x)`` (the exposure columns times their coefficients)
and the rest (intercept or log baseline, adjustment variables, the effect modifier's main
effect): ``z_i = f(x_i) + rest_i``. A :class:`RiskFit` keeps that split for every row of the
analysis sample, so the questions can hold the rest at a chosen value (a quantile of the
sample's rest) and move the exposure alone.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import special

from ..models.base import FitResult
from ..models.cox import baseline_cumhaz
from ..models.survival import cox_layout
from ..spec import Analysis, Spec
from .analysis import FormFit, Refit, with_predictor

# An exposure curve: the exposure's part of the linear predictor at exposure values ``x`` for the
# rows of one level (code) of the effect modifier; curves without a modifier ignore the level.
ExposureCurve = Callable[[np.ndarray, int], np.ndarray]


@dataclass(frozen=True)
class RiskScale:
    """What "risk" means for one analysis: the family, the horizon (survival) and a label that
    states the unit."""

    family: str
    label: str
    horizon: float | None = None


def horizon_for(a: Analysis, spec: Spec) -> float | None:
    """The analysis' horizon (``outcome.horizon``), else the study-level ``horizon``."""
    if a.outcome.horizon is not None:
        return float(a.outcome.horizon)
    return float(spec.horizon) if spec.horizon is not None else None


def _unit(spec: Spec, variable: str | None) -> str:
    info = spec.variables.get(variable or "")
    return info.unit if info is not None and info.unit else ""


def risk_scale(a: Analysis, spec: Spec) -> RiskScale:
    o = a.outcome
    if o.type == "binary":
        return RiskScale("binary", f"probability of {o.event}")
    if o.type == "survival":
        h = horizon_for(a, spec)
        when = " ".join(v for v in (f"{h:g}" if h is not None else "", _unit(spec, o.time)) if v)
        if o.has_competing:
            codes = ", ".join(str(c) for c in o.competing)
            return RiskScale("survival", f"cumulative incidence of {o.event} = "
                                         f"{o.event_of_interest} (competing: {codes}) by "
                                         f"{o.time} = {when or '(no horizon)'}", h)
        return RiskScale("survival", f"probability of {o.event} by {o.time} = "
                                     f"{when or '(no horizon)'}", h)
    if o.type == "count":
        unit = _unit(spec, o.persontime)
        return RiskScale("count", f"expected {o.count} per 1 unit of {o.persontime}"
                                  + (f" ({unit})" if unit else ""))
    unit = _unit(spec, o.value)
    return RiskScale("continuous", f"mean of {o.value}" + (f" ({unit})" if unit else ""))


def inverse_link(family: str, z: np.ndarray | float) -> np.ndarray:
    """The risk for linear predictor ``z`` (module docstring)."""
    z = np.asarray(z, dtype=float)
    if family == "binary":
        return np.asarray(special.expit(z))
    if family == "survival":
        with np.errstate(over="ignore"):
            return np.asarray(-np.expm1(-np.exp(z)))
    if family == "count":
        with np.errstate(over="ignore"):
            return np.asarray(np.exp(z))
    return z


def link(family: str, risk: np.ndarray | float) -> np.ndarray:
    """The linear predictor at which the risk equals ``risk`` (inverse of :func:`inverse_link`)."""
    p = np.asarray(risk, dtype=float)
    if family == "binary":
        return np.asarray(special.logit(p))
    if family == "survival":
        return np.asarray(np.log(-np.log1p(-p)))
    if family == "count":
        return np.asarray(np.log(p))
    return p


@dataclass(frozen=True)
class RiskFit:
    """One fitted model read on the risk scale.

    ``exposure_rows`` is f(x_i) of every sample row, ``rest`` the rest of its linear predictor
    (so ``inverse_link(exposure_rows + rest)`` is each row's risk); ``curve(x, level)`` evaluates
    f at new exposure values. ``note`` says where the prediction is held rather than estimated
    (a horizon beyond the follow-up).
    """

    model: str
    adjustment: str
    detail: str
    scale: RiskScale
    curve: ExposureCurve
    exposure_rows: np.ndarray
    rest: np.ndarray
    note: str = ""

    @property
    def family(self) -> str:
        return self.scale.family

    @property
    def risk(self) -> np.ndarray:
        """Every sample row's predicted risk."""
        return inverse_link(self.family, self.exposure_rows + self.rest)

    def risk_at(self, x: np.ndarray | float, rest: float | np.ndarray, level: int = 0) -> np.ndarray:
        """The risk at exposure values ``x`` with the rest of the linear predictor at ``rest``."""
        xs = np.atleast_1d(np.asarray(x, dtype=float))
        return inverse_link(self.family, self.curve(xs, level) + rest)


def survival_base(r: Refit, eta: np.ndarray, horizon: float) -> tuple[np.ndarray, str]:
    """log H0_s(horizon) of every row (Breslow baseline at covariates 0 on the scale of ``eta``)
    and a note when the horizon is past a stratum's last event time (the baseline is then held
    at its last value) or before its first (the risk is 0)."""
    o = r.outcome
    assert o.time is not None
    # The baseline is computed at the centred predictor (no underflow), then moved back.
    centre = float(np.mean(eta)) if eta.size else 0.0
    base = baseline_cumhaz((eta - centre)[:, None], o.time, o.y, [1.0], entry=o.entry,
                           strata=o.strata, layout=cox_layout(o))
    h0, held, empty = cumhaz_at(base, o.strata, o.n, horizon)
    with np.errstate(divide="ignore"):
        log_h0 = np.log(h0) - centre  # -inf where no event precedes the horizon: risk 0

    return log_h0, horizon_notes(horizon, held, empty, o.strata is not None)


def cumhaz_at(base: pd.DataFrame | tuple[np.ndarray, np.ndarray, np.ndarray],
              strata: np.ndarray | None, n: int,
              horizon: float) -> tuple[np.ndarray, list[str], list[str]]:
    """H0_s(horizon) for each of ``n`` rows from a :func:`unbin.models.cox.baseline_cumhaz` table
    (or its columns from :func:`unbin.models.cox.baseline.baseline_steps`; a step function, 0
    before the stratum's first event time, held at its last value past the last one), with the
    strata whose baseline is held and those with no event by the horizon."""
    labels = np.zeros(n, dtype=np.int64) if strata is None else np.asarray(strata)
    held: list[str] = []
    # the table's rows run by stratum, then time (one block of event times per stratum)
    if isinstance(base, tuple):
        st, t, ch = base[0], np.asarray(base[1], dtype=float), np.asarray(base[2], dtype=float)
    else:
        st = base["stratum"].to_numpy()
        t, ch = base["time"].to_numpy(float), base["cumhaz"].to_numpy(float)
    order = np.argsort(st, kind="stable")
    st, t, ch = st[order], t[order], ch[order]
    uniq, first = np.unique(st, return_index=True)
    ends = np.r_[first[1:], st.size]
    value = np.zeros(uniq.size)
    for j, (lab, a, b) in enumerate(zip(uniq, first, ends, strict=True)):
        pos = int(np.searchsorted(t[a:b], horizon, side="right")) - 1
        if pos >= 0:
            value[j] = ch[a + pos]
            if horizon > t[b - 1]:
                held.append(str(lab))
    h0 = np.zeros(n)
    if uniq.size:
        at = np.minimum(np.searchsorted(uniq, labels), uniq.size - 1)
        found = uniq[at] == labels
        h0[found] = value[at[found]]
    empty = [str(v) for v in np.unique(labels[h0 == 0])]
    return h0, held, empty


def horizon_notes(horizon: float, held: list[str], empty: list[str], stratified: bool) -> str:
    """What the baseline at ``horizon`` had to assume, per stratum: held past the last event
    time, or no event before the horizon (risk 0)."""
    def where(labels: list[str]) -> str:
        return f" (stratum {', '.join(labels)})" if stratified else ""

    notes = []
    if held:
        notes.append(f"the horizon {horizon:g} is past the last event time{where(held)}: the "
                     "baseline is held at its last value, not extrapolated")
    if empty:
        notes.append(f"no event before the horizon {horizon:g}{where(empty)}: predicted risk 0")
    return "; ".join(notes)


def from_result(r: Refit, res: FitResult, scale: RiskScale, curve: ExposureCurve,
                exposure_rows: np.ndarray, model: str, adjustment: str,
                detail: str) -> RiskFit:
    """A :class:`RiskFit` from a fitted model of the analysis sample: ``res`` (which must be ok)
    with its per-row linear predictor, and the exposure's part of it."""
    if not res.ok or res.linear_predictor is None:
        raise ValueError(f"model {model!r} did not fit: {res.message}")
    lp = np.asarray(res.linear_predictor, dtype=float)
    note = ""
    if scale.family == "survival":
        if scale.horizon is None:
            raise ValueError("a survival risk needs a horizon (outcome.horizon or the study-level "
                             "horizon)")
        base, note = survival_base(r, lp, scale.horizon)
    else:
        from .sampling_design import prior_shift  # a case-control extract: recalibrated intercept

        base = np.full(lp.shape, float(res.extra["intercept"]) + prior_shift(r.analysis,
                                                                            r.outcome))
    return RiskFit(model, adjustment, detail, scale, curve, exposure_rows,
                   base + lp - exposure_rows, note)


def risk_fit(r: Refit, f: FormFit, scale: RiskScale) -> RiskFit:
    """A fitted exposure form (any FormFit of the refit) on the risk scale (the Fine–Gray model
    of its design when the outcome has competing events: module docstring)."""
    if scale.family == "survival" and r.outcome.cause is not None:
        return competing_risk_fit(r, f, scale)
    b, _ = f.exposure_coef()

    def curve(x: np.ndarray, level: int = 0) -> np.ndarray:
        if b.size == 0:
            return np.zeros(np.atleast_1d(x).shape)
        return np.asarray(f.exposure_basis(x) @ b, dtype=float)

    return from_result(r, with_predictor(r, f), scale, curve, curve(r.x), f.form, f.adjustment,
                       f.detail)


def absolute_risk(r: Refit, f: FormFit, spec: Spec) -> np.ndarray:
    """Every sample row's predicted absolute risk under the fitted model ``f`` (module
    docstring for the scale of each family)."""
    return risk_fit(r, f, risk_scale(r.analysis, spec)).risk



FINE_GRAY_NOTE = "cumulative incidence from the Fine–Gray model of this design"


def fine_gray_fit(r: Refit, f: FormFit) -> FitResult:
    """The Fine–Gray model of a form's design (exposure terms, then adjustment terms), fitted
    once per refit (kept in the outcome's cache)."""
    from ..models.competing import fit_fine_gray
    from .analysis import design

    o = r.outcome
    assert o.cause is not None
    key = "fine_gray:" + "|".join(repr(t) for t in (*f.exposure_terms, *f.adjust_terms))
    res: FitResult | None = o.cache.get(key)
    if res is None:
        X, names = design(r.sample.frame, r.x, f.exposure_terms, f.adjust_terms)
        res = fit_fine_gray(X, o, o.cause, o.event_of_interest, names)
        o.cache[key] = res
    return res


def competing_risk_fit(r: Refit, f: FormFit, scale: RiskScale) -> RiskFit:
    """A form on the cumulative-incidence scale: its Fine–Gray model's exposure curve and, for
    every row, log Lambda0_s(horizon) plus the adjusters' part."""
    if scale.horizon is None:
        raise ValueError("a survival risk needs a horizon (outcome.horizon or the study-level "
                         "horizon)")
    res = fine_gray_fit(r, f)
    if not res.ok or res.linear_predictor is None:
        raise ValueError(f"the Fine–Gray model of {f.form!r} did not fit: {res.message}")
    names = f.exposure_names
    b = res.coef[res.index(names)] if names else np.zeros(0)

    def curve(x: np.ndarray, level: int = 0) -> np.ndarray:
        if b.size == 0:
            return np.zeros(np.atleast_1d(x).shape)
        return np.asarray(f.exposure_basis(x) @ b, dtype=float)

    o = r.outcome
    h0, held, empty = cumhaz_at(res.extra["baseline"], o.strata, o.n, scale.horizon)
    with np.errstate(divide="ignore"):
        log_h0 = np.log(h0)
    rows = curve(r.x)
    lp = np.asarray(res.linear_predictor, dtype=float)
    note = "; ".join(v for v in (FINE_GRAY_NOTE, horizon_notes(scale.horizon, held, empty,
                                                                 o.strata is not None)) if v)
    return RiskFit(f.form, f.adjustment, f.detail, scale, curve, rows, log_h0 + lp - rows, note)
