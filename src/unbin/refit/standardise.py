"""Standardised (g-computation) means of a fitted model with the exposure set to chosen values.

A model's linear predictor splits into the exposure's part and the rest,
``eta_i = e(x_i)'b + rest_i`` (``e`` the exposure basis; ``rest`` the intercept or the log
baseline, the adjustment terms and, for counts, the log person-time offset). Setting every
row's exposure to ``v`` and averaging the prediction over the sample gives the standardised
mean at ``v`` (the g-formula, Robins 1986, Math Model 7:1393; standardisation of a fitted
model, Lane & Nelder 1982, Biometrics 38:613). With frequency weights ``w`` (ones for the
sample itself, resampling counts for a bootstrap replicate):

- binary: ``R(v) = sum_i w_i expit(rest_i + e(v)'b) / sum_i w_i``, the standardised risk;
- continuous: ``R(v) = sum_i w_i (rest_i + e(v)'b) / sum_i w_i``, the standardised mean;
- count: ``R(v) = sum_i w_i t_i exp(r_i + e(v)'b) / sum_i w_i t_i`` with ``r_i`` the rest
  without the offset and ``t_i`` the row's person-time: the standardised rate, events per unit
  of person-time expected with every row's own follow-up;
- survival: ``R(v) = 1 - sum_i w_i exp(-H0_s(h) exp(rest_i + e(v)'b)) / sum_i w_i``, one
  minus the standardised survival at the horizon ``h``, with the Breslow baseline cumulative
  hazard ``H0_s`` of the row's stratum ``s`` (``unbin.models.cox.baseline_cumhaz``, a step function,
  held at its last value past the stratum's last event time).
- survival with competing events: ``R(v) = sum_i w_i F_i(h; v) / sum_i w_i``, the standardised
  cumulative incidence of the event of interest (cause 1 below) from cause-specific Cox models
  of every cause on the same design (the g-formula for competing events: Cheng, Fine & Wei
  1998, Biometrics 54:219; Young et al. 2020, Stat Med 39:1199): with each cause's Breslow
  increments ``dL0_cs(t)`` and ``dL_ci(t) = dL0_cs(t) exp(rest_ci + e(v)'b_c)``,
  ``F_i(h; v) = sum_{t <= h} S_i(t-) dL_1i(t)``, ``S_i(t-) = prod_{u < t} (1 - sum_c dL_ci(u))``
  over the event times (any cause) of the row's stratum — the product-limit (Aalen–Johansen)
  form, which without covariates is the Aalen–Johansen estimate itself
  (:func:`cif_risks`; a factor below 0 is set to 0). Its sum over the rows is taken once
  per distinct row and, with many distinct rows, by Chebyshev interpolation over the rows'
  relative hazards (``unbin.refit.incidence_sum``).

The contrasts of two standardised means (:data:`MEASURES`) are collapsible: with no confounding
the crude and the adjusted contrasts estimate the same quantity, unlike odds and hazard ratios,
whose conditional value moves with any adjustment for a predictor of the outcome.
:func:`on_model_scale` maps the two means to the model's own scale (log odds ratio of the
standardised risks; log ratio of the standardised cumulative hazards ``-log(1 - R)`` at the
horizon) so a conditional estimate can be compared with its marginal counterpart.

Predictions for many coefficient vectors (bootstrap replicates) come from matrix products of
the design with the coefficient matrix, never from refits.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import special

from ..models.cox import Layout
from ..models.cox.baseline import DrawnHorizon, baseline_steps
from ..models.weighted import Replicates, expit_into
from .incidence_sum import interpolated_sums, shifted_sums
from .risk import cumhaz_at, horizon_notes

# a stratum with at most this many distinct rows, or distinct rows x event times up to the
# horizon, is summed row by row (exact, and no dearer than the interpolation's nodes, of
# which there are hundreds to thousands); larger ones are interpolated
INTERPOLATE_ROWS = 500
_BLOCK_CELLS = 1 << 17  # replicates x rows of a block of the GLM standardised means (1 MB)
# from this many rows (the GLM bootstrap's large-sample refits, models.weighted._WHOLE_ROWS)
# the standardised means are summed in row blocks with one exponential per row; below it row
# by row as before
BLOCKED_MEANS_FROM_ROWS = 50_000
DIRECT_CELLS = 4e6


class IncidenceWithheld(Exception):
    """The standardised cumulative incidence would exceed its caller's cell limit."""


