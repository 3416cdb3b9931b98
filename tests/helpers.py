"""Helpers shared by test modules (imported as ``helpers``; tests/ is on the import path)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd

from unbin.data import analysis_sample
from unbin.refit.analysis import Refit
from unbin.refit.analysis import bare_refit as _bare
from unbin.spec import Spec, parse_spec


def bare_refit(df: pd.DataFrame, raw: dict[str, Any], name: str = "a") -> tuple[Refit, Spec]:
    """A Refit of one analysis without any fits, for questions that fit their own models."""
    spec = parse_spec(raw, base=Path("."))
    a = spec.analysis(name)
    return _bare(analysis_sample(df, a, spec), a, spec, "sim"), spec
