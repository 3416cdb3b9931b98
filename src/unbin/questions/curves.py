"""Curves: the partial effect of the exposure on a grid (1st–99th percentile) relative to the
median of the legacy reference group, for every form and adjustment coding, with pointwise 95%
intervals.

Across cohorts the grid and the reference value come from the common basis (``unbin.consortium.basis``),
so that every cohort's curve is on the same grid relative to the same value; ``in_range`` marks
grid points inside this cohort's own 1st–99th percentile range."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..models import EFFECT_SCALE
from ..refit.analysis import Refit
from ..refit.contrasts import contrast, domain, with_interval
from ..refit.interaction import SPLINE, level_models, level_reference
from ..spec import Spec

FORMS = ("legacy", "linear", "spline", "fp", "common_spline")
COLUMNS = ("adjustment", "form", "x", "x_reference", "in_range", "estimate", "se", "status",
           "by_level", "lower", "upper", "effect", "effect_lower", "effect_upper", "scale")


def grid(x: np.ndarray, points: int) -> np.ndarray:
    lo, hi = np.quantile(x, [0.01, 0.99])
    return np.linspace(lo, hi, points)


def curves_table(r: Refit, spec: Spec | None = None) -> pd.DataFrame:
    """Every form's curve on the grid relative to the reference value, with 95% bands."""
    points = r.analysis.continuous.grid_points
    xs = r.basis.grid(points) if r.basis is not None else grid(r.x, points)
    x_ref = r.curve_reference
    lo, hi = np.quantile(r.x, [0.01, 0.99])
    in_range = (xs >= lo - 1e-12 * abs(lo)) & (xs <= hi + 1e-12 * abs(hi))
    parts = []
    for coding in ("legacy", "continuous", "none"):
        for form in FORMS:
            f = r.get(form, coding)
            if f is None:
                continue
            est, se = contrast(f, xs, x_ref)  # NaN outside the form's domain
            parts.append(pd.DataFrame({"adjustment": coding, "form": form, "x": xs,
                                       "x_reference": x_ref,
                                       "in_range": in_range & domain(f, xs)
                                       & bool(domain(f, np.array([x_ref]))[0]),
                                       "estimate": est, "se": se,
                                       "status": f.result.status, "by_level": ""}))
    parts += _level_curves(r, xs)
    if not parts:
        return pd.DataFrame(columns=list(COLUMNS))
    out = with_interval(pd.concat(parts, ignore_index=True), r.family)
    out["scale"] = EFFECT_SCALE[r.family]
    return out[list(COLUMNS)]


def _level_curves(r: Refit, xs: np.ndarray) -> list[pd.DataFrame]:
    """Per-level curves of the spline x level interaction model (unbin.refit.interaction), each level
    relative to its own reference value (the median of the legacy reference group within the
    level); ``in_range`` marks the level's own 1st-99th percentile range."""
    lm = level_models(r)
    parts = []
    for coding in ("legacy", "continuous"):
        m = lm.get(SPLINE, coding)
        if m is None:
            continue
        for j, label in enumerate(m.levels.labels):
            x_lvl = r.x[m.levels.codes == j]
            x_ref = level_reference(r, m.levels, j)
            status = m.full.status if m.ok else "failed"
            if x_lvl.size == 0 or not np.isfinite(x_ref):
                est = se = np.full(xs.shape, np.nan)
                in_range = np.zeros(xs.shape, dtype=bool)
                status = "not_estimable"
            else:
                est, se = m.contrast(j, xs, x_ref)
                lo, hi = np.quantile(x_lvl, [0.01, 0.99])
                in_range = (xs >= lo - 1e-12 * abs(lo)) & (xs <= hi + 1e-12 * abs(hi))
            parts.append(pd.DataFrame({"adjustment": coding, "form": SPLINE, "x": xs,
                                       "x_reference": x_ref, "in_range": in_range,
                                       "estimate": est, "se": se, "status": status,
                                       "by_level": label}))
    return parts
