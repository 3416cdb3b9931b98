"""How a column enters the models: the one rule, used by the data checks, the analysis sample,
the adjustment terms, the effect modifier and the cut-point audit.

- ``grouped``: the variable has a legacy grouping (``groupings.<name>``) and is not declared
  categorical: its legacy groups under legacy adjustment, a restricted cubic spline under
  continuous adjustment.
- ``factor``: declared ``variables.<name>.type: categorical``, or, with no declared type, a
  non-numeric or boolean column, or a numeric one with at most :data:`MAX_FACTOR_LEVELS` distinct
  values: one indicator per level, the first sorted level as reference.
- ``numeric``: any other column: linear under legacy adjustment, a restricted cubic spline under
  continuous adjustment. A declared ``type: numeric`` keeps a column with few values numeric.
"""

from __future__ import annotations

from typing import Literal

import pandas as pd

from ..spec import Spec

MAX_FACTOR_LEVELS = 5  # a numeric column with this many distinct values or fewer is a factor
Role = Literal["grouped", "factor", "numeric"]


def declared_type(variable: str, spec: Spec) -> str | None:
    """``variables.<name>.type`` of the spec, or None when the spec declares none."""
    info = spec.variables.get(variable)
    return info.type if info else None


def is_grouped(variable: str, spec: Spec) -> bool:
    """True when the variable enters in its legacy groups (legacy coding): it has a grouping
    and is not declared categorical. Needs no data."""
    return variable in spec.groupings and declared_type(variable, spec) != "categorical"


def is_factor(values: pd.Series, declared: str | None = None) -> bool:
    """True when an ungrouped column enters as a factor (module docstring)."""
    if declared is not None:
        return declared == "categorical"
    if not pd.api.types.is_numeric_dtype(values) or pd.api.types.is_bool_dtype(values):
        return True
    return bool(values.dropna().nunique() <= MAX_FACTOR_LEVELS)


def variable_role(variable: str, spec: Spec, values: pd.Series) -> Role:
    """How ``variable`` enters the models: grouped, factor or numeric (module docstring)."""
    if is_grouped(variable, spec):
        return "grouped"
    return "factor" if is_factor(values, declared_type(variable, spec)) else "numeric"
