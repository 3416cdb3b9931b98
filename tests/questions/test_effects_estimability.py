"""The effects table's contrasts (unbin.questions.effects): what cannot be estimated says so, the per-unit
effect does not depend on the grouping, and every contrast reads "group vs reference".

References: statsmodels OLS on the same explicit design (indicators, the exposure) — an
independent least-squares fit; the estimability rules are common practice (a grouped model
gives every value in one group the same prediction, so it cannot contrast two of them)."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from unbin.questions.effects import effects_table

CONTINUOUS = {"type": "continuous", "value": "y"}


def _frame(seed: int = 5, n: int = 2000) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.normal(50.0, 10.0, size=n)
    return pd.DataFrame({"x": x, "y": 0.05 * x + rng.normal(size=n)})


def _effects(refit_frame: Any, one_analysis: Any, frame: pd.DataFrame,
             grouping: dict[str, Any]) -> tuple[pd.DataFrame, Any]:
    raw = one_analysis(CONTINUOUS, "x", grouping,
                       continuous={"forms": ["linear", "spline"], "spline_knots": [4]})
    _, r = refit_frame(frame, raw)
    return effects_table(r), r


def test_an_empty_group_is_a_not_estimable_row_not_a_missing_one(refit_frame: Any,
                                                                 one_analysis: Any) -> None:
    """Cuts at 0 and 40 on x ~ N(50, 10): the lowest group '<0' has no rows. Every form keeps a
    row for it (status not_estimable, NaN estimate, a message naming the group); the groups
    with rows still give their contrasts."""
    frame = _frame()
    eff, _ = _effects(refit_frame, one_analysis, frame,
                      {"cuts": [0.0, 40.0], "labels": ["<0", "0-<40", ">=40"],
                       "reference": "0-<40"})
    groups = eff[eff["contrast_type"] == "group"]
    for (coding, form), g in groups.groupby(["adjustment", "form"]):
        assert list(g["group"]) == ["<0", "0-<40", ">=40"], (coding, form)
        empty = g[g["group"] == "<0"].iloc[0]
        assert empty["status"] == "not_estimable"
        assert np.isnan(empty["estimate"]) and np.isnan(empty["se"])
        assert "'<0'" in empty["message"] and "no rows" in empty["message"]
        if form != "legacy":  # the legacy fit itself cannot run with an empty group
            assert (g.loc[g["group"] != "<0", "status"] == "ok").all()
            assert g.loc[g["group"] != "<0", "estimate"].notna().all()


def test_legacy_iqr_inside_one_group_is_not_estimable(refit_frame: Any,
                                                      one_analysis: Any) -> None:
    """Cuts at 30 and 70 on x ~ N(50, 10): the 25th and 75th percentiles (about 43 and 57) both
    fall in the middle group, so the grouped model cannot contrast them (it used to report
    0 with SE 0). The continuous forms still do: the linear IQR contrast equals statsmodels'
    OLS slope times the IQR."""
    frame = _frame()
    eff, _ = _effects(refit_frame, one_analysis, frame, {"cuts": [30.0, 70.0]})
    iqr = eff[(eff["contrast_type"] == "iqr")].set_index(["adjustment", "form"])
    leg = iqr.loc[("none", "legacy")]
    assert leg["status"] == "not_estimable"
    assert np.isnan(leg["estimate"]) and np.isnan(leg["effect"])
    assert "same legacy group" in leg["message"]
    lin = iqr.loc[("none", "linear")]
    q25, q75 = np.quantile(frame["x"], [0.25, 0.75])
    slope = sm.OLS(frame["y"], sm.add_constant(frame["x"])).fit().params["x"]
    assert lin["status"] == "ok"
    assert lin["estimate"] == pytest.approx(slope * (q75 - q25), rel=1e-8)


def test_legacy_iqr_across_groups_is_the_difference_of_group_coefficients(
        refit_frame: Any, one_analysis: Any) -> None:
    """A cut at the median: the quartiles fall on either side, and the legacy IQR contrast is the
    upper group's coefficient (statsmodels OLS on the same indicator)."""
    frame = _frame()
    cut = float(np.median(frame["x"]))
    eff, _ = _effects(refit_frame, one_analysis, frame, {"cuts": [cut]})
    leg = eff[(eff["contrast_type"] == "iqr") & (eff["form"] == "legacy")
              & (eff["adjustment"] == "none")].iloc[0]
    upper = (frame["x"] >= cut).astype(float).rename("upper")
    ref = sm.OLS(frame["y"], sm.add_constant(upper)).fit()
    assert leg["status"] == "ok"
    assert leg["estimate"] == pytest.approx(ref.params["upper"], rel=1e-8)


def test_per_unit_effect_does_not_depend_on_the_grouping(refit_frame: Any,
                                                         one_analysis: Any) -> None:
    """The per-unit contrast of the linear form is the slope (statsmodels OLS) at the sample
    median, whatever the grouping — also when the reference group is empty (it used to go
    blank, taken at the empty group's median). With an empty reference group every group
    contrast is not_estimable."""
    frame = _frame()
    slope = sm.OLS(frame["y"], sm.add_constant(frame["x"])).fit().params["x"]
    median = float(np.median(frame["x"]))
    rows = []
    for grouping in ({"cuts": [45.0, 55.0]}, {"cuts": [40.0], "reference": ">=40"},
                     {"cuts": [0.0, 40.0], "reference": "<0"}):
        eff, _ = _effects(refit_frame, one_analysis, frame, grouping)
        per = eff[(eff["contrast_type"] == "per_unit") & (eff["adjustment"] == "none")]
        assert len(per) == 1, grouping
        rows.append(per.iloc[0])
        if grouping.get("reference") == "<0":
            groups = eff[eff["contrast_type"] == "group"]
            assert (groups["status"] == "not_estimable").all()
            assert groups["estimate"].isna().all()
    for row in rows:
        assert row["status"] == "ok"
        assert row["x_reference"] == pytest.approx(median, rel=1e-12)
        assert row["estimate"] == pytest.approx(slope, rel=1e-8)


def test_group_contrasts_read_group_vs_reference(refit_frame: Any, one_analysis: Any) -> None:
    """With the highest group as the reference, '<40 vs >=40' is the lower group's mean minus
    the reference's (statsmodels OLS on the lower group's indicator): negative for a rising
    truth, and the linear form's same contrast is the slope times (x_value - x_reference)."""
    frame = _frame()
    eff, _ = _effects(refit_frame, one_analysis, frame, {"cuts": [40.0], "reference": ">=40"})
    g = eff[(eff["contrast_type"] == "group") & (eff["adjustment"] == "none")
            & (eff["group"] == "<40")].set_index("form")
    assert g.loc["legacy", "contrast"] == "<40 vs >=40"
    low = (frame["x"] < 40.0).astype(float).rename("low")
    ref = sm.OLS(frame["y"], sm.add_constant(low)).fit()
    assert g.loc["legacy", "estimate"] == pytest.approx(ref.params["low"], rel=1e-8)
    assert g.loc["legacy", "estimate"] < 0
    slope = sm.OLS(frame["y"], sm.add_constant(frame["x"])).fit().params["x"]
    lin = g.loc["linear"]
    assert lin["estimate"] == pytest.approx(slope * (lin["x_value"] - lin["x_reference"]),
                                            rel=1e-8)
