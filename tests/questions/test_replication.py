"""Tests of replication (unbin.questions.replication) against a logistic fit by statsmodels on the Spector &
Mazzeo data it ships, and of the demo filling every "what the grouping cost" table."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from unbin.data import analysis_sample
from unbin.demo import demo_spec, simulate_registry
from unbin.pipeline.jobs import analyse
from unbin.questions.replication import replication_table, reported_se
from unbin.refit.analysis import refit_analysis
from unbin.spec import parse_spec

Z95 = 1.959963984540054


@pytest.fixture(scope="module")
def spector() -> pd.DataFrame:
    return sm.datasets.spector.load_pandas().data


@pytest.fixture(scope="module")
def reference(spector: pd.DataFrame) -> Any:
    """statsmodels' logit of GRADE on GPA >= 3, TUCE and PSI: the legacy model refitted by hand."""
    X = sm.add_constant(pd.DataFrame({"hi": (spector["GPA"] >= 3).astype(float),
                                      "TUCE": spector["TUCE"], "PSI": spector["PSI"]}))
    return sm.Logit(spector["GRADE"], X).fit(disp=0)


def _table(df: pd.DataFrame, reported: dict[str, Any] | None) -> pd.DataFrame:
    analysis: dict[str, Any] = {"name": "grade_gpa", "outcome": {"type": "binary",
                                                                 "event": "GRADE"},
                                "exposure": "GPA", "adjust": ["TUCE", "PSI"],
                                "continuous": {"forms": ["linear"], "spline_knots": [3]}}
    if reported is not None:
        analysis["reported"] = reported
    raw = {"study": "spector", "cohorts": [{"name": "c", "path": "unused.csv"}],
           "groupings": {"GPA": {"cuts": [3.0]}}, "analyses": [analysis]}
    spec = parse_spec(raw, base=Path("."))
    a = spec.analysis("grade_gpa")
    r = refit_analysis(analysis_sample(df, a, spec), a, spec, "c")
    return replication_table(r, spec)


def test_reported_standard_error_from_the_interval(reference: Any) -> None:
    """The SE recovered from a 95% Wald interval equals the fit's SE (statsmodels)."""
    lo, hi = np.exp(reference.conf_int().loc["hi"])
    assert reported_se(lo, hi, ratio=True) == pytest.approx(reference.bse["hi"], rel=1e-9)
    assert reported_se(-1.0, 3.0, ratio=False) == pytest.approx(4.0 / (2 * Z95))


def test_published_numbers_of_the_same_data_agree(spector: pd.DataFrame,
                                                  reference: Any) -> None:
    or_, (lo, hi) = np.exp(reference.params["hi"]), np.exp(reference.conf_int().loc["hi"])
    rep = {"contrast": ">=3 vs <3", "estimate": round(float(or_), 2),
           "lower": round(float(lo), 2), "upper": round(float(hi), 2)}
    row = _table(spector, rep).iloc[0]
    assert row["status"] == "ok"
    assert row["refit_effect"] == pytest.approx(or_, rel=1e-5)
    assert row["se"] == pytest.approx(reference.bse["hi"], rel=1e-4)
    assert row["verdict"] == "agrees" and not row["disagrees"]
    assert abs(row["difference_se_units"]) < 0.05  # rounding to 2 decimals only
    assert row["se_ratio"] == pytest.approx(1.0, abs=0.02)


def test_a_different_estimate_or_precision_is_flagged(spector: pd.DataFrame,
                                                      reference: Any) -> None:
    b, se = float(reference.params["hi"]), float(reference.bse["hi"])
    # the reported estimate 2.5 SE away: outside the refit's 95% interval
    far = np.exp(b + 2.5 * se)
    row = _table(spector, {"contrast": ">=3 vs <3", "estimate": far,
                           "lower": far * np.exp(-Z95 * se), "upper": far * np.exp(Z95 * se)})
    row = row.iloc[0]
    assert bool(row["disagrees"]) and row["verdict"] == "estimate differs"
    assert row["difference_se_units"] == pytest.approx(-2.5, abs=1e-3)
    # 1.5 SE away: inside the interval; the reported interval twice as wide (a sample a quarter
    # the size): precision differs
    near = np.exp(b + 1.5 * se)
    row = _table(spector, {"contrast": ">=3 vs <3", "estimate": near,
                           "lower": near * np.exp(-2 * Z95 * se),
                           "upper": near * np.exp(2 * Z95 * se)}).iloc[0]
    assert not bool(row["disagrees"]) and row["verdict"] == "precision differs"
    assert row["implied_n_ratio"] == pytest.approx(0.25, rel=1e-3)
    # the contrast read the other way round is the reciprocal
    row = _table(spector, {"contrast": "<3 vs >=3", "estimate": float(np.exp(-b))}).iloc[0]
    assert row["refit_effect"] == pytest.approx(np.exp(-b), rel=1e-5)
    assert row["verdict"] == "agrees" and pd.isna(row["reported_se"])


def test_without_reported_numbers_the_table_is_empty(spector: pd.DataFrame) -> None:
    tab = _table(spector, None)
    assert tab.empty and "verdict" in tab.columns


def test_demo_fills_every_grouping_cost_table() -> None:
    """The demo scenario (smaller, for speed): its data-derived urate cut gets a search row and
    its two reported estimates a replication row each; ranges and confounding are filled."""
    raw = demo_spec()
    raw["resampling"] = {"bootstrap": 20, "permutations": 99}
    raw["continuous"] = {"forms": ["linear", "spline"], "spline_knots": [4]}  # no FP search
    spec = parse_spec(raw, base=Path("."))
    frame = simulate_registry(2000)
    assert spec.groupings["urate"].derived_from_data
    assert sum(a.reported is not None for a in spec.analyses) == 2
    out: dict[str, list[pd.DataFrame]] = {}
    for name in ("sbp_urate", "death_egfr"):
        tables, status = analyse(spec, "lindenfeld", name, frame)
        assert status["status"] in ("ok", "partial"), status["message"]
        for q in ("ranges", "confounding", "cutpoints", "replication"):
            out.setdefault(q, []).append(tables[q])
    search = pd.concat(out["cutpoints"])
    search = search[search["row_type"] == "search"]
    assert len(search) == 1 and search["status"].iloc[0] == "ok"
    assert search[["p_naive", "p_lausen", "boot_cut_p50"]].notna().all(axis=None)
    # the urate analysis adjusts: the search uses the adjusted score statistic, which has no
    # permutation p-value (a permuted exposure loses its association with the adjusters)
    assert search["statistic_name"].iloc[0].startswith("score chi-square of the split, adjusted")
    assert search["p_permutation"].isna().all() and (search["permutations"] == 0).all()
    assert search["p_simulated"].notna().all()
    assert len(pd.concat([t for t in out["replication"] if len(t)])) == 1  # death_egfr reports
    for q in ("ranges", "confounding"):
        assert all((t["status"] == "ok").any() for t in out[q])
