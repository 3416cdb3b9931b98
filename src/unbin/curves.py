"""Curves: the partial effect of the exposure on a grid (1st–99th percentile) relative to the
median of the legacy reference group, for every form and adjustment coding, with pointwise 95%
intervals; and the binned distribution of the exposure for the rug, small cells suppressed.

Across cohorts the grid and the reference value come from the common basis (``unbin.common``),
so that every cohort's curve is on the same grid relative to the same value; ``in_range`` marks
grid points inside this cohort's own 1st–99th percentile range."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .contrasts import contrast, domain, with_interval
from .models import EFFECT_SCALE
from .refit import Refit
from .spec import Spec

FORMS = ("legacy", "linear", "spline", "fp", "common_spline")
DENSITY_BINS = 40


def grid(x: np.ndarray, points: int) -> np.ndarray:
    lo, hi = np.quantile(x, [0.01, 0.99])
    return np.linspace(lo, hi, points)


def curves_table(r: Refit, spec: Spec | None = None) -> pd.DataFrame:
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
                                       "status": f.result.status}))
    if not parts:
        return pd.DataFrame()
    out = with_interval(pd.concat(parts, ignore_index=True), r.family)
    out["scale"] = EFFECT_SCALE[r.family]
    return out


def density_table(r: Refit, spec: Spec) -> pd.DataFrame:
    """Counts of the exposure in equal-width bins over the 1st–99th percentile range; counts
    below ``spec.min_cell`` (but above zero) are suppressed (NaN, ``suppressed`` true)."""
    min_cell = spec.min_cell
    lo, hi = np.quantile(r.x, [0.01, 0.99])
    edges = np.linspace(lo, hi, DENSITY_BINS + 1)
    counts, _ = np.histogram(r.x[(r.x >= lo) & (r.x <= hi)], bins=edges)
    suppressed = (counts > 0) & (counts < min_cell)
    return pd.DataFrame({
        "bin_left": edges[:-1], "bin_right": edges[1:],
        "count": pd.array([None if s else int(c) for c, s in zip(counts, suppressed,
                                                                  strict=True)], dtype="Int64"),
        "suppressed": suppressed,
    })
