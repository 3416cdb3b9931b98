"""The effect modifier ``by`` of an analysis: the one place that says what its levels are.

- a ``by`` variable with a legacy grouping (and not declared categorical): the legacy groups,
  reference the grouping's reference group;
- a categorical ``by`` (declared, non-numeric, or numeric with few distinct values): its
  categories, reference the first sorted category;
- a numeric ``by`` with many values and no grouping: no levels (a note says how to get them).

The level factor (:func:`modifier_term`) enters every adjusted model of the analysis, under the
legacy and the continuous adjustment coding alike; the interaction models
(:mod:`unbin.refit.interaction`) read the same levels back from it (:func:`levels_from_terms`).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ..spec import Analysis, Spec
from ..terms import CategoricalTerm, GroupedTerm
from ..terms.legacy import legacy_term
from ..terms.roles import variable_role

LevelTerm = GroupedTerm | CategoricalTerm


@dataclass(frozen=True)
class Levels:
    """The levels of the effect modifier: labels, every sample row's level code (an index into
    ``labels``) and the reference level. Without levels there is one level, "all"."""

    variable: str
    labels: tuple[str, ...]
    codes: np.ndarray
    reference: int = 0
    note: str = ""

    @property
    def active(self) -> bool:
        return bool(self.variable) and len(self.labels) >= 2


def no_levels_note(variable: str) -> str:
    return (f"effect modifier {variable!r} is numeric with many values and has no grouping: "
            "no levels (declare groupings for it to get per-level results)")


def modifier_term(df: pd.DataFrame, a: Analysis, spec: Spec) -> LevelTerm | None:
    """The factor of the levels of ``a.by`` on the rows of ``df``, or None (no ``by``, or a
    numeric ``by`` with many values and no grouping)."""
    if not a.by:
        return None
    values = df[a.by]
    role = variable_role(a.by, spec, values)
    if role == "grouped":
        return legacy_term(values.to_numpy(float), a.by, spec)
    if role == "factor":
        return CategoricalTerm.from_data(a.by, values)
    return None


def level_codes(term: LevelTerm, values: Any) -> np.ndarray:
    """Every row's level code (index into the term's labels or levels)."""
    if isinstance(term, GroupedTerm):
        return np.asarray(term.codes(np.asarray(values, dtype=float)), dtype=np.int64)
    idx = pd.Index(list(term.levels), dtype=object).get_indexer(
        pd.Series(values).astype(object))
    return np.asarray(idx, dtype=np.int64)


def levels_of(term: LevelTerm, values: Any) -> Levels:
    if isinstance(term, GroupedTerm):
        return Levels(term.variable, term.labels, level_codes(term, values), term.reference)
    return Levels(term.variable, tuple(str(v) for v in term.levels), level_codes(term, values))


def levels_from_terms(by: str | None, adjust: Iterable[Any], frame: pd.DataFrame,
                      n: int) -> Levels:
    """The levels of ``by`` as the adjustment terms ``adjust`` enter it (the factor that
    :func:`modifier_term` made); one level "all" with a note when ``by`` has no factor."""
    one = Levels("", ("all",), np.zeros(n, dtype=np.int64))
    if not by:
        return one
    for t in adjust:
        if isinstance(t, GroupedTerm | CategoricalTerm) and t.variable == by:
            return levels_of(t, frame[by])
    return Levels("", ("all",), np.zeros(n, dtype=np.int64), 0, no_levels_note(by))
