"""The rows the report and the terminal summary show, prepared from hand-made tables: pooled
contrasts side by side, single-cohort contrasts not called pooled, the bootstrap interval of the
information kept only when its table exists, human labels for every column (also unknown ones),
one row per cohort and analysis in the question tables, one message per cause. The expected
cells are written out by hand from the tables below and the formatting rules of present/text.py."""

from __future__ import annotations

import pandas as pd

from unbin.present import labels, summary
from unbin.present.report import rows as R
from unbin.present.report.html import plain_table


def _pooled(k: int = 3) -> pd.DataFrame:
    rows = []
    for method, eff, lo, hi in (("fixed", 1.489, 1.335, 1.661), ("random", 1.49, 1.30, 1.70),
                                ("random HKSJ", 1.49, 1.22, 1.815)):
        for form in ("legacy", "spline"):
            rows.append({"analysis": "death_egfr", "adjustment": "legacy", "form": form,
                         "contrast_type": "group", "contrast": "<60 vs >=60", "method": method,
                         "k": k, "scale": "hazard ratio", "effect": eff, "effect_lower": lo,
                         "effect_upper": hi})
    return pd.DataFrame(rows)


def test_pooled_rows_put_the_three_methods_side_by_side() -> None:
    out = R.pooled_rows(_pooled())
    assert len(out) == 2                                   # one row per form x contrast
    assert out[0] == {"form": "legacy groups", "contrast": "<60 vs >=60", "cohorts": "3",
                      "fixed effect": "1.49 (1.33 to 1.66)",
                      "random effects": "1.49 (1.30 to 1.70)",
                      "random effects, HKSJ": "1.49 (1.22 to 1.81)"}
    assert out[1]["form"] == "spline"


def test_a_contrast_from_one_cohort_is_not_called_pooled() -> None:
    out = R.pooled_rows(_pooled(k=1))
    for row in out:
        for head in ("fixed effect", "random effects", "random effects, HKSJ"):
            assert row[head] == "reported by one cohort only"


def test_pooled_selection_keeps_group_contrasts_of_the_legacy_adjustment() -> None:
    pe = pd.concat([_pooled(), _pooled().assign(adjustment="continuous", effect=9.0),
                    _pooled().assign(contrast_type="per_unit"),
                    _pooled().assign(form="spline x level")])
    sel = R.pooled_selection(pe, "death_egfr")
    assert set(sel["adjustment"]) == {"legacy"} and set(sel["contrast_type"]) == {"group"}
    assert set(sel["form"]) == {"legacy", "spline"}


def test_heterogeneity_rows_name_the_form_and_the_single_cohort_items() -> None:
    het = pd.DataFrame([
        {"analysis": "a", "adjustment": "legacy", "item": "common_spline: Q3 vs Q1", "k": 3,
         "q": 5.2528, "q_df": 2.0, "q_p": 0.0723, "i2": 0.619, "tau2": 0.00893,
         "tau2_method": "DL", "status": "ok"},
        {"analysis": "a", "adjustment": "legacy", "item": "common_spline: Q3 vs Q1", "k": 3,
         "q": 5.2528, "q_df": 2.0, "q_p": 0.0723, "i2": 0.619, "tau2": 0.0274,
         "tau2_method": "PM", "status": "ok"},
        {"analysis": "a", "adjustment": "legacy", "item": "legacy: high vs low", "k": 1,
         "q": None, "q_df": None, "q_p": None, "i2": None, "tau2": None, "tau2_method": "DL",
         "status": "single cohort"}])
    out = R.heterogeneity_rows(het)
    assert out[0] == {"adjustment": "as in the legacy analysis",
                      "pooled item": "spline on common knots: Q3 vs Q1", "cohorts": "3",
                      "Q (df), p": "5.25 (2), p 0.072", "I²": "62%", "τ² (DL)": "0.00893",
                      "τ² (PM)": "0.0274"}
    assert out[1]["Q (df), p"] == "reported by one cohort only"
    assert out[1]["pooled item"] == "legacy groups: high vs low"


