"""Restricted cubic splines (Stone & Koo 1985; Durrleman & Simon 1989, Stat Med 8:551).

For knots t_1 < ... < t_k the basis is x plus k-2 nonlinear terms

    s_j(x) = [(x-t_j)+^3 - (x-t_{k-1})+^3 (t_k-t_j)/(t_k-t_{k-1})
              + (x-t_k)+^3 (t_{k-1}-t_j)/(t_k-t_{k-1})] / (t_k-t_1)^2,   j = 1..k-2,

linear beyond the outer knots. Dividing by (t_k-t_1)^2 keeps the columns on the scale of x.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

# Default knot quantiles by number of knots (published regression-modelling texts; common practice).
KNOT_QUANTILES: dict[int, tuple[float, ...]] = {
    3: (0.10, 0.50, 0.90),
    4: (0.05, 0.35, 0.65, 0.95),
    5: (0.05, 0.275, 0.50, 0.725, 0.95),
    6: (0.05, 0.23, 0.41, 0.59, 0.77, 0.95),
    7: (0.025, 0.1833, 0.3417, 0.50, 0.6583, 0.8167, 0.975),
}


def default_knots(x: Any, k: int) -> tuple[float, ...]:
    """Knots at the default quantiles; with fewer than 100 values the outer knots move to the
    5th smallest and 5th largest value (common practice)."""
    xs = np.asarray(x, dtype=float)
    if k not in KNOT_QUANTILES:
        raise ValueError(f"spline knots: {k} knots is not supported; use 3 to 7.")
    # quantiles are order statistics (and interpolations between them), whatever the order
    # of x: no sort of the whole sample (at a million rows most of the call), except below
    q = np.quantile(xs, KNOT_QUANTILES[k])
    if len(xs) < 100 and len(xs) >= 10:
        xs = np.sort(xs)
        q[0], q[-1] = xs[4], xs[-5]
    knots = tuple(float(v) for v in q)
    if len(set(knots)) < k:
        raise ValueError(f"spline knots: {k} knots at quantiles {KNOT_QUANTILES[k]} are not "
                         f"distinct ({[round(v, 6) for v in knots]}); the variable has too few "
                         "distinct values for this many knots. Use fewer knots.")
    return knots


@dataclass(frozen=True)
class SplineTerm:
    variable: str
    knots: tuple[float, ...]

    def __post_init__(self) -> None:
        if len(self.knots) < 3 or any(b <= a for a, b in zip(self.knots, self.knots[1:],
                                                             strict=False)):
            raise ValueError(f"spline knots for {self.variable!r} must be at least 3 strictly "
                             f"increasing values; got {list(self.knots)}.")

    @classmethod
    def at_quantiles(cls, variable: str, x: Any, k: int) -> SplineTerm:
        return cls(variable, default_knots(x, k))

    @property
    def df(self) -> int:
        return len(self.knots) - 1

    def names(self) -> tuple[str, ...]:
        return (self.variable,) + tuple(f"{self.variable}'{j + 1}" for j in range(self.df - 1))

    def basis(self, x: Any) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        t = np.asarray(self.knots)
        k = len(t)
        norm = (t[-1] - t[0]) ** 2
        tk1, tk = t[-2], t[-1]
        tail_k1 = np.clip(x - tk1, 0, None) ** 3
        tail_k = np.clip(x - tk, 0, None) ** 3
        cols = [x]
        for j in range(k - 2):
            tj = t[j]
            s = (np.clip(x - tj, 0, None) ** 3
                 - tail_k1 * (tk - tj) / (tk - tk1)
                 + tail_k * (tk1 - tj) / (tk - tk1))
            cols.append(s / norm)
        return np.column_stack(cols)

    def describe(self) -> str:
        return f"restricted cubic spline, {len(self.knots)} knots"

    def to_dict(self) -> dict[str, Any]:
        return {"term": "spline", "variable": self.variable, "knots": list(self.knots)}
