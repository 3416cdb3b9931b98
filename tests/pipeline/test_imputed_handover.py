"""What an imputed analysis' fit job hands its resampling job (``jobs.HANDOVER``): the imputed
sets rebuilt from it are the frames imputation gave, and the resampling job that reads it (and
the fit job's tables) writes the tables the resampling job wrote when it imputed and refitted
every set again (``imputed.resampling_tables``). Checks of identity, not of statistics: the
statistics of these tables are checked in test_imputed_tables.py."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from unbin.data import Sample
from unbin.data.impute import Target, impute_chained
from unbin.pipeline import imputed, jobs
from unbin.questions import KEY_COLUMNS, RESAMPLING_TABLES
from unbin.results.tables import read_table
from unbin.spec import load_spec

sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "benchmarks"))
import registry  # noqa: E402


def _incomplete(seed: int, n: int = 400) -> pd.DataFrame:
    """A numeric, a string and a small-integer column with missing values, and a complete one."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    level = np.where(x + rng.normal(size=n) > 0, "high", "low").astype(object)
    count = rng.integers(0, 3, n).astype(float)
    df = pd.DataFrame({"x": x, "level": level, "count": count, "y": x + rng.normal(size=n)})
    for c, share in (("x", 0.1), ("level", 0.15), ("count", 0.05)):
        df.loc[rng.random(n) < share, c] = np.nan
    return df


def test_restored_sets_are_the_imputed_frames() -> None:
    frame = _incomplete(3)
    targets = [Target("x", "numeric"), Target("level", "categorical"),
               Target("count", "categorical")]
    sets = impute_chained(frame, targets, frame[["y"]].to_numpy(), 3, 2,
                          np.random.default_rng(8))
    sample = Sample(frame, len(frame), ())
    first = imputed.FitsOnly([])
    state = imputed.handover_state(sample, sets, first, None)
    assert set(state["filled"]) == {"x", "level", "count"}
    restored = imputed.restored_sets(sample, state)
    assert len(restored) == 3
    for got, want in zip(restored, sets, strict=True):
        pd.testing.assert_frame_equal(got.frame, want, check_exact=True)
        assert not got.frame[["x", "level", "count"]].isna().any().any()
    # a sample that is not the one imputed is refused, not filled
    with pytest.raises(ValueError):
        imputed.restored_sets(Sample(frame.iloc[1:], len(frame), ()), state)
    other = frame.copy()
    other.loc[other["x"].notna().idxmax(), "x"] = np.nan  # one more missing cell
    with pytest.raises(ValueError):
        imputed.restored_sets(Sample(other, len(other), ()), state)


def _tables(folder: Path, names: tuple[str, ...]) -> dict[str, pd.DataFrame]:
    return {n: read_table(folder / f"{n}.parquet") for n in names}


@pytest.mark.parametrize("analysis", ["readmit_sodium", "death_egfr_competing"])
def test_resampling_job_from_the_handover_writes_the_tables_it_wrote_refitting(
        tmp_path: Path, analysis: str, monkeypatch: pytest.MonkeyPatch) -> None:
    """The fit job, then the resampling job reading its handover, against the resampling job
    without it (imputation and every set's refits again): the same tables, value for value;
    and the resampling job from the handover neither imputes nor refits."""
    spec_path = registry.write_inputs(tmp_path / "in", 2_000, 12, 10, imputations=2,
                                      only=(analysis,), competing=True)
    fit_dir, old_dir = tmp_path / "fit", tmp_path / "old"
    status = jobs.fit_analysis(spec_path, "registry", analysis, fit_dir)
    # (at this size egfr's lowest legacy group is empty: "partial", the other tables complete)
    assert status["status"] in ("ok", "partial"), status["message"]
    jobs.resample_analysis(spec_path, "registry", analysis, old_dir)  # no handover: all again

    def refused(*a: object, **k: object) -> None:
        raise AssertionError("the resampling job imputed or refitted again")

    monkeypatch.setattr(imputed, "impute_chained", refused)
    monkeypatch.setattr(imputed, "analyse_imputed", refused)
    jobs.resample_analysis(spec_path, "registry", analysis, fit_dir,
                           handover=fit_dir / jobs.HANDOVER)
    old, new = _tables(old_dir, tuple(RESAMPLING_TABLES)), _tables(fit_dir,
                                                                  tuple(RESAMPLING_TABLES))
    for name in RESAMPLING_TABLES:
        assert len(old[name]) > 0, name
        pd.testing.assert_frame_equal(new[name], old[name], check_exact=True, obj=name)
    # numbers, not only failures: the pooled decision bootstrap (and with a legacy group in
    # every set, the information bootstrap; egfr's lowest is empty at this size)
    assert (new["decision_resampling"]["status"] == "ok").all()
    if analysis == "readmit_sodium":
        assert (new["information_bootstrap"]["status"] == "ok").all()


def test_a_complete_case_fit_job_hands_over_nothing(tmp_path: Path) -> None:
    spec_path = registry.write_inputs(tmp_path / "in", 1_000, 2, 2, only=("ldl_bmi",))
    jobs.fit_analysis(spec_path, "registry", "ldl_bmi", tmp_path / "out")
    assert imputed.load_handover(tmp_path / "out" / jobs.HANDOVER) == {}


def test_a_stopped_imputed_analysis_hands_over_nothing_and_its_resampling_tables_are_empty(
        tmp_path: Path) -> None:
    """The fit job stops (too few rows after the filter): the handover is empty and the
    resampling job that reads it writes empty tables, as it did when it imputed again."""
    spec_path = registry.write_inputs(tmp_path / "in", 1_000, 2, 2, imputations=2,
                                      only=("ldl_bmi",))
    text = spec_path.read_text()
    spec_path.write_text(text.replace("  exposure: bmi\n", "  exposure: bmi\n  filters:\n"
                                      "  - variable: age\n    min: 200\n", 1))
    assert load_spec(spec_path).analysis("ldl_bmi").filters
    out = tmp_path / "out"
    status = jobs.fit_analysis(spec_path, "registry", "ldl_bmi", out)
    assert status["status"] == "failed"
    assert imputed.load_handover(out / jobs.HANDOVER) == {}
    jobs.resample_analysis(spec_path, "registry", "ldl_bmi", out, handover=out / jobs.HANDOVER)
    for name in RESAMPLING_TABLES:
        assert list(read_table(out / f"{name}.parquet").columns) == list(KEY_COLUMNS)
