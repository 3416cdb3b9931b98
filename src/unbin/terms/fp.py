"""Fractional polynomials (Royston & Altman 1994, JRSS-C 43:429; Royston & Sauerbrei 2008).

Powers come from S = {-2, -1, -0.5, 0, 0.5, 1, 2, 3} with x^0 = log x; a repeated power p gives
x^p and x^p log x. x must be positive: non-positive data are shifted so that the smallest value
becomes delta = max(rounding step, 0.01 x range) (see :func:`fp_shift`). x is then divided by a
power of ten (``scale``) so that the columns stay well conditioned; this only reparametrises the
model (same fit, same deviance). The term records ``shift`` and ``scale``, so the basis rebuilds
exactly; values at or below the origin (-shift) lie outside the term's domain
(:meth:`FPTerm.in_domain`).
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import combinations_with_replacement
from typing import Any

import numpy as np

FP_POWERS: tuple[float, ...] = (-2.0, -1.0, -0.5, 0.0, 0.5, 1.0, 2.0, 3.0)
FP1_SET: tuple[tuple[float, ...], ...] = tuple((p,) for p in FP_POWERS)
FP2_SET: tuple[tuple[float, ...], ...] = tuple(combinations_with_replacement(FP_POWERS, 2))


SHIFT_RANGE_FRACTION = 0.01


def fp_shift(x: Any) -> float:
    """The shift that makes x positive: 0 if min(x) > 0, else -min + delta with
    delta = max(smallest gap between sorted distinct values, 0.01 x range).

    Royston & Sauerbrei (2008, sec. 4.7) shift non-positive data by -min plus the data's
    rounding step, so that the smallest value becomes that step (x = 0, 1, 2, ... becomes
    1, 2, 3, ...). For data recorded at full precision the smallest gap is not a rounding step
    (it can be 1e-7, and then x^-2 of the smallest row is ~1e14 times that of the others, so one
    row decides the fit). The floor of 1% of the range bounds this: the smallest shifted value
    is at least range/100, so no power in the FP set gives one row more than
    (1 + (x_(2) - x_(1)) / delta)^2 times the value of its nearest neighbour.
    Data on a coarse grid (integers, counts) keep the classic rule."""
    xs = np.unique(np.asarray(x, dtype=float))
    if xs[0] > 0:
        return 0.0
    gaps = np.diff(xs)
    gap = float(gaps.min()) if len(gaps) else 1.0
    delta = max(gap, SHIFT_RANGE_FRACTION * float(xs[-1] - xs[0]))
    return float(-xs[0] + delta)


def fp_scale(x: Any, shift: float) -> float:
    """A power of ten near the range of the shifted values (numerical conditioning only)."""
    top = float(np.max(np.asarray(x, dtype=float) + shift))
    return float(10.0 ** np.floor(np.log10(top))) if top > 0 else 1.0


def _power(z: np.ndarray, p: float) -> np.ndarray:
    return np.log(z) if p == 0 else z ** p


@dataclass(frozen=True)
class FPTerm:
    variable: str
    powers: tuple[float, ...]
    shift: float = 0.0
    scale: float = 1.0

    @classmethod
    def from_data(cls, variable: str, x: Any, powers: tuple[float, ...]) -> FPTerm:
        shift = fp_shift(x)
        return cls(variable, tuple(float(p) for p in powers), shift, fp_scale(x, shift))

    @property
    def df(self) -> int:
        return len(self.powers)

    def names(self) -> tuple[str, ...]:
        return tuple(f"{self.variable}^({p:g})" + ("*log" if i and p == self.powers[i - 1] else "")
                     for i, p in enumerate(self.powers))

    def in_domain(self, x: Any) -> np.ndarray:
        """Where the basis is defined: x above the origin -shift (a curve evaluated on a grid
        shared with other cohorts is missing, not an error, outside it)."""
        return np.asarray(np.asarray(x, dtype=float) + self.shift > 0)

    def basis(self, x: Any) -> np.ndarray:
        z = (np.asarray(x, dtype=float) + self.shift) / self.scale
        if np.any(z <= 0):
            raise ValueError(f"fractional polynomial for {self.variable!r}: values at or below "
                             f"{-self.shift:g} cannot be transformed (shift {self.shift:g}); the "
                             "new data lie outside the fitting range.")
        cols = []
        prev: float | None = None
        last = np.ones_like(z)
        for p in self.powers:
            col = last * np.log(z) if prev is not None and p == prev else _power(z, p)
            cols.append(col)
            last, prev = col, p
        return np.column_stack(cols)

    def describe(self) -> str:
        return f"FP{len(self.powers)}({', '.join(f'{p:g}' for p in self.powers)})"

    def to_dict(self) -> dict[str, Any]:
        return {"term": "fp", "variable": self.variable, "powers": list(self.powers),
                "shift": self.shift, "scale": self.scale}
