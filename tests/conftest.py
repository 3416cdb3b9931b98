"""Shared helpers: build a spec from a dict and refit one analysis on an in-memory frame."""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pandas as pd
import pytest

from unbin.data import analysis_sample
from unbin.refit.analysis import Refit, refit_analysis
from unbin.spec import Spec, parse_spec


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    """Simulations marked ``long`` (many minutes each) run only with UNBIN_LONG_CHECKS=1; a
    shorter version of each runs always."""
    if os.environ.get("UNBIN_LONG_CHECKS") == "1":
        return
    skip = pytest.mark.skip(reason="long simulation: set UNBIN_LONG_CHECKS=1 to run it")
    for item in items:
        if "long" in item.keywords:
            item.add_marker(skip)


def _one_analysis(outcome: dict[str, Any], exposure: str, grouping: dict[str, Any],
                  **extra: Any) -> dict[str, Any]:
    return {
        "study": "sim",
        "cohorts": [{"name": "sim", "path": "sim.parquet"}],
        "groupings": {exposure: grouping},
        "analyses": [{"name": "a", "outcome": outcome, "exposure": exposure}],
        **extra,
    }


@pytest.fixture
def one_analysis() -> Callable[..., dict[str, Any]]:
    """Builder of a raw spec with one cohort, one grouping and one analysis:
    ``one_analysis(outcome, exposure, grouping, **top_level_keys)``."""
    return _one_analysis


@pytest.fixture
def refit_frame(tmp_path: Path) -> Callable[[pd.DataFrame, dict[str, Any]], tuple[Spec, Refit]]:
    """Parse ``raw`` and run every fit of its first analysis on ``frame`` (no files read)."""

    def run(frame: pd.DataFrame, raw: dict[str, Any]) -> tuple[Spec, Refit]:
        spec = parse_spec(raw, base=tmp_path)
        a = spec.analyses[0]
        return spec, refit_analysis(analysis_sample(frame, a, spec), a, spec, spec.cohorts[0].name)

    return run


@pytest.fixture(scope="session")
def demo_out(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo run once per test session (through the real workflow), shared by every test
    that reads its outputs."""
    import subprocess
    import sys

    out = tmp_path_factory.mktemp("demo")
    proc = subprocess.run([sys.executable, "-m", "unbin.cli", "demo", "--out", str(out),
                           "--cores", "2"], capture_output=True, text=True, timeout=900)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    return out
