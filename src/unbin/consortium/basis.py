"""The common basis that lets cohorts be pooled: the knots of the spline whose coefficients a
cohort bundle carries, the curves' reference value, the curves' grid, and the common exposure
values at which every cohort reports its continuous contrasts (so that a pooled contrast means
the same thing in every cohort).

Each comes, in order of precedence, from the spec (fixed ``spline_knots`` values,
``reference_value``, ``grid_range``), from the cohorts' share-safe sample summaries (never
from pooled rows: knots are the n-weighted means of the cohorts' quantiles at the default knot
levels, the reference the n-weighted mean of the cohorts' reference-group medians, the grid the
widest 1st–99th percentile range), or — for a single cohort — from its own sample, which gives
the same values as the single-cohort defaults.

Common contrast values: ``quartiles`` (low, high) are the n-weighted means of the cohorts' 25th
and 75th percentiles (a single cohort: its own quartiles); when the spec fixes the whole basis
(knots, reference and grid; separate runs see no other cohort's summary) they are the points a
quarter and three quarters along the fixed grid. ``group_values`` are, per legacy group, the
n-weighted mean of the cohorts' group medians, only when every cohort has the same groups and
the basis is derived from summaries (none when the spec fixes the basis).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from ..questions.disclosure import too_small_to_describe
from ..spec import ContinuousOptions
from ..terms import GroupedTerm, default_knots
from ..terms.spline import KNOT_QUANTILES


@dataclass(frozen=True)
class CommonBasis:
    variable: str
    knots: tuple[float, ...]
    reference: float
    grid_low: float
    grid_high: float
    source: str  # spec | cohorts | sample
    quartiles: tuple[float, float] | None = None
    group_values: tuple[tuple[str, float], ...] = ()

    def grid(self, points: int) -> np.ndarray:
        return np.linspace(self.grid_low, self.grid_high, points)

    def contrast_quartiles(self) -> tuple[float, float]:
        """The common (low, high) of the quartile contrast; a basis written before these
        values existed falls back to the quarter points of its grid."""
        if self.quartiles is not None:
            return self.quartiles
        span = self.grid_high - self.grid_low
        return (self.grid_low + 0.25 * span, self.grid_low + 0.75 * span)

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["knots"] = list(self.knots)
        d["quartiles"] = list(self.quartiles) if self.quartiles is not None else None
        d["group_values"] = [[g, v] for g, v in self.group_values]
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> CommonBasis:
        q = d.get("quartiles")
        return cls(d["variable"], tuple(float(k) for k in d["knots"]), float(d["reference"]),
                   float(d["grid_low"]), float(d["grid_high"]), str(d["source"]),
                   (float(q[0]), float(q[1])) if q is not None else None,
                   tuple((str(g), float(v)) for g, v in d.get("group_values", [])))


def sample_summary(x: np.ndarray, legacy: GroupedTerm, opts: ContinuousOptions,
                   min_cell: int = 0) -> dict[str, Any]:
    """Aggregates of one cohort's analysis sample that the common basis needs (no rows). A
    group's median is left out when the group has fewer than ``min_cell`` rows (the summary is
    shared with the coordinating centre)."""
    codes = legacy.codes(x)
    ref = x[codes == legacy.reference]
    k = opts.common_knots
    try:
        knots: list[float] | None = list(default_knots(x, k))
    except ValueError:
        knots = None
    p01, q25, q75, p99 = np.quantile(x, [0.01, 0.25, 0.75, 0.99])
    medians = {legacy.labels[g]: float(np.median(x[codes == g]))
               for g in range(len(legacy.labels))
               if (codes == g).any() and not too_small_to_describe(int((codes == g).sum()),
                                                                   min_cell)}
    return {
        "variable": legacy.variable,
        "n": int(len(x)),
        "knot_levels": list(KNOT_QUANTILES[k]),
        "knots": knots,
        "reference_median": float(np.median(ref)) if len(ref) else None,
        "p01": float(p01),
        "p99": float(p99),
        "q25": float(q25),
        "q75": float(q75),
        "group_labels": list(legacy.labels),
        "group_medians": medians,
    }


def combine(summaries: list[dict[str, Any]], opts: ContinuousOptions) -> CommonBasis:
    """The common basis from the cohorts' summaries, with the spec's fixed values first."""
    if not summaries:
        raise ValueError("no cohort summaries to combine")
    variable = summaries[0]["variable"]
    n = np.array([s["n"] for s in summaries], dtype=float)
    source = "sample" if len(summaries) == 1 else "cohorts"
    if opts.knot_values is not None:
        knots = opts.knot_values
    else:
        usable = [(s["n"], s["knots"]) for s in summaries if s["knots"] is not None]
        if not usable:
            raise ValueError(f"no cohort has enough distinct values of {variable!r} for "
                             f"{opts.common_knots} knots; fix 'continuous.spline_knots.values'.")
        w = np.array([u[0] for u in usable], dtype=float)
        K = np.array([u[1] for u in usable], dtype=float)
        knots = tuple(float(v) for v in (w @ K) / w.sum())
        if len(summaries) == 1:
            knots = tuple(float(v) for v in K[0])
    refs = [(s["n"], s["reference_median"]) for s in summaries if s["reference_median"] is not None]
    if opts.reference_value is not None:
        reference = opts.reference_value
    elif len(refs) == 1:
        reference = float(refs[0][1])
    elif refs:
        w = np.array([r[0] for r in refs], dtype=float)
        reference = float(w @ np.array([r[1] for r in refs]) / w.sum())
    else:
        reference = float(np.average([s["p01"] for s in summaries], weights=n))
    if opts.grid_range is not None:
        lo, hi = opts.grid_range
    else:
        lo = min(s["p01"] for s in summaries)
        hi = max(s["p99"] for s in summaries)
    if opts.knot_values is not None and opts.reference_value is not None \
            and opts.grid_range is not None:
        source = "spec"
    quartiles: tuple[float, float] | None = None
    groups: tuple[tuple[str, float], ...] = ()
    if source != "spec" and all("q25" in s for s in summaries):
        quartiles = (float(n @ np.array([s["q25"] for s in summaries]) / n.sum()),
                     float(n @ np.array([s["q75"] for s in summaries]) / n.sum()))
        labels = {tuple(s.get("group_labels", ())) for s in summaries}
        if len(labels) == 1:
            (names,) = labels
            vals = []
            for g in names:
                have = [(s["n"], s["group_medians"][g]) for s in summaries
                        if g in s.get("group_medians", {})]
                if have:
                    w = np.array([h[0] for h in have], dtype=float)
                    vals.append((g, float(w @ np.array([h[1] for h in have]) / w.sum())))
            groups = tuple(vals)
    return CommonBasis(variable, tuple(knots), float(reference), float(lo), float(hi), source,
                       quartiles, groups)
