"""Each table builder writes exactly the columns its module states (``COLUMNS``, read through
``unbin.questions.table_columns``), in that order, for every outcome family, on a small seeded
invented sample with an effect modifier and a reported legacy result."""

from __future__ import annotations

import importlib
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from unbin.data import analysis_sample
from unbin.questions import KEY_COLUMNS, QUESTION_TABLES, RESAMPLING_TABLES, table_columns
from unbin.refit.analysis import Refit, refit_analysis
from unbin.spec import Spec, parse_spec

OUTCOMES = {
    "binary": {"type": "binary", "event": "y"},
    "continuous": {"type": "continuous", "value": "v"},
    "count": {"type": "count", "count": "c", "persontime": "pt"},
    "survival": {"type": "survival", "time": "t", "event": "d", "horizon": 5,
                 "follow_up_windows": [2]},
    "competing": {"type": "survival", "time": "t", "event": "e", "horizon": 5,
                  "follow_up_windows": [2], "competing": [2]},
}
TABLES = {**QUESTION_TABLES, **RESAMPLING_TABLES}


def _frame(seed: int = 7, n: int = 300) -> pd.DataFrame:
    """Invented: a biomarker x, a confounder z, a three-site modifier, and one outcome of each
    family depending on both."""
    rng = np.random.default_rng(seed)
    x = rng.normal(60.0, 15.0, n)
    z = rng.normal(size=n) + 0.02 * (x - 60.0)
    site = rng.integers(0, 3, n)
    lp = -1.0 + 0.03 * (x - 60.0) + 0.5 * z
    t = rng.exponential(10.0 / np.exp(0.5 * lp))
    return pd.DataFrame({
        "x": x, "z": z, "site": site,
        "y": (rng.random(n) < 1.0 / (1.0 + np.exp(-lp))).astype(int),
        "v": lp + rng.normal(size=n), "c": rng.poisson(np.exp(lp)), "pt": np.ones(n),
        "t": np.minimum(t, 8.0), "d": (t < 8.0).astype(int),
        "e": np.where(t < 8.0, 1 + (rng.random(n) < 0.3), 0)})


def _refit(family: str) -> tuple[Refit, Spec]:
    thresholds = [0.2, 0.3] if family in ("binary", "survival", "competing") else [1.0]
    raw: dict[str, Any] = {
        "study": "sim", "cohorts": [{"name": "c", "path": "unused.csv"}],
        "groupings": {"x": {"cuts": [50, 60, 70]}, "z": {"quantiles": 3}},
        "analyses": [{"name": "a", "outcome": OUTCOMES[family], "exposure": "x",
                      "adjust": ["z"], "by": "site", "risk_thresholds": thresholds,
                      "reported": {"contrast": ">=70 vs <50", "estimate": 1.5, "lower": 1.1,
                                   "upper": 2.0}}],
        "continuous": {"spline_knots": [3, 4]},
        "resampling": {"bootstrap": 10, "permutations": 10}, "seed": 3}
    spec = parse_spec(raw, base=Path("."))
    a = spec.analyses[0]
    return refit_analysis(analysis_sample(_frame(), a, spec), a, spec, "c"), spec


SURVIVAL_ONLY = {"hazards", "windows"}  # empty frames with the stated columns otherwise
RATIO_ONLY = {"as_published"}  # empty for a continuous outcome
COMPETING_ONLY = {"subdistribution"}  # survival with competing events only


@pytest.mark.parametrize("family", sorted(OUTCOMES))
def test_every_builder_writes_its_stated_columns(family: str) -> None:
    r, spec = _refit(family)
    for table, target in TABLES.items():
        module, function = target.split(":")
        out = getattr(importlib.import_module(f"unbin.{module}"), function)(r, spec)
        assert tuple(out.columns) == table_columns(table), (family, table)
        assert not set(KEY_COLUMNS) & set(out.columns), (family, table)  # the pipeline adds them
        if ((table in SURVIVAL_ONLY and family not in ("survival", "competing"))
                or (table in COMPETING_ONLY and family != "competing")
                or (table in RATIO_ONLY and family == "continuous")):
            assert len(out) == 0, (family, table)
            continue
        assert len(out) > 0, (family, table)  # the columns of real rows, not of an empty frame


def test_stated_columns_are_distinct_names() -> None:
    for table in TABLES:
        cols = table_columns(table)
        assert len(set(cols)) == len(cols) and all(isinstance(c, str) and c for c in cols), table
