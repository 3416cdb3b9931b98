"""Implied exposure thresholds, one table per analysis (``thresholds``).

For every risk threshold (the analysis' ``risk_thresholds``, else the study's for binary and
survival outcomes; on the rate or mean scale for count and continuous outcomes, which need their
own list), every fitted curve (linear, spline
and fractional polynomial with continuous adjustment; with an effect modifier ``by`` also the
spline x level interaction model) and every level of ``by``: the exposure values at which the
predicted risk (:mod:`unbin.refit.risk`) crosses the threshold, within the level's observed exposure
range, with the rest of the linear predictor (everything but the exposure: intercept or log
baseline hazard, adjustment, the level's main effect) held at its 10th, 50th and 90th percentile
among the level's rows — the cut a risk rule implies moves with the patient's other risk
factors. Crossings are found on a grid of :data:`SEARCH_POINTS` points and refined by Brent's
method (``unbin.roots.brentq``, scipy's ``brentq`` step for step), so the risk at a reported
value equals the threshold to rounding; every crossing of a non-monotone curve is reported
(``crossing`` 1, 2, ...), a curve that stays on one side is reported once with ``position``
"always above"/"always below". A crossing between two grid points that touches the threshold without crossing it is not found.
Each value is compared with the nearest legacy cut. The interaction model
(:mod:`unbin.refit.interaction`: a spline with knots fixed before the outcome is seen, the level main
effects in the model and in the one it is tested against) and its likelihood-ratio test against
the same spline without interaction (same continuous adjustment) are on every row
(``lr_interaction``, ``df_interaction``, ``p_interaction``).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd

from ..refit.analysis import Refit
from ..refit.risk import RiskFit, link
from ..roots import brentq
from ..spec import Spec
from .decisions import EVENT_FAMILIES, decision_models, finish

PROFILE_QUANTILES = (0.10, 0.50, 0.90)
SEARCH_POINTS = 512


def crossings(curve: Callable[[np.ndarray], np.ndarray], lo: float, hi: float, target: float,
              points: int = SEARCH_POINTS) -> tuple[list[tuple[float, str]], str]:
    """Every x in [lo, hi] where ``curve(x) = target``: the sign changes of curve - target on a
    grid of ``points`` values, each refined by Brent's method. Returns [(x, "rising" |
    "falling")] and the position: "crossing", "always above" (curve >= target on the whole grid)
    or "always below"."""
    grid = np.linspace(lo, hi, points)
    h = np.asarray(curve(grid), dtype=float) - target
    above = h >= 0
    found: list[tuple[float, str]] = []
    for i in np.flatnonzero(above[1:] != above[:-1]):
        def g(v: float) -> float:
            return float(curve(np.array([v]))[0] - target)

        root = float(brentq(g, grid[i], grid[i + 1], xtol=1e-13, maxiter=200))
        direction = "rising" if above[i + 1] else "falling"
        if found and abs(root - found[-1][0]) <= 1e-9 * max(hi - lo, 1.0):
            continue  # the grid point itself is the root: counted once
        found.append((root, direction))
    if found:
        return found, "crossing"
    return [], "always above" if above.all() else "always below"


COLUMNS = (
    "model", "adjustment", "detail", "by", "level", "threshold", "risk_scale", "horizon",
    "profile_quantile", "rest_lp", "crossing", "position", "exposure_value", "direction",
    "risk_at_value", "share_below", "nearest_cut", "shift_from_cut", "range_lower",
    "range_upper", "lr_interaction", "df_interaction", "p_interaction", "status", "reason",
    "note", "caution")


def thresholds_table(r: Refit, spec: Spec) -> pd.DataFrame:
    """Implied exposure thresholds: where each fitted risk curve crosses each risk threshold."""
    d = decision_models(r, spec)
    base: dict[str, Any] = {
        "by": d.levels.variable, "risk_scale": d.scale.label, "horizon": d.scale.horizon,
        "lr_interaction": d.interaction.lr, "df_interaction": d.interaction.df,
        "p_interaction": d.interaction.p}
    rows: list[dict[str, Any]] = []
    if d.reason or not d.thresholds:
        reason = d.reason or (
            "no risk thresholds in the spec" if r.family in EVENT_FAMILIES else
            f"no thresholds on this outcome's scale ({d.scale.label}); give "
            "analyses[].risk_thresholds")
        rows.append({**base, "status": "skipped", "reason": reason})
        return finish(rows, COLUMNS)
    for model, adjustment, message in d.failed:
        rows.append({**base, "model": model, "adjustment": adjustment, "status": "failed",
                     "reason": message})
    cuts = np.asarray(r.legacy.cuts, dtype=float)
    for rf in d.curves:
        per_level = rf.model.startswith("spline x ")
        note = " | ".join(v for v in (rf.note, d.levels.note) if v)
        if per_level and d.interaction.reason:
            note = " | ".join(v for v in (note, d.interaction.reason) if v)
        for j, label in enumerate(d.levels.labels):
            inside = d.levels.codes == j
            xs, rest = r.x[inside], rf.rest[inside]
            common = {**base, "model": rf.model, "adjustment": rf.adjustment,
                      "detail": rf.detail, "level": label, "note": note}
            if np.unique(xs).size < 2:
                rows.append({**common, "status": "skipped",
                             "reason": "fewer than two distinct exposure values in this level"})
                continue
            lo, hi = float(xs.min()), float(xs.max())
            common.update(range_lower=lo, range_upper=hi)
            if not np.all(np.isfinite(rest)):
                rows.append({**common, "status": "failed",
                             "reason": "the predicted risk is 0 for some rows (no event before "
                                       "the horizon); choose a later horizon"})
                continue
            profiles = np.quantile(rest, PROFILE_QUANTILES)

            def curve(v: np.ndarray, j: int = j, rf: RiskFit = rf) -> np.ndarray:
                return rf.curve(v, j)

            for t in d.thresholds:
                z_t = float(link(rf.family, t))
                for q, rest_q in zip(PROFILE_QUANTILES, profiles, strict=True):
                    row = {**common, "threshold": t, "profile_quantile": q,
                           "rest_lp": float(rest_q), "status": "ok", "reason": ""}
                    found, position = crossings(curve, lo, hi, z_t - float(rest_q))
                    if not found:
                        rows.append({**row, "crossing": 0, "position": position,
                                     "direction": ""})
                        continue
                    for k, (xv, direction) in enumerate(found, start=1):
                        near = float(cuts[np.argmin(np.abs(cuts - xv))]) if cuts.size else np.nan
                        rows.append({
                            **row, "crossing": k, "position": "crossing", "exposure_value": xv,
                            "direction": direction,
                            "risk_at_value": float(rf.risk_at(xv, float(rest_q), j)[0]),
                            "share_below": float(np.mean(xs < xv)), "nearest_cut": near,
                            "shift_from_cut": xv - near})
    return finish(rows, COLUMNS)