# The marginal contrasts reported per family: (name, kind); "ratio" contrasts are taken on the
# log scale (log R1 - log R0), "difference" ones as R1 - R0.
MEASURES: dict[str, tuple[tuple[str, str], ...]] = {
    "binary": (("risk ratio", "ratio"), ("risk difference", "difference")),
    "survival": (("risk ratio", "ratio"), ("risk difference", "difference")),
    "count": (("rate ratio", "ratio"),),
    "continuous": (("mean difference", "difference"),),
}


def contrast(kind: str, r1: np.ndarray, r0: np.ndarray) -> np.ndarray:
    """R1 - R0 (``kind = "difference"``) or log R1 - log R0 (``"ratio"``); NaN where undefined."""
    r1, r0 = np.asarray(r1, dtype=float), np.asarray(r0, dtype=float)
    if kind == "difference":
        return r1 - r0
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.log(r1) - np.log(r0)
    return np.where(np.isfinite(out), out, np.nan)


def on_model_scale(family: str, r1: np.ndarray, r0: np.ndarray) -> np.ndarray:
    """The contrast of two standardised means on the model's scale: logit R1 - logit R0
    (binary), log(-log(1 - R1)) - log(-log(1 - R0)) (survival: the log ratio of the
    standardised cumulative hazards at the horizon), log R1 - log R0 (count), R1 - R0
    (continuous)."""
    r1, r0 = np.asarray(r1, dtype=float), np.asarray(r0, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        if family == "binary":
            out = special.logit(r1) - special.logit(r0)
        elif family == "survival":
            out = np.log(-np.log1p(-r1)) - np.log(-np.log1p(-r0))
        elif family == "count":
            out = np.log(r1) - np.log(r0)
        else:
            out = r1 - r0
    return np.where(np.isfinite(out), out, np.nan)


def glm_means(family: str, X: np.ndarray, k: int, coef: np.ndarray, at: Sequence[np.ndarray],
              W: np.ndarray | Replicates, offset: np.ndarray | None = None) -> np.ndarray:
    """Standardised means (module docstring) of the linear, logistic or Poisson model for each
    row of ``coef`` (shape (C, p + 1), intercept first, then X's columns; NaN rows give NaN)
    with frequency weights ``W`` (shape (C, n); float64 or compact,
    ``unbin.models.weighted.Replicates``), at each exposure basis row in ``at`` (the
    exposure is X's first ``k`` columns). Returns shape (C, len(at)). The rows are summed a
    block at a time (the (C x rows) temporaries stay in cache), and one exponential of the
    rows serves every exposure value: ``exp(rest + shift) = exp(rest) exp(shift)`` and
    ``expit(rest + shift) = 1 / (1 + exp(-rest) exp(-shift))`` (the same means to rounding),
    from ``BLOCKED_MEANS_FROM_ROWS`` rows or on compact weights; smaller samples are summed as
    before (:func:`_glm_means_rowwise`)."""
    X = np.asarray(X, dtype=float)
    coef = np.atleast_2d(np.asarray(coef, dtype=float))
    C, n = coef.shape[0], X.shape[0]
    if (n < BLOCKED_MEANS_FROM_ROWS or family == "continuous") \
            and not isinstance(W, Replicates):
        return _glm_means_rowwise(family, X, k, coef, at, np.atleast_2d(np.asarray(W, float)),
                                  offset)
    R = W if isinstance(W, Replicates) else Replicates(np.atleast_2d(np.asarray(W, float)))
    shifts = np.column_stack([coef[:, 1:1 + k] @ np.asarray(a, dtype=float) for a in at]
                             ) if len(at) else np.zeros((C, 0))  # (C, J)
    # person-time weights for counts; the rate itself is without the offset
    time = np.exp(offset) if family == "count" and offset is not None else None
    with np.errstate(over="ignore"):
        factors = np.exp(-shifts) if family == "binary" else np.exp(shifts)
    # a factor exp(-shift) of 0 or infinity, where 1 + exp(-rest) exp(-shift) could be
    # undefined, takes the direct form expit(rest + shift)
    direct = ~((factors > 0) & np.isfinite(factors))  # (C, J)
    total = np.zeros(C)
    sums = np.zeros((C, shifts.shape[1] if family != "count" else 1))
    rows = max(1024, _BLOCK_CELLS // max(C, 1))
    for r0 in range(0, n, rows):
        sl = slice(r0, min(n, r0 + rows))
        Wb = R.block(slice(None), sl)
        if time is not None:
            Wb *= time[sl]
        total += Wb.sum(axis=1)
        rest = coef[:, 1 + k:] @ X[sl, k:].T
        rest += coef[:, :1]  # (C, rows): adjustment part, exposure left out
        if family == "count":
            with np.errstate(over="ignore"):
                sums[:, 0] += np.einsum("cn,cn->c", Wb, np.exp(rest))
            continue
        if family != "binary":
            for j in range(shifts.shape[1]):
                sums[:, j] += np.einsum("cn,cn->c", Wb, rest + shifts[:, j:j + 1])
            continue
        with np.errstate(over="ignore"):
            e_rest = np.exp(np.negative(rest))
        mu = np.empty_like(rest)
        for j in range(shifts.shape[1]):
            np.multiply(e_rest, factors[:, j:j + 1], out=mu)
            mu += 1.0
            np.reciprocal(mu, out=mu)
            odd = direct[:, j]
            if odd.any():
                mu[odd] = expit_into(rest[odd] + shifts[odd, j:j + 1], rest[odd])
            sums[:, j] += np.einsum("cn,cn->c", Wb, mu)
    with np.errstate(over="ignore", invalid="ignore"):
        if family == "count":
            return np.asarray(sums * factors / total[:, None])
        return np.asarray(sums / total[:, None])


def _glm_means_rowwise(family: str, X: np.ndarray, k: int, coef: np.ndarray,
                       at: Sequence[np.ndarray], W: np.ndarray,
                       offset: np.ndarray | None) -> np.ndarray:
    """:func:`glm_means` below ``BLOCKED_MEANS_FROM_ROWS`` rows: each exposure value's means
    from the whole (C x n) arrays, the mean by ``scipy.special.expit`` (the small samples' and
    the demo's numbers bit for bit as before the blocked form)."""
    rest = X[:, k:] @ coef[:, 1 + k:].T  # (n, C): adjustment part, exposure left out
    rest = rest.T + coef[:, :1]  # (C, n)
    if family == "count" and offset is not None:
        W = W * np.exp(offset)  # person-time weights; the rate itself is without the offset
    total = W.sum(axis=1)
    out = np.empty((coef.shape[0], len(at)))
    for j, a in enumerate(at):
        shift = coef[:, 1:1 + k] @ np.asarray(a, dtype=float)  # (C,)
        eta = rest + shift[:, None]
        if family == "binary":
            mu = special.expit(eta)
        elif family == "count":
            with np.errstate(over="ignore"):
                mu = np.exp(eta)
        else:
            mu = eta
        out[:, j] = np.einsum("cn,cn->c", W, mu) / total
    return out


@dataclass(frozen=True)
class CauseBaseline:
    """One cause's Cox model on the rows given, as the standardised risks use it: the linear
    predictor ``eta = X b`` of every row, its mean ``centre`` and the Breslow baseline steps
    (stratum, time, cumulative hazard) at the centred predictor (:func:`cause_baseline`)."""

    eta: np.ndarray
    centre: float
    steps: tuple[np.ndarray, np.ndarray, np.ndarray]


def cause_baseline(X: np.ndarray, coef: np.ndarray, time: np.ndarray, event: np.ndarray, *,
                   entry: np.ndarray | None = None, strata: np.ndarray | None = None,
                   layout: Layout | None = None) -> CauseBaseline:
    """The linear predictor, its mean and the Breslow baseline at the centred predictor of the
    Cox model with coefficients ``coef`` on the rows given (``layout``: the Cox layout of
    ``event`` on those rows, as for :func:`unbin.models.cox.baseline_cumhaz`). What
    :func:`cox_risks` and :func:`cif_risks` (for the event of interest) both need: a caller
    that needs both passes it to each."""
    eta = np.asarray(X, dtype=float) @ np.asarray(coef, dtype=float)
    centre = float(np.mean(eta)) if eta.size else 0.0  # baseline at the centred predictor
    steps = baseline_steps((eta - centre)[:, None], time, event, [1.0], entry=entry,
                           strata=strata, layout=layout)
    return CauseBaseline(eta, centre, steps)


def cox_risks(X: np.ndarray, k: int, coef: np.ndarray, at: Sequence[np.ndarray],
              time: np.ndarray, event: np.ndarray, horizon: float, *,
              entry: np.ndarray | None = None, strata: np.ndarray | None = None,
              layout: Layout | None = None,
              baseline: CauseBaseline | None = None) -> tuple[np.ndarray, str]:
    """Standardised risks by ``horizon`` (module docstring) of the Cox model with coefficients
    ``coef`` (no intercept) on the rows given (a replicate's rows repeated as drawn), at each
    exposure basis row in ``at``; the baseline is Breslow's on the same rows (``layout`` as
    for :func:`unbin.models.cox.baseline_cumhaz`; ``baseline``: :func:`cause_baseline` of
    these arguments when the caller has it). Returns (risks, note on the horizon)."""
    X = np.asarray(X, dtype=float)
    coef = np.asarray(coef, dtype=float)
    if baseline is None:
        baseline = cause_baseline(X, coef, time, event, entry=entry, strata=strata,
                                  layout=layout)
    h0, held, empty = cumhaz_at(baseline.steps, strata, X.shape[0], horizon)
    rest = baseline.eta - baseline.centre - X[:, :k] @ coef[:k]
    out = np.empty(len(at))
    for j, a in enumerate(at):
        shift = float(np.asarray(a, dtype=float) @ coef[:k])
        with np.errstate(over="ignore"):
            out[j] = 1.0 - float(np.mean(np.exp(-h0 * np.exp(rest + shift))))
    return out, horizon_notes(horizon, held, empty, strata is not None)


def drawn_cox_risks(at_h: DrawnHorizon, X: np.ndarray, k: int, coef: np.ndarray,
                    at: Sequence[np.ndarray], counts: np.ndarray) -> np.ndarray:
    """:func:`cox_risks` of a bootstrap replicate given as draw counts on the sample's rows
    (``counts``, whole numbers, one per row of the sample's design ``X``; ``at_h`` the
    sample's :class:`unbin.models.cox.baseline.DrawnHorizon`): the same numbers as
    ``cox_risks`` of the repeated rows, up to the order of summation. The linear predictor's
    mean, the baseline at the horizon (on the sample's event times, no sort or gather of the
    drawn rows) and the means of the standardised survival are sums over the sample's rows,
    each row counted as often as drawn."""
    X = np.asarray(X, dtype=float)
    coef = np.asarray(coef, dtype=float)
    c = np.asarray(counts, dtype=float)
    total = float(c.sum())
    eta = X @ coef
    centre = float(c @ eta) / total
    eta -= centre
    h0 = at_h.per_row(at_h.cumhaz(eta, c))
    eta -= X[:, :k] @ coef[:k]  # the rest of the linear predictor
    out = np.empty(len(at))
    for j, a in enumerate(at):
        shift = float(np.asarray(a, dtype=float) @ coef[:k])
        with np.errstate(over="ignore"):
            out[j] = 1.0 - float(c @ np.exp(-h0 * np.exp(eta + shift))) / total
    return out


def _distinct_rows(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The distinct rows of the 2-d array ``a`` (in lexicographic order) and how often each
    occurs."""
    if a.shape[0] == 0:
        return a, np.zeros(0, dtype=np.int64)
    s = a[np.lexsort(a.T[::-1])]
    first = np.flatnonzero(np.r_[True, np.any(s[1:] != s[:-1], axis=1)])
    return s[first], np.diff(np.r_[first, a.shape[0]])


def cif_risks(X: np.ndarray, k: int, coefs: Sequence[np.ndarray], at: Sequence[np.ndarray],
              time: np.ndarray, cause: np.ndarray, causes: Sequence[int], horizon: float, *,
              entry: np.ndarray | None = None, strata: np.ndarray | None = None,
              layout: Layout | None = None,
              other_layouts: Sequence[Layout | None] | None = None,
              max_cells: float | None = None,
              groups: np.ndarray | None = None,
              baseline: CauseBaseline | None = None,
              with_note: bool = True) -> tuple[np.ndarray, str]:
    """Standardised cumulative incidences of ``causes[0]`` by ``horizon`` (module docstring)
    from the cause-specific Cox models of every cause in ``causes`` (``coefs[j]`` the
    coefficients of cause ``causes[j]`` on ``X``; no intercept), on the rows given, at each
    exposure basis row in ``at``. ``layout`` is the Cox layout of ``causes[0]``'s event
    indicator; ``other_layouts`` those of ``causes[1:]`` (laid out here when not given);
    ``baseline`` the :func:`cause_baseline` of ``causes[0]`` when the caller has it.
    Rows with the same predictors are computed once: ``groups`` (optional) numbers the rows'
    patterns (rows of one number have the same ``X[:, k:]``; a design's numbering serves all
    its bootstrap replicates), otherwise the distinct rows of the linear predictors are
    sorted out here. Each stratum's sum over its distinct rows is interpolated
    (``refit.incidence_sum``) when they are more than ``INTERPOLATE_ROWS`` and have more than
    ``DIRECT_CELLS`` cells (distinct rows x event times up to the horizon), otherwise, or when
    the interpolation cannot be used, summed row by row, every exposure value in one pass;
    that row-by-row sum is refused above ``max_cells`` cells (:class:`IncidenceWithheld`, its
    message saying why). Returns (incidences, note on the horizon; "" without
    ``with_note``)."""
    X = np.asarray(X, dtype=float)
    cause = np.asarray(cause)
    n = X.shape[0]
    fitted: list[CauseBaseline] = []
    for j, (c, b) in enumerate(zip(causes, coefs, strict=True)):
        if j == 0 and baseline is not None:
            fitted.append(baseline)
            continue
        lay = layout if j == 0 else (None if other_layouts is None else other_layouts[j - 1])
        fitted.append(cause_baseline(X, b, time, (cause == c).astype(float), entry=entry,
                                     strata=strata, layout=lay))
    note = ""
    if with_note:
        _, held, empty = cumhaz_at(fitted[0].steps, strata, n, horizon)
        note = horizon_notes(horizon, held, empty, strata is not None)
    slopes = [np.asarray(b, dtype=float)[:k] for b in coefs]
    shifts = np.array([[float(np.asarray(a, dtype=float) @ s) for s in slopes] for a in at])
    out = np.zeros(len(at))
    for lab, rest_u, count in _patterns(X, k, fitted, slopes, strata, groups):
        steps = []
        for f in fitted:
            st, t, cum = f.steps
            part = (st == lab) & (t <= horizon)
            steps.append((t[part], np.diff(cum[part], prepend=0.0)))
        grid = np.unique(np.concatenate([t for t, _ in steps]))
        if grid.size == 0:
            continue
        D = np.zeros((len(steps), grid.size))  # baseline increments of each cause on the grid
        for j, (t, d) in enumerate(steps):
            D[j, np.searchsorted(grid, t)] = d
        sums = None
        if count.size > INTERPOLATE_ROWS and count.size * grid.size > DIRECT_CELLS:
            sums = interpolated_sums(rest_u, count, shifts, D)  # refit/incidence_sum
        if sums is None:
            cells = float(count.size) * grid.size * len(shifts)
            if max_cells is not None and cells > max_cells:
                raise IncidenceWithheld(
                    f"the standardised cumulative incidence could not be interpolated "
                    f"(relative hazards too spread or too large for the event times' "
                    f"increments) and its row-by-row sum would take {cells:.1e} row-time "
                    f"cells ({count.size:,} distinct rows x {grid.size:,} event times up to "
                    f"the horizon x {len(shifts)} exposure values; limit {max_cells:.0e})")
            sums = shifted_sums(rest_u, count, shifts, D)
        out += sums
    return out / n, note


def _patterns(X: np.ndarray, k: int, fitted: Sequence[CauseBaseline],
              slopes: Sequence[np.ndarray], strata: np.ndarray | None,
              groups: np.ndarray | None) -> Iterator[tuple[Any, np.ndarray, np.ndarray]]:
    """Per stratum (label), the distinct rows' log relative hazards without the exposure part
    (rows, causes) and how often each occurs: with ``groups``, one row standing for each
    pattern of the stratum (the last of its rows), found for all strata in one pass;
    otherwise the distinct rows of the linear predictors."""
    n = X.shape[0]
    if strata is None:
        uniq, codes = np.zeros(1, dtype=np.int64), None
    else:
        uniq, codes = np.unique(np.asarray(strata), return_inverse=True)
        codes = codes.reshape(-1)
    if groups is None:
        rest_all = np.column_stack([f.eta - f.centre - X[:, :k] @ s
                                    for f, s in zip(fitted, slopes, strict=True)])
        for c, lab in enumerate(uniq):
            mine = rest_all if codes is None else rest_all[codes == c]
            rest_u, count = _distinct_rows(mine)
            yield lab, rest_u, count
        return
    g = np.asarray(groups, dtype=np.int64)
    span = int(g.max()) + 1 if n else 1
    key = g if codes is None else codes * span + g
    count_all = np.bincount(key)
    present = np.flatnonzero(count_all)
    first = np.zeros(count_all.size, dtype=np.int64)
    first[key] = np.arange(n)  # the last row of each pattern stands for it
    rows = first[present]
    rest = np.column_stack([f.eta[rows] - f.centre - X[rows, :k] @ s
                            for f, s in zip(fitted, slopes, strict=True)])
    count = count_all[present]
    bounds = np.searchsorted(present // span, np.arange(uniq.size + 1))
    for c, lab in enumerate(uniq):
        lo, hi = bounds[c], bounds[c + 1]
        if hi > lo:
            yield lab, rest[lo:hi], count[lo:hi]
