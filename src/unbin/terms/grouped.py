"""Legacy group indicators against a reference group."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Literal

import numpy as np


@dataclass(frozen=True)
class GroupedTerm:
    """Indicators of every group but the reference, for cuts applied as the legacy paper did.

    ``closed="left"``: a value equal to a cut falls in the group above it; ``"right"``: below.
    """

    variable: str
    cuts: tuple[float, ...]
    closed: str
    labels: tuple[str, ...]
    reference: int = 0

    @property
    def df(self) -> int:
        return len(self.cuts)

    @property
    def others(self) -> tuple[int, ...]:
        return tuple(j for j in range(len(self.labels)) if j != self.reference)

    def names(self) -> tuple[str, ...]:
        return tuple(f"{self.variable}[{self.labels[j]}]" for j in self.others)

    def codes(self, x: Any) -> np.ndarray:
        side: Literal["left", "right"] = "right" if self.closed == "left" else "left"
        return np.searchsorted(np.asarray(self.cuts, dtype=float), np.asarray(x, dtype=float),
                               side=side)

    def basis(self, x: Any) -> np.ndarray:
        c = self.codes(x)
        return np.column_stack([(c == j).astype(float) for j in self.others]) if self.others \
            else np.zeros((len(c), 0))

    def describe(self) -> str:
        return f"groups at {', '.join(f'{c:g}' for c in self.cuts)} (closed {self.closed})"

    def to_dict(self) -> dict[str, Any]:
        return {"term": "grouped", "variable": self.variable, "cuts": list(self.cuts),
                "closed": self.closed, "labels": list(self.labels),
                "reference": self.labels[self.reference]}