def _info() -> pd.DataFrame:
    return pd.DataFrame([{"cohort": "north", "analysis": "a", "adjustment": "legacy",
                          "lr_legacy": 12.34, "df_legacy": 2, "lr_spline": 31.26, "df_spline": 3,
                          "info_kept": 0.3871, "added_p": 0.0004, "nonlinearity_p": 0.0312,
                          "best_form": "fp"}])


def _status() -> pd.DataFrame:
    return pd.DataFrame([{"cohort": "north", "analysis": "a", "status": "ok", "message": "",
                          "n_input": 5000, "n_used": 4810, "family": "survival",
                          "exposure": "egfr"}])


def test_information_kept_shows_its_bootstrap_interval_only_when_the_table_exists() -> None:
    tables = {"information": _info(), "status": _status()}
    (row,) = summary.analysis_rows(tables, [("north", "a")])
    assert row["kept"] == "39%" and row["best"] == "fractional polynomial"
    assert row["n"] == "4,810" and row["n_input"] == "5,000"
    boot = pd.DataFrame([{"cohort": "north", "analysis": "a", "adjustment": "legacy",
                          "info_kept": 0.3871, "info_kept_lower": 0.2512,
                          "info_kept_upper": 0.5249, "level": 0.95, "replicates": 200,
                          "replicates_used": 198, "status": "ok", "message": ""}])
    (row,) = summary.analysis_rows({**tables, "information_bootstrap": boot}, [("north", "a")])
    assert row["kept"] == "39% (25% to 52%)"
    failed = boot.assign(status="failed")
    (row,) = summary.analysis_rows({**tables, "information_bootstrap": failed},
                                   [("north", "a")])
    assert row["kept"] == "39%"
    assert R.information_rows(_info(), {"legacy": "25% to 52%"})[0]["information kept"] == \
        "39% (25% to 52%)"


def test_events_come_from_the_selected_legacy_fit() -> None:
    fits = pd.DataFrame([
        {"cohort": "north", "analysis": "a", "form": "legacy", "selected": True, "n": 4810,
         "events": 1237},
        {"cohort": "north", "analysis": "a", "form": "spline", "selected": False, "n": 4810,
         "events": 9999}])
    counts = summary.sample_counts({"fits": fits, "status": _status()}, "north", "a")
    assert counts == {"n": "4,810", "events": "1,237", "person_time": ""}
    with_pt = fits.assign(person_time=[20412.37, 20412.37])
    assert summary.sample_counts({"fits": with_pt, "status": _status()}, "north",
                                 "a")["person_time"] == "20,412"


def test_every_column_gets_a_human_label() -> None:
    assert labels.column("q_df") == "Q df" and labels.column("cut_rank") == "cut number"
    assert labels.column("lr_test_spline") == "LR χ² test spline"
    # A future question's column: a readable label from its name, no underscore.
    assert labels.column("p_bias_corrected") == "p bias corrected"
    assert labels.column("info_lost_se") == "information lost SE"
    frame = pd.DataFrame({"cohort": ["north"], "analysis": ["a"], "mystery_ratio_hi": [1.23456],
                          "q_p": [0.0004], "form": ["test_spline"]})
    view = plain_table(frame, "t", keep_keys=True)
    headers = [c.header for c in view.columns]
    assert headers[:2] == ["cohort", "analysis"]
    assert not any("_" in h for h in headers)
    assert view.rows == [["north", "a", "1.23", "<0.001", "test spline (fixed knots)"]]


