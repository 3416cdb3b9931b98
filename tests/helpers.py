"""Helpers shared by test modules (imported as ``helpers``; tests/ is on the import path)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd

from unbin.data import analysis_sample
from unbin.refit import Refit, build_outcome, legacy_term
from unbin.spec import Spec, parse_spec


def bare_refit(df: pd.DataFrame, raw: dict[str, Any], name: str = "a") -> tuple[Refit, Spec]:
    """A Refit of one analysis without any fits, for questions that fit their own models."""
    spec = parse_spec(raw, base=Path("."))
    a = spec.analysis(name)
    sample = analysis_sample(df, a, spec)
    x = sample.frame[a.exposure].to_numpy(float)
    return Refit(a, "sim", sample, build_outcome(sample, a), x,
                 legacy_term(x, a.exposure, spec)), spec
