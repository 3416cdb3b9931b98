"""What people read around the tables: ``unbin compare`` on hand-made result folders, the
terminal summary's numbers against the tables they come from, and the provenance of a job's
tables (input SHA-256 and spec digest recomputed here with hashlib and json)."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import yaml

from unbin.cli import main
from unbin.pipeline.jobs import analyse, compare_folders, fit_analysis
from unbin.present.summary import information_summary
from unbin.results.provenance import provenance
from unbin.results.tables import read_provenance, read_table, write_table
from unbin.spec import parse_spec

# --------------------------------------------------------------------------- compare


def _effects(shift: dict[str, float]) -> pd.DataFrame:
    rows = []
    for contrast, est in (("low vs mid", 0.40), ("high vs mid", -0.25), ("per unit", 0.031)):
        for form in ("legacy", "spline"):
            key = f"{form}:{contrast}"
            rows.append({"cohort": "north", "analysis": "death_marker", "adjustment": "legacy",
                         "form": form, "contrast_type": "group", "contrast": contrast,
                         "estimate": est + shift.get(key, 0.0), "se": 0.1})
    return pd.DataFrame(rows)


def _folder(root: Path, effects: pd.DataFrame, status: list[tuple[str, str, str]],
            sha: str) -> Path:
    prov = provenance([{"cohort": "north", "path": "north.parquet", "sha256": sha, "rows": 10}],
                      "0" * 64, 1, "t", "s")
    write_table(effects, root / "tables" / "effects.parquet", prov)
    st = pd.DataFrame(status, columns=["cohort", "analysis", "status"])
    write_table(st, root / "tables" / "status.parquet", prov)
    write_table(st.iloc[:1], root / "work" / "north" / "death_marker" / "status.parquet", prov)
    return root


def test_compare_reports_moves_beyond_the_tolerance_only(tmp_path: Path) -> None:
    ok = [("north", "death_marker", "ok")]
    old = _folder(tmp_path / "old", _effects({}), ok, "a" * 64)
    new = _folder(tmp_path / "new", _effects({"spline:low vs mid": 0.05,        # beyond 0.01
                                              "legacy:high vs mid": 0.004,      # within
                                              "legacy:per unit": -0.0099}),     # within
                  [*ok, ("north", "visits_marker", "ok")], "b" * 64)
    changes = compare_folders(old, new, tolerance=0.01)
    moved = changes[changes["change"] == "estimate moved"]
    assert len(moved) == 1
    m = moved.iloc[0]
    assert (m["table"], m["item"]) == ("effects", "legacy / spline / group / low vs mid: estimate")
    assert m["old"] == "0.4" and m["new"] == "0.45"
    assert m["difference"] == pytest.approx(0.05, abs=1e-12)
    added = changes[changes["change"] == "analysis added"]
    assert added[["cohort", "analysis"]].values.tolist() == [["north", "visits_marker"]]
    inputs = changes[changes["change"] == "input changed"]
    assert inputs["old"].tolist() == ["a" * 12] and inputs["new"].tolist() == ["b" * 12]
    # A tolerance wider than the largest move reports no estimate.
    wide = compare_folders(old, new, tolerance=0.06)
    assert not (wide["change"] == "estimate moved").any()
    # An estimate that becomes missing is a change whatever the tolerance.
    gone = _effects({})
    gone.loc[0, "estimate"] = np.nan
    _folder(tmp_path / "gone", gone, ok, "a" * 64)
    lost = compare_folders(old, tmp_path / "gone", tolerance=10.0)
    assert lost["change"].tolist() == ["estimate moved"] and lost["new"].tolist() == [""]


def test_compare_command_writes_the_comparison_table(tmp_path: Path,
                                                     capsys: pytest.CaptureFixture[str]) -> None:
    ok = [("north", "death_marker", "ok")]
    old = _folder(tmp_path / "old", _effects({}), ok, "a" * 64)
    new = _folder(tmp_path / "new", _effects({"legacy:low vs mid": -0.2}), ok, "a" * 64)
    assert main(["compare", str(old), str(new), "--tolerance", "0.1"]) == 0
    table = read_table(new / "comparison.parquet")
    assert table["item"].tolist() == ["legacy / legacy / group / low vs mid: estimate"]
    assert table["difference"].iloc[0] == pytest.approx(-0.2)
    assert "low vs mid" in capsys.readouterr().out


# --------------------------------------------------------------------------- summary


def _cells(table: Any) -> list[dict[str, str]]:
    cols = {c.header: list(c._cells) for c in table.columns}
    n = len(next(iter(cols.values())))
    return [{h: str(v[i]) for h, v in cols.items()} for i in range(n)]


def test_summary_numbers_are_the_legacy_rows_of_the_tables(tmp_path: Path,
                                                           one_analysis: Any) -> None:
    # The summary reads the information and status tables; its numbers must be the legacy-
    # adjustment row's (the title says so), rounded as shown, for each analysis.
    rng = np.random.default_rng(8)
    n = 700
    x = rng.normal(60, 15, n)
    age = rng.uniform(30, 85, n)
    y = (rng.random(n) < 1 / (1 + np.exp(-(-1 + 0.002 * (x - 60) ** 2 + 0.03 * (age - 55))))
         ).astype(float)
    frame = pd.DataFrame({"marker": x, "age": age, "y": y})
    raw = one_analysis({"type": "binary", "event": "y"}, "marker", {"cuts": [45, 75]})
    raw["analyses"][0]["adjust"] = ["age"]
    raw["groupings"]["age"] = {"cuts": [50, 65]}
    spec = parse_spec(raw, base=tmp_path)
    tables, _ = analyse(spec, "sim", "a", frame, resampling=False)
    out = tmp_path / "run"
    prov = provenance([], "", 0, "t", "s")
    for name in ("information", "status"):
        df = tables[name].copy()
        df.insert(0, "analysis", "a")
        df.insert(0, "cohort", "sim")
        write_table(df, out / "tables" / f"{name}.parquet", prov)
    info = tables["information"].set_index("adjustment")
    legacy, cont = info.loc["legacy"], info.loc["continuous"]
    assert f"{legacy['lr_spline']:.1f}" != f"{cont['lr_spline']:.1f}"  # the codings differ
    (row,) = _cells(information_summary(out))
    assert row["analysis"] == "a" and "status" not in row  # every analysis ok: no column
    assert row["n"] == str(n)
    # Three significant digits, trailing zeros dropped (present/text.py; below 1,000 that is
    # Python's own "g" format); information kept as a whole percent.
    assert legacy["lr_legacy"] < 1000 and legacy["lr_spline"] < 1000
    assert row["LR χ² groups (df)"] == f"{legacy['lr_legacy']:.3g} ({legacy['df_legacy']:.0f})"
    assert row["LR χ² spline (df)"] == f"{legacy['lr_spline']:.3g} ({legacy['df_spline']:.0f})"
    assert row["info kept"] == f"{100 * legacy['info_kept']:.0f}%"
    p = legacy["nonlinearity_p"]
    assert row["nonlinear p"] == ("<0.001" if p < 0.001 else f"{p:.3f}")
    assert row["best by AIC"] == legacy["best_form"]
    # info kept is the ratio the README defines, from the fits table's log-likelihoods.
    fits = tables["fits"]
    fits = fits[(fits["adjustment"] == "legacy") & fits["selected"]].set_index("form")["loglik"]
    kept = (fits["legacy"] - fits["null"]) / (fits["legacy+test_spline"] - fits["null"])
    assert float(row["info kept"].rstrip("%")) / 100 == pytest.approx(kept, abs=0.005)


def test_printed_summary_names_the_failed_analysis_and_its_numbers(tmp_path: Path) -> None:
    # Hand-made tables: one analysis ok, one failed; the printed summary must show the ok one's
    # numbers as in its table and the failed one's status and message.
    from rich.console import Console

    from unbin.present.summary import print_summary

    prov = provenance([], "", 0, "t", "s")
    status = pd.DataFrame([
        {"cohort": "north", "analysis": "flare_marker", "status": "ok", "message": "",
         "n_input": 500, "n_used": 480, "family": "binary", "exposure": "marker"},
        {"cohort": "north", "analysis": "visits_bmi", "status": "failed",
         "message": "only 3 rows are left after filters", "n_input": 500, "n_used": 3,
         "family": "count", "exposure": "bmi"}])
    info = pd.DataFrame([{"cohort": "north", "analysis": "flare_marker", "adjustment": a,
                          "lr_legacy": lr, "df_legacy": 2, "lr_spline": 31.26, "df_spline": 3,
                          "info_kept": kept, "added_p": 0.0004, "nonlinearity_p": 0.0312,
                          "best_form": "spline"}
                         for a, lr, kept in (("legacy", 12.34, 0.3871),
                                             ("continuous", 99.9, 0.9999))])
    write_table(status, tmp_path / "tables" / "status.parquet", prov)
    write_table(info, tmp_path / "tables" / "information.parquet", prov)
    console = Console(record=True, width=200, color_system=None)
    print_summary(tmp_path, console)
    text = console.export_text()
    assert "12.3 (2)" in text and "31.3 (3)" in text and "39%" in text
    assert "<0.001" in text and "0.031" in text and "480" in text
    assert "99.9" not in text  # the continuous coding (LR 99.9) is not shown
    assert "north/visits_bmi failed: only 3 rows are left after filters" in text


# --------------------------------------------------------------------------- provenance


def test_provenance_hashes_are_the_inputs_and_the_spec_entries(tmp_path: Path) -> None:
    # The input's SHA-256 by hashlib over the file's bytes; the spec digest as the README
    # defines it: SHA-256 of the canonical JSON (sorted keys, no whitespace) of the spec entries
    # the analysis uses, written out here by hand from the spec.
    rng = np.random.default_rng(9)
    n = 300
    pd.DataFrame({"marker": rng.normal(60, 15, n), "age": rng.uniform(30, 85, n),
                  "bmi": rng.normal(27, 4, n),
                  "y": (rng.random(n) < 0.3).astype(float)}).to_parquet(
        tmp_path / "north.parquet", index=False)
    analysis = {"name": "flare_marker", "outcome": {"type": "binary", "event": "y"},
                "exposure": "marker", "adjust": ["age"]}
    other = {"name": "flare_bmi", "outcome": {"type": "binary", "event": "y"},
             "exposure": "bmi"}
    raw = {"study": "provenance-check", "cohorts": [{"name": "north", "path": "north.parquet"}],
           "variables": {"marker": {"label": "Marker", "unit": "mg/L"}, "bmi": {"label": "BMI"}},
           "groupings": {"marker": {"cuts": [45, 75]}, "bmi": {"cuts": [25, 30]}},
           "analyses": [analysis, other],
           "continuous": {"forms": ["linear"], "spline_knots": [3]},
           "risk_thresholds": [0.2], "disclosure": {"min_cell": 5}, "seed": 4242}
    spec_path = tmp_path / "spec.yaml"
    spec_path.write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    out = tmp_path / "work"
    status = fit_analysis(spec_path, "north", "flare_marker", out)
    assert status["status"] == "ok", status["message"]
    want_slice = {"study": "provenance-check", "analysis": analysis,
                  "groupings": {"marker": {"cuts": [45, 75]}},
                  "variables": {"marker": {"label": "Marker", "unit": "mg/L"}},
                  "continuous": {"forms": ["linear"], "spline_knots": [3]},
                  "risk_thresholds": [0.2], "disclosure": {"min_cell": 5}, "seed": 4242}
    canonical = json.dumps(want_slice, sort_keys=True, separators=(",", ":"))
    want_digest = hashlib.sha256(canonical.encode("utf-8")).hexdigest()
    want_sha = hashlib.sha256((tmp_path / "north.parquet").read_bytes()).hexdigest()
    for name in ("fits", "effects", "curves", "status", "samples"):
        prov = read_provenance(out / f"{name}.parquet")
        assert prov["table"] == name
        assert prov["spec_digest"] == want_digest
        assert prov["inputs"] == [{"cohort": "north", "path": "north.parquet",
                                   "sha256": want_sha, "rows": n}]
        assert prov["seed"] == 4242 and prov["study"] == "provenance-check"
        assert prov["versions"]["numpy"] == np.__version__
        assert prov["versions"]["pandas"] == pd.__version__
    # The digest follows the analysis' own entries: changing the other analysis' grouping
    # leaves it, changing this one's changes it.
    for key, value, same in ((("groupings", "bmi"), {"cuts": [24, 31]}, True),
                             (("groupings", "marker"), {"cuts": [45, 76]}, False)):
        raw2 = json.loads(json.dumps(raw))
        raw2[key[0]][key[1]] = value
        spec_path.write_text(yaml.safe_dump(raw2, sort_keys=False), encoding="utf-8")
        fit_analysis(spec_path, "north", "flare_marker", tmp_path / "again")
        again = read_provenance(tmp_path / "again" / "fits.parquet")["spec_digest"]
        assert (again == want_digest) is same, key


def test_read_table_gives_the_frame_pyarrow_read_table_gives(tmp_path: Path) -> None:
    # Reference: pyarrow's own pq.read_table(...).to_pandas(), the reader used before.
    import pyarrow.parquet as pq

    df = pd.DataFrame({
        "cohort": ["a", "b", None], "n": np.array([1, 2, 3], dtype="int64"),
        "est": [0.5, np.nan, -1.25], "ok": [True, False, True],
        "count": pd.array([1, None, 3], dtype="Int64"),
        "level": pd.Categorical(["x", "y", "x"]),
        "when": pd.to_datetime(["2020-01-01", None, "2021-06-30"]),
    })
    path = tmp_path / "t.parquet"
    write_table(df, path, {"table": "t"})
    ours = read_table(path)
    pd.testing.assert_frame_equal(ours, pq.read_table(path).to_pandas(), check_exact=True)
    pd.testing.assert_frame_equal(ours, df, check_exact=True)
    empty = tmp_path / "empty.parquet"
    write_table(pd.DataFrame({"cohort": pd.Series(dtype=str)}), empty, {"table": "e"})
    pd.testing.assert_frame_equal(read_table(empty), pq.read_table(empty).to_pandas())
