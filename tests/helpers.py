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


def keep_analyses(raw: dict[str, Any], *names: str) -> dict[str, Any]:
    """The demo spec cut down to the named analyses, with the published studies of the others
    left out too (a study must name an analysis of the spec)."""
    raw["analyses"] = [a for a in raw["analyses"] if a["name"] in names]
    published = raw.get("published")
    if published:
        studies = [s for s in published.get("studies", []) if s.get("analysis") in names]
        if studies:
            raw["published"] = {**published, "studies": studies}
        else:
            raw.pop("published")
    return raw
