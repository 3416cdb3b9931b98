"""The cut-point audit under frequency weights (a row stands for w identical persons): the
split statistics, shares, group counts, medians and permutation p-value are those of the rows
repeated by their weights.

References: scipy.stats.chi2_contingency (Pearson chi-square of the 2x2 table, no continuity
correction) and lifelines.statistics.logrank_test on the repeated rows; the table of the
repeated rows themselves (the unweighted code path, checked against those libraries in
test_cutpoints.py)."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from lifelines.statistics import logrank_test
from scipy import stats

from helpers import bare_refit
from unbin.models.base import Outcome
from unbin.questions.cutpoints import SplitSearch, cutpoints_table


def _raw(weights: dict[str, Any] | None, **top: Any) -> dict[str, Any]:
    design = {} if weights is None else {"weights": weights}
    return {"study": "sim", "cohorts": [{"name": "c", "path": "unused.csv"}],
            "groupings": {"x": {"cuts": [-0.5, 0.4], "derived_from_data": True}},
            "analyses": [{"name": "a", "outcome": {"type": "binary", "event": "y"},
                          "exposure": "x", **design}], **top}


def _frame(seed: int, n: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = np.round(rng.normal(size=n), 2)
    y = (rng.random(n) < 1 / (1 + np.exp(-1.0 * (x > 0.2) + 0.6))).astype(int)
    return pd.DataFrame({"x": x, "y": y, "w": rng.integers(1, 5, n)})


TOP = {"seed": 3, "disclosure": {"min_cell": 1}, "resampling": {"bootstrap": 0, "permutations": 49}}


def test_frequency_weighted_table_is_the_expanded_rows_table() -> None:
    df = _frame(31, 240)
    rows = df.loc[df.index.repeat(df["w"])].drop(columns="w").reset_index(drop=True)
    a = cutpoints_table(*bare_refit(df, _raw({"column": "w", "kind": "frequency"}, **TOP)))
    b = cutpoints_table(*bare_refit(rows, _raw(None, **TOP)))
    assert list(a["row_type"]) == list(b["row_type"])
    cols = ["cut", "percentile", "median", "distance_to_median", "statistic", "p_naive", "n",
            "events", "p_lausen", "p_permutation", "n_candidates"]
    for c in cols:
        x, y = a[c].astype(float).to_numpy(), b[c].astype(float).to_numpy()
        np.testing.assert_allclose(x, y, rtol=1e-10, atol=1e-12, err_msg=c)
    search = a[a["row_type"] == "search"].iloc[0]
    assert search["status"] == "ok" and search["permutations"] == 49
    assert "not used" not in search["message"]
    # the statistic at each legacy cut: scipy's Pearson chi-square of the repeated rows' 2x2
    for r in a[a["row_type"] == "cut"].itertuples():
        low = rows["x"] < r.cut
        tab = pd.crosstab(low, rows["y"]).to_numpy()
        assert r.statistic == pytest.approx(stats.chi2_contingency(tab, correction=False)[0],
                                            rel=1e-10)
    # the group counts are persons
    g = a[a["row_type"] == "group"]
    assert g["n"].sum() == df["w"].sum()
    assert g["events"].sum() == (df["w"] * df["y"]).sum()


def test_frequency_weighted_logrank_is_lifelines_on_expanded_rows() -> None:
    # source: lifelines.statistics.logrank_test on the rows repeated by their weights
    rng = np.random.default_rng(32)
    n = 200
    x = np.round(rng.normal(size=n), 1)
    T = rng.exponential(1 / np.exp(0.5 * x))
    C = rng.uniform(0.5, 3, n)
    time, ev = np.ceil(np.minimum(T, C) * 10) / 10, (T <= C).astype(float)  # ties in time
    w = rng.integers(1, 4, n).astype(float)
    s = SplitSearch.build("survival", x, Outcome("survival", ev, time=time, weights=w))
    rep = np.repeat(np.arange(n), w.astype(int))
    prof = s.profile()
    for j in (0, 5, len(s.cuts) - 1):
        lo = x[rep] < s.cuts[j]
        t, e = time[rep], ev[rep]
        ref = logrank_test(t[lo], t[~lo], e[lo], e[~lo]).test_statistic
        assert prof[j] == pytest.approx(ref, rel=1e-10)
        assert s.statistic_at(s.cuts[j]) == pytest.approx(ref, rel=1e-10)
    # the low-group shares are of the persons
    np.testing.assert_allclose(
        s.percentiles, [100 * np.mean(x[rep] < c) for c in s.cuts], rtol=1e-12)


def test_whole_persons_are_needed_for_the_permutation_p_value() -> None:
    df = _frame(33, 150).assign(w=lambda d: d["w"] + 0.5)
    tab = cutpoints_table(*bare_refit(df, _raw({"column": "w", "kind": "frequency"}, **TOP)))
    s = tab[tab["row_type"] == "search"].iloc[0]
    assert s["status"] == "ok" and s["permutations"] == 0 and pd.isna(s["p_permutation"])
    assert "whole numbers" in s["message"]


def test_sampling_weights_are_still_not_used_and_the_table_says_so() -> None:
    df = _frame(34, 150).assign(w=lambda d: d["w"] * 0.7)
    tab = cutpoints_table(*bare_refit(df, _raw({"column": "w", "kind": "sampling"}, **TOP)))
    plain = cutpoints_table(*bare_refit(df.drop(columns="w"), _raw(None, **TOP)))
    s = tab[tab["row_type"] == "search"].iloc[0]
    assert "sampling weights (w) are not used" in s["message"]
    np.testing.assert_array_equal(tab["statistic"].astype(float),
                                  plain["statistic"].astype(float))


def test_adjusted_weighted_search_withholds_the_simulated_p_value() -> None:
    # the simulated null of the adjusted score process does not take the weights: no p_simulated
    df = _frame(35, 200)
    df["z"] = np.random.default_rng(35).normal(size=len(df))
    raw = _raw({"column": "w", "kind": "frequency"}, **TOP)
    raw["analyses"][0]["adjust"] = ["z"]
    tab = cutpoints_table(*bare_refit(df, raw))
    s = tab[tab["row_type"] == "search"].iloc[0]
    assert s["status"] == "ok" and s["permutations"] == 0
    assert pd.isna(s["p_simulated"]) and pd.isna(s["p_permutation"])
    assert "frequency weights" in s["message"] and np.isfinite(s["p_lausen"])
