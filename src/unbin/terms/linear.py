"""A variable entered as it is (one column)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np


@dataclass(frozen=True)
class LinearTerm:
    variable: str

    @property
    def df(self) -> int:
        return 1

    def names(self) -> tuple[str, ...]:
        return (self.variable,)

    def basis(self, x: Any) -> np.ndarray:
        return np.asarray(x, dtype=float).reshape(-1, 1)

    def describe(self) -> str:
        return "linear"

    def to_dict(self) -> dict[str, Any]:
        return {"term": "linear", "variable": self.variable}
