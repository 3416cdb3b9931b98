"""The summary prints the information kept with a bootstrap interval only when the interval's
own table holds the same point (hand-made tables)."""

from __future__ import annotations

import pandas as pd

from unbin.present import summary


def _tables(boot_point: float) -> dict[str, pd.DataFrame]:
    info = pd.DataFrame([{"cohort": "north", "analysis": "a", "adjustment": "legacy",
                          "info_kept": 0.91, "best_form": "spline"}])
    boot = pd.DataFrame([{"cohort": "north", "analysis": "a", "adjustment": "legacy",
                          "info_kept": boot_point, "info_kept_lower": 0.74,
                          "info_kept_upper": 0.85, "status": "ok", "message": ""}])
    status = pd.DataFrame([{"cohort": "north", "analysis": "a", "status": "ok", "message": "",
                            "n_input": 500, "n_used": 480, "family": "count",
                            "exposure": "x"}])
    return {"information": info, "information_bootstrap": boot, "status": status}


def test_interval_of_the_same_point_is_printed() -> None:
    (row,) = summary.analysis_rows(_tables(0.91), [("north", "a")])
    assert row["kept"] == "91% (74% to 85%)"
    assert summary.kept_interval(_tables(0.91), "north", "a") == "74% to 85%"


def test_interval_of_another_quantity_is_not_printed() -> None:
    """A robust Wald share of 91% beside the percentile interval of a resampled
    likelihood-ratio share of 80% (another quantity): the point stands alone."""
    (row,) = summary.analysis_rows(_tables(0.80), [("north", "a")])
    assert row["kept"] == "91%"
    assert summary.kept_interval(_tables(0.80), "north", "a") == ""
    missing = _tables(0.91)
    missing["information"] = missing["information"].iloc[:0]
    assert summary.kept_interval(missing, "north", "a") == ""