def test_question_rows_name_cohort_and_analysis_and_use_each_cohorts_own_cuts() -> None:
    cut = pd.DataFrame([
        {"cohort": c, "analysis": "sbp_urate", "row_type": "cut", "role": "exposure",
         "variable": "urate", "cut": cv, "percentile": pv, "status": "ok"}
        for c, cv, pv in (("north", 7.1, 75.2), ("south", 5.6, 55.0))] + [
        {"cohort": c, "analysis": "sbp_urate", "row_type": "search", "role": "exposure",
         "variable": "urate", "cut": best, "p_naive": 1e-9, "p_lausen": 0.0123,
         "p_permutation": float("nan"), "p_simulated": 0.005, "boot_cut_p2_5": 5.4,
         "boot_cut_p97_5": 7.1, "status": "ok"} for c, best in (("north", 6.6), ("south", 5.8))])
    out = summary.cut_rows({"cutpoints": cut})
    assert [(r["cohort"], r["analysis"]) for r in out] == [("north", "sbp_urate"),
                                                          ("south", "sbp_urate")]
    assert out[0]["legacy cuts"] == "7.1 (75th pct)" and out[1]["legacy cuts"] == "5.6 (55th pct)"
    assert out[0]["corrected p"] == "0.012" and out[0]["resampled p"] == "0.005"
    assert out[0]["bootstrap cut (95%)"] == "5.4 to 7.1"   # cut values as the spec writes them


def test_confounding_rows_are_per_cohort() -> None:
    rows = [{"cohort": c, "analysis": "a", "exposure_form": "linear", "scope": scope,
             "primary": True, "share_left": share, "share_left_lower": -0.42,
             "share_left_upper": -0.01, "confounding_clear": True, "largest": scope == "age"}
            for c, share in (("north", -0.12), ("south", 0.24)) for scope in ("all", "age")]
    out = summary.confounding_rows({"confounding": pd.DataFrame(rows)})
    assert out == [
        {"cohort": "north", "analysis": "a", "share left (95% CI)": "-12% (-42% to -1%)",
         "most left by": "age"},
        {"cohort": "south", "analysis": "a", "share left (95% CI)": "24% (-42% to -1%)",
         "most left by": "age"}]


def test_one_message_per_cause() -> None:
    st = pd.DataFrame([
        {"cohort": c, "analysis": a, "status": s, "message": m}
        for c, a, s, m in (("north", "a", "failed", "only 3 rows"), ("south", "a", "failed",
                                                                     "only 3 rows"),
                           ("north", "b", "ok", ""), ("south", "b", "failed", "separation"))])
    assert summary.messages({"status": st}) == ["north/a, south/a failed: only 3 rows",
                                                "south/b failed: separation"]


def test_compact_svg_keeps_what_is_drawn_and_referenced() -> None:
    # Hand-written SVG: the prolog, doctype, metadata and line breaks between elements go, an
    # id nothing references goes, a clip path's id that a url(#...) uses stays, text stays.
    from unbin.present.report.html import compact_svg, svg_data_uri

    svg = ('<?xml version="1.0" encoding="utf-8"?>\n<!DOCTYPE svg PUBLIC "x" "y">\n'
           '<svg xmlns="http://www.w3.org/2000/svg">\n <metadata>\n  <rdf/>\n </metadata>\n'
           ' <defs>\n  <clipPath id="c1"><rect width="1" height="1"/></clipPath>\n </defs>\n'
           ' <g id="figure_1" clip-path="url(#c1)">\n  <text x="1">a &amp; b</text>\n </g>\n'
           '</svg>\n')
    out = compact_svg(svg)
    assert out == ('<svg xmlns="http://www.w3.org/2000/svg"><defs><clipPath id="c1"><rect '
                   'width="1" height="1"/></clipPath></defs><g clip-path="url(#c1)"><text '
                   'x="1">a &amp; b</text></g></svg>')
    uri = svg_data_uri(svg.encode())
    assert uri.startswith("data:image/svg+xml;charset=utf-8,<svg")
    assert '"' not in uri and "#" not in uri and "&" not in uri  # escaped: %22, %23, %26
