"""The cut-position figure's footnote says what a percentile counts: rows, or persons when the
analysis has frequency weights (a row stands for w persons, as the cutpoints table counts
them). Expected words written out by hand."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd
import pytest

from unbin.present.figures import cutpoints as cp
from unbin.present.figures import style as st
from unbin.present.figures.base import Context
from unbin.spec import parse_spec


def _footnote(weights: dict[str, Any] | None) -> str:
    raw: dict[str, Any] = {
        "study": "tiny", "cohorts": [{"name": "sim", "path": "sim.parquet"}],
        "groupings": {"x": {"cuts": [2.0]}},
        "analyses": [{"name": "a", "exposure": "x",
                      "outcome": {"type": "binary", "event": "d"}}]}
    if weights:
        raw["weights"] = weights
    cuts = pd.DataFrame({"row_type": ["cut"], "variable": ["x"], "role": ["exposure"],
                         "cut": [2.0], "percentile": [41.0], "cohort": "sim", "analysis": "a"})
    ctx = Context({"cutpoints": cuts}, parse_spec(raw, base=Path(".")))
    with st.styled():
        drawn = cp.draw_positions(ctx, "sim", "a")
    assert drawn is not None
    texts = [t.get_text() for sub in drawn.figure.subfigs for t in sub.texts]
    return " ".join(" ".join(texts).split())


@pytest.mark.parametrize(("weights", "counted"), [
    (None, "the share of rows below it"),
    ({"column": "w", "kind": "frequency"}, "the share of persons below it"),
    ({"column": "w", "kind": "sampling"}, "the share of rows below it"),
])
def test_the_footnote_names_what_a_percentile_counts(weights: dict[str, Any] | None,
                                                     counted: str) -> None:
    assert counted in _footnote(weights)
