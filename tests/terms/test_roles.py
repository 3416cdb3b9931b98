"""The rule deciding how a column enters the models (unbin.terms.roles), as the README states it:
grouped when it has a legacy grouping and is not declared categorical; else a factor when
declared categorical, non-numeric, boolean or numeric with at most 5 distinct values, unless
``variables.<name>.type`` says otherwise; else numeric."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from unbin.data import data_problems
from unbin.spec import Spec, parse_spec
from unbin.terms.roles import MAX_FACTOR_LEVELS, is_grouped, variable_role


def _spec(variables: dict[str, dict[str, str]] | None = None, base: Path = Path(".")) -> Spec:
    raw = {"study": "s", "cohorts": [{"name": "c", "path": "c.csv"}],
           "groupings": {"x": {"cuts": [1.0]}, "g": {"cuts": [2.0]}},
           "analyses": [{"name": "a", "outcome": {"type": "binary", "event": "y"},
                         "exposure": "x", "adjust": ["g"]}],
           "variables": variables or {}}
    return parse_spec(raw, base=base)


@pytest.mark.parametrize(("values", "declared", "role"), [
    (np.arange(5.0), None, "factor"),                   # 5 distinct values: the limit
    (np.arange(6.0), None, "numeric"),                  # one more: numeric
    (np.arange(5.0), "numeric", "numeric"),             # declared numeric keeps few values numeric
    (np.arange(50.0), "categorical", "factor"),         # declared categorical, many values
    (np.array(["a", "b"] * 20), None, "factor"),        # text
    (np.array([True, False] * 20), None, "factor"),     # boolean
    (np.r_[np.arange(5.0), [np.nan] * 3], None, "factor"),  # missing values are not a level
])
def test_ungrouped_column_role(values: np.ndarray, declared: str | None, role: str) -> None:
    spec = _spec({"z": {"type": declared}} if declared else None)
    assert MAX_FACTOR_LEVELS == 5
    assert variable_role("z", spec, pd.Series(values)) == role


def test_a_grouping_wins_unless_declared_categorical() -> None:
    many = pd.Series(np.linspace(0.0, 4.0, 40))
    assert variable_role("g", _spec(), many) == "grouped"
    assert variable_role("g", _spec(), pd.Series([0.0, 3.0] * 20)) == "grouped"  # few values
    declared = _spec({"g": {"type": "categorical"}})
    assert not is_grouped("g", declared)
    assert variable_role("g", declared, many) == "factor"


def test_a_grouped_adjuster_declared_categorical_may_hold_text(tmp_path: Path) -> None:
    """The data checks follow the same rule: a grouping on a column declared categorical does
    not make it a numeric column, so text codes are accepted; without the declaration they are
    reported."""
    frame = pd.DataFrame({"x": np.linspace(0, 2, 40), "g": ["low", "high"] * 20,
                          "y": [0, 1] * 20})
    frame.to_csv(tmp_path / "c.csv", index=False)
    declared = _spec({"g": {"type": "categorical"}}, tmp_path)
    assert data_problems(declared, {"c": frame}) == []
    problems = data_problems(_spec(base=tmp_path), {"c": frame})
    assert any("'g'" in p for p in problems), problems
