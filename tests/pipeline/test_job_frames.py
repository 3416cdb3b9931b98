"""The jobs keep no reference to the extract's frame once the analysis sample is built (at
registry size the frame is hundreds of MB that the fits do not need)."""

from __future__ import annotations

import gc
import sys
import weakref
from pathlib import Path
from typing import Any

import pandas as pd
import pytest

from unbin.pipeline import jobs
from unbin.refit import analysis as refit_module

sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "benchmarks"))
import registry  # noqa: E402


@pytest.mark.parametrize("job", ["fit", "resample"])
def test_the_extract_frame_is_freed_before_the_refits(tmp_path: Path, job: str,
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    spec_path = registry.write_inputs(tmp_path / "in", 3_000, 2, 2, only=("ldl_bmi",))
    frames: list[weakref.ref[pd.DataFrame]] = []
    alive: list[bool] = []
    read = jobs.read_extract

    def reading(*a: Any, **k: Any) -> pd.DataFrame:
        df = read(*a, **k)
        frames.append(weakref.ref(df))
        return df

    name = "refit_analysis" if job == "fit" else "bare_refit"
    refit = getattr(refit_module, name)

    def refitting(*a: Any, **k: Any) -> Any:
        gc.collect()  # a reference cycle would not count as held
        alive.append(frames[-1]() is not None)
        return refit(*a, **k)

    monkeypatch.setattr(jobs, "read_extract", reading)
    monkeypatch.setattr(refit_module, name, refitting)
    run = jobs.fit_analysis if job == "fit" else jobs.resample_analysis
    run(spec_path, "registry", "ldl_bmi", tmp_path / "out")
    assert alive == [False]
    status = pd.read_parquet(tmp_path / "out" / ("status.parquet" if job == "fit"
                                                 else "confounding.parquet"))
    assert len(status) > 0
    if job == "fit":
        assert status["status"].iloc[0] == "ok", status["message"].iloc[0]
