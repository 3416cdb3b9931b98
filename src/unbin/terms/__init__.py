"""Design columns, one transform per module. Every term is a frozen object that keeps what it
needs (knots, cuts, shift, powers, levels) to rebuild its basis exactly on a grid or new data."""

from __future__ import annotations

from typing import Any, Protocol

import numpy as np

from .categorical import CategoricalTerm
from .fp import FP_POWERS, FPTerm, fp_shift
from .grouped import GroupedTerm
from .linear import LinearTerm
from .spline import SplineTerm, default_knots


class Term(Protocol):
    @property
    def variable(self) -> str: ...

    @property
    def df(self) -> int: ...

    def names(self) -> tuple[str, ...]: ...

    def basis(self, x: Any) -> np.ndarray: ...

    def describe(self) -> str: ...

    def to_dict(self) -> dict[str, Any]: ...


__all__ = ["FP_POWERS", "CategoricalTerm", "FPTerm", "GroupedTerm", "LinearTerm", "SplineTerm",
           "Term", "default_knots", "fp_shift"]
