"""The rows of the report's "Missing values" section and of its generic tables, from hand-made
tables: which columns are listed (every column with missing values, then the largest absolute
standardised differences), the twins found from the spec, the side-by-side estimates, and the
shift and inside counts of the one-line reading, each recomputed here with pandas from the same
tables (common practice: a standardised difference of 0.1 or more reads as an imbalance;
Austin 2009)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from unbin.present import text
from unbin.present.report import missing as M
from unbin.present.report.rows import generic_rows


def _missingness() -> pd.DataFrame:
    rows = []
    for cohort, miss_x, miss_age, smds in (("north", 57, 0, (np.nan, 0.19, -0.62, 0.05, 0.30)),
                                           ("south", 0, 0, (0.1, 0.2, 0.3, 0.4, 0.5))):
        for (col, role), miss, smd in zip((("x", "exposure"), ("age", "adjuster"),
                                           ("bmi", "adjuster"), ("sex", "adjuster"),
                                           ("y", "outcome")),
                                          (miss_x, miss_age, 3, 0, 0), smds, strict=True):
            if cohort == "south":
                miss = 0
            rows.append({"cohort": cohort, "analysis": "a", "column": col, "role": role,
                         "subset": "all", "level": "all", "rows": 6000, "missing": miss,
                         "share_missing": miss / 6000, "suppressed": False, "smd": smd,
                         "smd_method": "levels" if col in ("sex", "y") else "means",
                         "note": "observed in no dropped row" if np.isnan(smd) else ""})
        rows.append({**rows[-1], "subset": "outcome", "level": "event", "missing": 40})
    df = pd.DataFrame(rows)
    # a withheld count: 0 < missing < min_cell, shown as withheld, still "dropped"
    df.loc[(df["cohort"] == "north") & (df["column"] == "bmi"), ["missing", "share_missing",
                                                                 "suppressed"]] = [np.nan,
                                                                                   np.nan, True]
    return df


def test_the_column_rows_list_missing_columns_then_the_largest_differences() -> None:
    miss = _missingness()
    out = M.column_rows(miss, "a", lambda c: c.upper(), min_cell=10, top=2)
    every = miss[(miss["subset"] == "all") & (miss["cohort"] == "north")]
    dropped = every[(every["missing"].fillna(0) > 0) | every["suppressed"]]
    rest = every.drop(dropped.index)
    largest = rest.assign(size=rest["smd"].abs()).nlargest(2, "size")["column"].tolist()
    # south dropped no row: not listed at all
    assert {r["cohort"] for r in out} == {"north"}
    assert [r["column"] for r in out] == ["X", "BMI", *[c.upper() for c in largest]]
    x = out[0]
    assert x["missing"] == "57" and x["share missing"] == text.percent(57 / 6000, 1) == "0.9%"
    assert x["standardised difference"] == text.DASH
    assert out[1]["missing"] == "– (withheld, <10)" and out[1]["share missing"] == "–"
    assert out[1]["standardised difference"] == "-0.62 (means)"     # signed for means
    assert out[2]["standardised difference"] == "0.3 (levels)"
    assert out[3]["standardised difference"] == "0.19 (means)"
    assert all(r["analysis"] == "a" for r in out)


def test_has_missing_counts_a_withheld_count() -> None:
    miss = _missingness()
    south = miss[(miss["cohort"] == "south") & (miss["subset"] == "all")]
    assert not M.has_missing(south)
    assert M.has_missing(south.assign(suppressed=[False, True, False, False, False]))


def test_the_twin_is_the_analysis_equal_in_every_other_key() -> None:
    base = {"outcome": {"type": "binary", "event": "y"}, "exposure": "x", "adjust": ["age"]}
    raw = [{"name": "cc", **base, "reported": {"contrast": "a vs b", "estimate": 2.0}},
           {"name": "other", **base, "adjust": ["sex"]},
           {"name": "imp", **base, "missing": {"method": "impute", "imputations": 5}},
           {"name": "imp_other", **base, "adjust": ["bmi"], "missing": {"method": "impute"}},
           {"name": "cc_explicit", **base, "adjust": ["bmi"],
            "missing": {"method": "complete_case"}}]
    assert M.imputation_twins(raw) == [("cc", "imp"), ("cc_explicit", "imp_other")]


def _effects() -> pd.DataFrame:
    rng = np.random.default_rng(3)
    rows = []
    for analysis in ("cc", "imp"):
        for form in ("legacy", "linear", "spline", "fp", "spline x level"):
            for ctype, contrast in (("group", "low vs mid"), ("group", "mid (reference)"),
                                    ("group", "high vs mid"), ("iqr", "75th vs 25th percentile"),
                                    ("per_unit", "per unit")):
                est = 0.0 if "reference" in contrast else rng.normal(0.5, 0.3)
                if form == "legacy" and ctype == "iqr":
                    est = np.nan
                se = 0.1 + 0.05 * rng.random()
                for adj in ("legacy", "continuous"):
                    rows.append({"cohort": "north", "analysis": analysis, "adjustment": adj,
                                 "form": form, "status": "ok", "contrast_type": ctype,
                                 "contrast": contrast, "by_level": "", "estimate": est,
                                 "lower": est - 1.96 * se, "upper": est + 1.96 * se,
                                 "effect": np.exp(est), "effect_lower": np.exp(est - 1.96 * se),
                                 "effect_upper": np.exp(est + 1.96 * se),
                                 "scale": "odds ratio"})
    return pd.DataFrame(rows)


def _expected_pairs(eff: pd.DataFrame) -> pd.DataFrame:
    keep = ((eff["adjustment"] == "legacy") & eff["form"].isin(["legacy", "linear", "spline", "fp"])
            & eff["contrast_type"].isin(["group", "iqr"])
            & ~eff["contrast"].str.contains("reference") & eff["estimate"].notna())
    e = eff[keep]
    cc, mi = e[e["analysis"] == "cc"], e[e["analysis"] == "imp"]
    both = cc.merge(mi, on=["form", "contrast"], suffixes=("_cc", "_mi"))
    both["shift"] = ((both["estimate_mi"] - both["estimate_cc"]).abs()
                     / ((both["upper_cc"] - both["lower_cc"]) / 2))
    both["inside"] = both["estimate_mi"].between(both["lower_cc"], both["upper_cc"])
    return both


def test_the_twins_side_by_side_match_a_pandas_merge() -> None:
    eff = _effects()
    want = _expected_pairs(eff)
    got = M.paired(eff, "north", "cc", "imp")
    assert len(got) == len(want) == 11          # 2 legacy groups; 3 per continuous form
    merged = got.merge(want, on=["form", "contrast"], suffixes=("", "_want"))
    assert len(merged) == 11
    assert np.allclose(merged["shift"], merged["shift_want"])
    assert (merged["inside"] == merged["inside_want"]).all()
    rows = M.twin_rows(eff, ["north"], "cc", "imp")
    first = want[(want["form"] == "legacy") & (want["contrast"] == "low vs mid")].iloc[0]
    assert rows[0] == {
        "cohort": "north", "analysis": "cc", "form": "legacy groups", "contrast": "low vs mid",
        "complete cases": text.interval(first["effect_cc"], first["effect_lower_cc"],
                                        first["effect_upper_cc"], "ratio"),
        "imputed": text.interval(first["effect_mi"], first["effect_lower_mi"],
                                 first["effect_upper_mi"], "ratio"),
        "shift (share of the half-interval)": text.percent(first["shift"])}
    assert [r["form"] for r in rows][:3] == ["legacy groups", "legacy groups", "linear"]
    assert rows[4]["contrast"] == "75th vs 25th percentile (quartiles)"


def test_the_reading_names_the_largest_shift_and_counts_the_inside_estimates() -> None:
    eff = _effects()
    want = _expected_pairs(eff)
    worst = want.loc[want["shift"].idxmax()]
    status = pd.DataFrame([{"cohort": "north", "analysis": "cc", "n_used": 5943},
                           {"cohort": "north", "analysis": "imp", "n_used": 6000}])
    line = M.twin_reading(eff, status, "north", "cc", "imp")
    assert line.startswith("north: 5,943 rows with complete values, 6,000 with imputation")
    assert f"largest shift is {text.percent(worst['shift'])}" in line
    assert f"({M.labels.form(worst['form'])}, {worst['contrast']})" in line
    assert f"{int(want['inside'].sum())} of 11 imputed estimates" in line
    small = "small against the intervals" if worst["shift"] < 0.25 else "not small"
    assert small in line
    # an imputed analysis equal to its twin moves nothing
    same = pd.concat([eff[eff["analysis"] == "cc"],
                      eff[eff["analysis"] == "cc"].assign(analysis="imp")])
    line = M.twin_reading(same, status, "north", "cc", "imp")
    assert "largest shift is 0%" in line and "11 of 11" in line and ", small against" in line
    # intervals of zero width: nothing to measure a shift by, and the line says so
    flat = same.assign(lower=same["estimate"], upper=same["estimate"])
    assert "no complete-case interval has a width" in M.twin_reading(flat, status, "north",
                                                                     "cc", "imp")


def test_generic_tables_leave_out_grid_rows_and_say_where_they_are() -> None:
    df = pd.DataFrame({"row_type": ["test"] * 2 + ["group"] * 3 + ["curve"] * 100,
                       "x": [np.nan] * 5 + list(range(100)), "p": [0.01, 0.2] + [np.nan] * 103,
                       "effect": [np.nan, np.nan, 1.2, 1.1, 0.9] + [1.0] * 100})
    shown, note = generic_rows(df, "windows")
    assert list(shown["row_type"]) == ["test", "test", "group", "group", "group"]
    assert "x" not in shown                     # empty in every shown row
    assert note == ("Not shown: 100 curve rows (one per grid point); every row is in "
                    "tables/windows.parquet.")
    shown, note = generic_rows(df.iloc[5:], "windows", limit=60)   # only grid rows: capped
    assert len(shown) == 60 and "40 rows after the first 60" in note
    shown, note = generic_rows(df.iloc[:5], "windows")
    assert len(shown) == 5 and note == ""
