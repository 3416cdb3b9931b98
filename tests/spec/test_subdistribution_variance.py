"""The spec key ``outcome.subdistribution_variance``: read, and bad values rejected with a
message naming the key, the problem and the fix."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from unbin.errors import SpecError
from unbin.spec import parse_spec


def _raw(outcome: dict[str, Any], resampling: dict[str, int] | None = None) -> dict[str, Any]:
    raw: dict[str, Any] = {
        "study": "sim", "cohorts": [{"name": "sim", "path": "sim.parquet"}],
        "groupings": {"x": {"cuts": [0.0]}},
        "analyses": [{"name": "a", "outcome": outcome, "exposure": "x"}]}
    if resampling is not None:
        raw["resampling"] = resampling
    return raw


COMPETING = {"type": "survival", "event": "ev", "time": "t", "competing": [2]}


def _problems(raw: dict[str, Any]) -> str:
    with pytest.raises(SpecError) as err:
        parse_spec(raw, base=Path("."))
    return " ".join(" ".join(err.value.problems).split())


def test_the_choice_is_read_and_defaults_to_the_sandwich() -> None:
    spec = parse_spec(_raw(COMPETING), base=Path("."))
    assert spec.analyses[0].outcome.subdistribution_variance == "sandwich"
    boot = parse_spec(_raw({**COMPETING, "subdistribution_variance": "bootstrap"}),
                      base=Path("."))
    assert boot.analyses[0].outcome.subdistribution_variance == "bootstrap"
    # the choice is part of the analysis' slice of the spec, so changing it reruns the analysis
    assert (boot.slice_for("a")["analysis"]["outcome"]["subdistribution_variance"]
            == "bootstrap")


def test_an_unknown_value_names_the_choices() -> None:
    text = _problems(_raw({**COMPETING, "subdistribution_variance": "bootstrp"}))
    assert "subdistribution_variance" in text
    assert "'bootstrp' is not one of ['sandwich', 'bootstrap']" in text
    assert "Did you mean 'bootstrap'?" in text


def test_without_competing_events_the_key_is_rejected() -> None:
    text = _problems(_raw({"type": "survival", "event": "ev", "time": "t",
                           "subdistribution_variance": "sandwich"}))
    assert ("analyses[a].outcome.subdistribution_variance: the Fine–Gray variance applies "
            "only with competing events; list their codes under 'competing'") in text


def test_another_outcome_type_is_told_the_key_is_not_its_own() -> None:
    text = _problems(_raw({"type": "binary", "event": "ev",
                           "subdistribution_variance": "bootstrap"}))
    assert "outcome.subdistribution_variance: not used by a binary outcome" in text


@pytest.mark.parametrize("draws", [0, 1])
def test_bootstrap_without_resamples_is_rejected(draws: int) -> None:
    text = _problems(_raw({**COMPETING, "subdistribution_variance": "bootstrap"},
                          {"bootstrap": draws}))
    assert (f"'bootstrap' takes its resamples from resampling.bootstrap, which is {draws}; set "
            "resampling.bootstrap to 2 or more") in text
    # the sandwich needs no resamples
    parse_spec(_raw({**COMPETING, "subdistribution_variance": "sandwich"}, {"bootstrap": 0}),
               base=Path("."))
