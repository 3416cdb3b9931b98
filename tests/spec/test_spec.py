"""Spec loading and validation (unbin.spec) and `unbin check` (unbin.cli), in-process."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
import yaml

from unbin.cli import main
from unbin.data import data_problems
from unbin.demo import write_demo
from unbin.errors import SpecError
from unbin.spec import load_spec, parse_spec


@pytest.fixture
def demo(tmp_path: Path) -> tuple[Path, dict[str, Any]]:
    """The invented demo registry and its spec, written under tmp_path."""
    spec_path = write_demo(tmp_path, n=400)
    return spec_path, yaml.safe_load(spec_path.read_text(encoding="utf-8"))


def _write(path: Path, raw: dict[str, Any]) -> Path:
    path.write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    return path


def _check(path: Path, capsys: pytest.CaptureFixture[str]) -> tuple[int, int, str]:
    """Run `unbin check` in-process: exit code, number of problems listed, and the output with
    whitespace collapsed (the console may wrap long lines)."""
    rc = main(["check", str(path)])
    out = capsys.readouterr().out
    listed = sum(line.startswith("  - ") for line in out.splitlines())
    return rc, listed, " ".join(out.split())


def _flat(text: str) -> str:
    return " ".join(text.split())


def test_demo_spec_passes_check(demo: tuple[Path, dict[str, Any]],
                                capsys: pytest.CaptureFixture[str]) -> None:
    spec_path, _ = demo
    rc, listed, out = _check(spec_path, capsys)
    # At 400 rows a cohort's smallest legacy group can hold fewer than min_cell rows: that is a
    # note (counts suppressed), not a problem.
    notes = out.count("hold fewer than disclosure.min_cell = 10 rows")
    assert rc == 0 and listed == notes
    assert "is usable: 3 cohort(s), 5 analysis(es)" in out
    spec = load_spec(spec_path)
    assert [a.family for a in spec.analyses] == ["binary", "survival", "count", "continuous",
                                                "binary"]


def test_unknown_key_and_unsorted_cuts_are_each_reported(
        demo: tuple[Path, dict[str, Any]], capsys: pytest.CaptureFixture[str]) -> None:
    spec_path, raw = demo
    raw["analyses"][0]["adjsut"] = raw["analyses"][0].pop("adjust")
    raw["groupings"]["age"]["cuts"] = [60, 50, 70]
    bad = _write(spec_path.parent / "bad.yaml", raw)

    with pytest.raises(SpecError) as err:
        load_spec(bad)
    problems = err.value.problems
    assert len(problems) == 2, problems
    key, cuts = sorted(problems)  # 'analyses[...]...' sorts before 'groupings...'
    assert "unknown key 'adjsut'" in key and "Did you mean 'adjust'?" in key
    assert key.startswith("analyses[readmission_sodium]")  # one path style: by name
    assert cuts.startswith("groupings.age.cuts") and "strictly increasing" in cuts
    assert "[50.0, 60.0, 70.0]" in cuts  # the fix is spelled out

    rc, listed, out = _check(bad, capsys)
    assert rc != 0 and listed == 2
    assert "The spec has 2 problem(s)" in out
    assert all(_flat(p) in out for p in problems)


def test_misspelt_variable_is_found_against_the_data(demo: tuple[Path, dict[str, Any]],
                                                      capsys: pytest.CaptureFixture[str]) -> None:
    spec_path, raw = demo
    raw["analyses"][2]["adjust"] = ["agee", "diabetes"]  # visits_bmi; 'age' misspelt
    bad = _write(spec_path.parent / "typo.yaml", raw)
    spec = load_spec(bad)  # a valid spec: the column is only missing from the extract
    problems = data_problems(spec)
    # one message per distinct set of extract columns: the parquet cohorts share theirs, the
    # CSV cohort delivers dates instead of durations
    assert len(problems) == 2
    assert problems[0].endswith("(cohorts lindenfeld, marrowby)")
    assert problems[1].endswith("(cohort eastholm)")
    for p in problems:
        assert "'agee'" in p and "Did you mean 'age'?" in p
        assert p.startswith("analyses[visits_bmi].adjust[0]")

    rc, listed, out = _check(bad, capsys)
    assert rc != 0 and listed == 2
    assert "does not match the data" in out and all(_flat(p) in out for p in problems)


def test_malformed_yaml_names_the_line(tmp_path: Path) -> None:
    text = ("study: broken\n"
            "cohorts:\n"
            "  - {name: c, path: c.csv}\n"
            "analyses:\n"
            "  - name: a\n"
            "    exposure: age: 5\n")
    path = tmp_path / "broken.yaml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SpecError) as err:
        load_spec(path)
    assert len(err.value.problems) == 1
    msg = err.value.problems[0]
    assert "broken.yaml is not valid YAML at line 6" in msg


def test_yaml_that_is_not_a_mapping_and_missing_file_are_clear(tmp_path: Path) -> None:
    path = tmp_path / "list.yaml"
    path.write_text("- a\n- b\n", encoding="utf-8")
    with pytest.raises(SpecError, match="must be a mapping"):
        load_spec(path)
    with pytest.raises(SpecError, match="does not exist"):
        load_spec(tmp_path / "nope.yaml")


def _minimal(**analysis: Any) -> dict[str, Any]:
    a = {"name": "a", "outcome": {"type": "binary", "event": "dead"}, "exposure": "egfr"}
    a.update(analysis)
    return {"study": "s", "cohorts": [{"name": "c", "path": "c.csv"}],
            "groupings": {"egfr": {"cuts": [30, 45, 60]}}, "analyses": [a]}


def test_outcome_key_typo_gives_one_suggestion_not_a_pile(tmp_path: Path) -> None:
    raw = _minimal(outcome={"type": "binary", "evnt": "dead"})
    with pytest.raises(SpecError) as err:
        parse_spec(raw, base=tmp_path)
    problems = err.value.problems
    # The typo is the one cause: the outcome is checked as if 'evnt' read 'event', so neither
    # "needs 'event'" nor "not used by a binary outcome" follows from it.
    assert len(problems) == 1, problems
    assert "unknown key 'evnt'" in problems[0] and "Did you mean 'event'?" in problems[0]


def test_reference_group_must_be_a_group(tmp_path: Path) -> None:
    raw = _minimal()
    raw["groupings"]["egfr"]["reference"] = ">=65"
    with pytest.raises(SpecError) as err:
        parse_spec(raw, base=tmp_path)
    (msg,) = err.value.problems
    assert msg.startswith("groupings.egfr.reference") and "Did you mean '>=60'?" in msg


def test_default_group_labels_follow_the_closed_side(tmp_path: Path) -> None:
    raw = _minimal()
    raw["groupings"]["age"] = {"cuts": [50, 70], "closed": "right"}
    raw["groupings"]["sbp"] = {"quantiles": 3}
    spec = parse_spec(raw, base=tmp_path)
    assert spec.groupings["egfr"].labels == ("<30", "30-<45", "45-<60", ">=60")
    assert spec.groupings["egfr"].reference == "<30" and spec.groupings["egfr"].closed == "left"
    assert spec.groupings["age"].labels == ("<=50", ">50-70", ">70")
    assert spec.groupings["sbp"].labels == ("Q1", "Q2", "Q3") and spec.groupings["sbp"].cuts is None
    assert spec.cohorts[0].path == (tmp_path / "c.csv").resolve()


def test_strata_outside_survival_and_bad_filter_are_reported(tmp_path: Path) -> None:
    raw = _minimal(strata=["centre"], filters=[{"variable": "age", "min": 80, "max": 18}])
    with pytest.raises(SpecError) as err:
        parse_spec(raw, base=tmp_path)
    problems = err.value.problems
    assert len(problems) == 2
    assert any("strata are for survival" in p for p in problems)
    assert any("min 80 > max 18" in p for p in problems)


@pytest.mark.parametrize(("broken", "what"), [
    ('    cuts: "60', "quoted scalar"),      # an unclosed quote, noticed only at the end
    ("    cuts: [60, 90", "flow sequence"),  # an unclosed bracket, noticed a line later
    ("\tcuts: [60]", None),                  # a tab: found where it is
])
def test_yaml_errors_point_at_the_broken_line(tmp_path: Path, broken: str,
                                              what: str | None) -> None:
    """The broken construct is on line 4; the parser notices some of them far later (the end
    of the file for an unclosed quote): the message names line 4 and what was left open."""
    body = ["study: s", "groupings:", "  egfr:", broken, "    closed: left",
            *[f"# filler {i}" for i in range(40)], "cohorts: []"]
    path = tmp_path / "spec.yaml"
    path.write_text("\n".join(body) + "\n", encoding="utf-8")
    with pytest.raises(SpecError) as err:
        load_spec(path)
    (msg,) = err.value.problems
    assert "is not valid YAML at line 4," in msg, msg
    if what:
        assert f"the {what} that starts there is not closed" in msg


def test_weights_cluster_and_count_model_keys(tmp_path: Path) -> None:
    # an analysis' own weights/cluster override the study's; null switches the default off
    raw = _minimal(weights={"column": "ipw", "kind": "sampling"})
    raw["cluster"] = "centre"
    raw["weights"] = {"column": "freq", "kind": "frequency"}
    raw["analyses"].append({"name": "b", "outcome": {"type": "count", "count": "n",
                                                      "persontime": "py",
                                                      "count_model": "quasi-poisson"},
                            "exposure": "egfr", "cluster": None})
    spec = parse_spec(raw, base=tmp_path)
    a, b = spec.analyses
    assert a.weights is not None and (a.weights.column, a.weights.kind) == ("ipw", "sampling")
    assert a.cluster == "centre" and a.robust and "centre" in a.columns and "ipw" in a.columns
    assert b.weights is not None and b.weights.kind == "frequency" and b.cluster is None
    assert not b.robust and b.outcome.count_model == "quasi-poisson"
    assert spec.slice_for("b")["weights"] == {"column": "freq", "kind": "frequency"}


def test_misspelt_weights_keys_and_a_stray_count_model_are_reported(tmp_path: Path) -> None:
    raw = _minimal(weights={"colum": "ipw", "kind": "samplng"},
                   outcome={"type": "binary", "event": "dead", "count_model": "quasi-poisson"})
    with pytest.raises(SpecError) as err:
        parse_spec(raw, base=tmp_path)
    text = " ".join(err.value.problems)
    assert "unknown key 'colum'. Did you mean 'column'?" in text
    assert "'samplng' is not one of ['frequency', 'sampling']. Did you mean 'sampling'?" in text
    assert "outcome.count_model: only count outcomes take a count model" in text
