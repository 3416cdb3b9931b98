"""A factor: indicators of every level but the first (sorted; for a labelled factor, the
lowest code) level."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd


@dataclass(frozen=True)
class CategoricalTerm:
    variable: str
    levels: tuple[Any, ...]

    @classmethod
    def from_data(cls, variable: str, x: Any) -> CategoricalTerm:
        s = pd.Series(x)
        if isinstance(s.dtype, pd.CategoricalDtype):  # labelled codes: the file's order
            present = set(s.dropna())
            return cls(variable, tuple(c for c in s.cat.categories if c in present))
        values = pd.unique(s.dropna())
        try:
            levels = tuple(sorted(values.tolist()))
        except TypeError:
            levels = tuple(sorted(values.tolist(), key=str))
        return cls(variable, levels)

    @property
    def df(self) -> int:
        return max(len(self.levels) - 1, 0)

    def names(self) -> tuple[str, ...]:
        return tuple(f"{self.variable}[{lv}]" for lv in self.levels[1:])

    def basis(self, x: Any) -> np.ndarray:
        arr = np.asarray(x, dtype=object)
        cols = [(arr == lv).astype(float) for lv in self.levels[1:]]
        return np.column_stack(cols) if cols else np.zeros((len(arr), 0))

    def describe(self) -> str:
        return f"factor, reference {self.levels[0]!r}"

    def to_dict(self) -> dict[str, Any]:
        return {"term": "categorical", "variable": self.variable,
                "levels": [str(v) for v in self.levels]}
