"""The checks the JSON schema cannot express (sorted cuts, references, required outcome
fields, finite numbers, text keys)."""

from __future__ import annotations

import difflib
import math
import re
from typing import Any

from ..published.spec import published_problems
from .extract_checks import csv_problems, followup_problems
from .model import OPTIONAL_OUTCOME_FIELDS, OUTCOME_FIELDS, _labels_for


def _where(path: Any) -> str:
    out = ""
    for part in path:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out or "(top level)"


def _value_problems(node: Any, path: tuple[Any, ...] = ()) -> list[str]:
    """What YAML reads but JSON cannot hold, so the schema does not see it: .nan and .inf as
    numbers, and keys that are not text (unquoted numbers, dates, null, yes/no/on/off)."""
    if isinstance(node, float) and not math.isfinite(node):
        return [f"{_where(path)}: {node!r} is not a finite number; write a finite value."]
    problems: list[str] = []
    if isinstance(node, dict):
        for k, v in node.items():
            if not isinstance(k, str):
                problems.append(f"{_where(path)}: the key {k!r} is not text (YAML reads unquoted "
                                "numbers, dates, null, yes/no/on/off as values); quote it.")
            problems += _value_problems(v, (*path, str(k)))
    elif isinstance(node, list):
        problems += [p for i, v in enumerate(node) for p in _value_problems(v, (*path, i))]
    return problems


def semantic_problems(raw: dict[str, Any]) -> list[str]:
    """Checks the schema cannot express, one checker per spec section, in a fixed order."""
    groupings = raw.get("groupings", {}) or {}
    problems: list[str] = _value_problems(raw)
    problems += _name_problems(raw)
    problems += _grouping_problems(groupings, raw.get("cohorts", []))
    problems += _unique_name_problems(raw)
    for i, analysis in enumerate(raw.get("analyses", [])):
        problems += _analysis_problems(i, analysis, groupings)
        problems += _subdistribution_variance_problems(i, analysis, raw)
    problems += _continuous_problems("continuous", raw.get("continuous", {}))
    problems += csv_problems(raw) + followup_problems(raw)
    problems += published_problems(raw)
    return problems


def _name_problems(raw: dict[str, Any]) -> list[str]:
    """Study, cohort and analysis names: identifiers through to the end.

    The schema's identifier pattern ends in '$', which also matches before a final line break;
    names become folders of the output, so they must be identifiers through to the end."""
    named = [("study", raw.get("study"))]
    named += [(f"{key}[{i}].name", item.get("name")) for key in ("cohorts", "analyses")
              for i, item in enumerate(raw.get(key, []))]
    return [f"{where}: {name!r} is not a valid identifier; use letters, digits, '_' and '-' "
            "(starting with a letter or digit)."
            for where, name in named if isinstance(name, str) and name.endswith("\n")]


def _grouping_problems(groupings: dict[str, Any], cohorts: list[dict[str, Any]]) -> list[str]:
    """The study's groupings and the cohorts' own: cuts or quantiles, labels, references."""
    problems: list[str] = []
    sources = [(f"groupings.{var}", g) for var, g in groupings.items()]
    for i, c in enumerate(cohorts):
        for var, g in (c.get("groupings") or {}).items():
            sources.append((f"cohorts[{i}].groupings.{var}", g))
            if var not in groupings:
                problems.append(f"cohorts[{i}].groupings.{var}: {var!r} has no study-level "
                                f"grouping; declare groupings.{var} too (the cohorts' own cuts "
                                "override it).")
    for where, g in sources:
        problems += _one_grouping_problems(where, g)
    return problems


def _one_grouping_problems(where: str, grouping: dict[str, Any]) -> list[str]:
    has_cuts, has_q = "cuts" in grouping, "quantiles" in grouping
    if has_cuts == has_q:
        return [f"{where}: give exactly one of 'cuts' (cut points) or 'quantiles' "
                f"(number of equal-frequency groups); got {sorted(grouping)}."]
    problems: list[str] = []
    if has_cuts:
        cuts = [float(c) for c in grouping["cuts"]]
        if any(b <= a for a, b in zip(cuts, cuts[1:], strict=False)):
            problems.append(f"{where}.cuts: {grouping['cuts']} must be strictly increasing with no "
                            f"repeats; write them as {sorted(set(cuts))}.")
    labels = _labels_for(grouping)
    n_groups = len(grouping["cuts"]) + 1 if has_cuts else int(grouping["quantiles"])
    if "labels" in grouping:
        if len(grouping["labels"]) != n_groups:
            problems.append(f"{where}.labels: {len(grouping['labels'])} labels given for "
                            f"{n_groups} groups; give one label per group, lowest group first.")
        elif len(set(grouping["labels"])) != len(grouping["labels"]):
            problems.append(f"{where}.labels: {grouping['labels']} contains repeats; labels "
                            "must be distinct.")
    if "reference" in grouping and labels is not None and grouping["reference"] not in labels:
        close = difflib.get_close_matches(str(grouping["reference"]), labels, n=1)
        hint = f" Did you mean {close[0]!r}?" if close else ""
        problems.append(f"{where}.reference: {grouping['reference']!r} is not one of the groups "
                        f"{labels}.{hint}")
    return problems


def _unique_name_problems(raw: dict[str, Any]) -> list[str]:
    """Cohort names and analysis names are each used once."""
    problems: list[str] = []
    for key, what in (("cohorts", "cohort"), ("analyses", "analysis")):
        names = [item.get("name") for item in raw.get(key, [])]
        for dup in sorted({n for n in names if names.count(n) > 1}):
            problems.append(f"{key}: the name {dup!r} is used more than once; {what} names "
                            "must be unique.")
    return problems


def _analysis_problems(i: int, analysis: dict[str, Any], groupings: dict[str, Any]) -> list[str]:
    """One analysis: its outcome, thresholds, strata, exposure, variables, reported result,
    filters and continuous options."""
    where = f"analyses[{i}] ({analysis.get('name')})"
    kind = analysis["outcome"]["type"]
    problems = _outcome_problems(where, analysis["outcome"])
    problems += _competing_problems(where, analysis["outcome"])
    problems += _threshold_problems(where, kind, analysis.get("risk_thresholds", []))
    if analysis.get("strata") and kind != "survival":
        problems.append(f"{where}.strata: strata are for survival (Cox) outcomes only; put "
                        f"{analysis['strata']} under 'adjust' for a {kind} outcome.")
    problems += _variable_problems(where, analysis, groupings)
    if "reported" in analysis and analysis["exposure"] in groupings:
        problems += _reported_problems(where, kind, analysis["reported"],
                                       _labels_for(groupings[analysis["exposure"]]) or [],
                                       analysis["exposure"])
    problems += _filter_problems(where, analysis.get("filters", []))
    problems += _continuous_problems(f"{where}.continuous", analysis.get("continuous", {}))
    problems += design_problems(where, analysis)
    return problems


def design_problems(where: str, analysis: dict[str, Any]) -> list[str]:
    """The ``design`` block: binary outcomes (survival ones take firth only); a matched-set
    column that is not also the exposure or an adjustment variable; no Firth penalty on a
    conditional (matched) fit."""
    design = analysis.get("design") or {}
    if not design:
        return []
    kind = analysis["outcome"]["type"]
    if kind == "survival" and set(design) <= {"firth"}:
        return []  # Firth's penalised partial likelihood (Heinze & Schemper 2001)
    if kind != "binary":
        return [f"{where}.design: the design block is for binary outcomes (and firth for "
                f"survival ones); a {kind} outcome takes none of "
                f"{sorted(k for k in design if kind != 'survival' or k != 'firth')} (remove "
                "them, or stratify a survival outcome with 'strata')."]
    problems: list[str] = []
    matched = design.get("matched_set")
    if matched and matched in (analysis.get("exposure"), *analysis.get("adjust", []),
                               analysis.get("by")):
        problems.append(f"{where}.design.matched_set: {matched!r} is also the exposure, an "
                        "adjustment variable or 'by'; the matched set is conditioned on, so "
                        "remove it from the others.")
    if matched and design.get("firth"):
        problems.append(f"{where}.design: firth is not available for a matched-set "
                        "(conditional) fit; remove 'firth' or 'matched_set'.")
    if design.get("case_control") is False and "prevalence" in design:
        problems.append(f"{where}.design: a prevalence is given but case_control is false; a "
                        "prevalence describes a case-control extract, so remove one of them.")
    return problems


def _outcome_problems(where: str, outcome: dict[str, Any]) -> list[str]:
    """The outcome's required fields are there and no other outcome type's fields."""
    kind = outcome["type"]
    problems = [f"{where}.outcome: a {kind} outcome needs '{field}' (a column name); add it."
                for field in OUTCOME_FIELDS[kind] if field not in outcome]
    allowed = set(OUTCOME_FIELDS[kind]) | set(OPTIONAL_OUTCOME_FIELDS[kind]) | {"type"}
    known = {k for fs in (*OUTCOME_FIELDS.values(), *OPTIONAL_OUTCOME_FIELDS.values())
             for k in fs}
    for field in sorted((set(outcome) - allowed) & known):  # unknown keys: the schema reports them
        problems.append(f"{where}.outcome.{field}: not used by a {kind} outcome (it takes "
                        f"{sorted(allowed - {'type'})}); remove it.")
    if outcome.get("count_model", "poisson") != "poisson" and kind != "count":
        problems.append(f"{where}.outcome.count_model: only count outcomes take a count "
                        f"model (this outcome is {kind}); remove it.")
    return problems


def _competing_problems(where: str, outcome: dict[str, Any]) -> list[str]:
    """The event of interest is a non-zero code that is not also listed as competing."""
    if outcome.get("type") != "survival":
        return []
    interest = outcome.get("event_of_interest", 1)
    competing = outcome.get("competing", [])
    problems: list[str] = []
    if interest == 0:
        problems.append(f"{where}.outcome.event_of_interest: 0 is the censoring code; give the "
                        "event column's code of the event of interest (e.g. 1).")
    if isinstance(competing, list) and interest in competing:
        problems.append(f"{where}.outcome.competing: {competing} lists the event of interest "
                        f"({interest}); list only the other causes' codes, e.g. [2].")
    if "event_of_interest" in outcome and "competing" not in outcome and interest != 1:
        problems.append(f"{where}.outcome.event_of_interest: without 'competing' the event "
                        "column is 0/1; list the competing codes (competing: [2]) or drop "
                        "event_of_interest.")
    return problems


def _subdistribution_variance_problems(i: int, analysis: dict[str, Any],
                                       raw: dict[str, Any]) -> list[str]:
    """``outcome.subdistribution_variance`` needs competing events, and its bootstrap needs
    resampling draws."""
    outcome = analysis.get("outcome") or {}
    choice = outcome.get("subdistribution_variance")
    if choice is None or outcome.get("type") != "survival":
        return []  # other outcome types: _outcome_problems names the key
    where = f"analyses[{i}] ({analysis.get('name')}).outcome.subdistribution_variance"
    if not outcome.get("competing"):
        return [f"{where}: the Fine–Gray variance applies only with competing events; list "
                "their codes under 'competing' (e.g. competing: [2]) or remove the key."]
    draws = (raw.get("resampling") or {}).get("bootstrap", 200)
    if choice == "bootstrap" and isinstance(draws, int) and draws < 2:
        return [f"{where}: 'bootstrap' takes its resamples from resampling.bootstrap, which is "
                f"{draws}; set resampling.bootstrap to 2 or more (200 or more for a stable "
                "covariance) or use 'sandwich'."]
    return []


def _threshold_problems(where: str, kind: str, thresholds: list[float]) -> list[str]:
    """Risk thresholds lie on the outcome's risk scale."""
    problems: list[str] = []
    for t in thresholds:
        if (kind in ("binary", "survival") and not 0 < t < 1) or (kind == "count" and t <= 0):
            scale = "a probability in (0, 1)" if kind != "count" else "a rate > 0"
            problems.append(f"{where}.risk_thresholds: {t} is not {scale} (the risk scale of a "
                            f"{kind} outcome).")
    return problems


def _variable_problems(where: str, analysis: dict[str, Any],
                       groupings: dict[str, Any]) -> list[str]:
    """The exposure has a grouping; no variable is named twice among an analysis' roles."""
    problems: list[str] = []
    exposure = analysis["exposure"]
    if exposure not in groupings:
        problems.append(f"{where}.exposure: {exposure!r} has no entry under 'groupings'; declare "
                        "how the legacy analysis grouped it "
                        f"(groupings.{exposure}: {{cuts: [...]}}).")
    lists = [analysis.get(k) for k in ("adjust", "strata")]  # not lists: the schema reports them
    involved = ([exposure, *(v for vs in lists if isinstance(vs, list) for v in vs)]
                + ([analysis["by"]] if "by" in analysis else []))
    for v in sorted({v for v in involved if involved.count(v) > 1}):
        problems.append(f"{where}: variable {v!r} appears more than once among exposure, "
                        "adjust, strata and by; list it once.")
    return problems


def _reported_problems(where: str, kind: str, reported: dict[str, Any], labels: list[str],
                       exposure: str) -> list[str]:
    """The published contrast names two of the exposure's groups; its numbers are coherent."""
    problems: list[str] = []
    parts = re.split(r"\s+vs\.?\s+", str(reported["contrast"]).strip(), maxsplit=1)
    if len(parts) != 2:
        problems.append(f"{where}.reported.contrast: {reported['contrast']!r} must read "
                        f"'<group> vs <reference group>' with groups from {labels}.")
    else:
        for part in parts:
            if part.strip() not in labels:
                problems.append(f"{where}.reported.contrast: group {part.strip()!r} is not "
                                f"one of {exposure}'s groups {labels}.")
    if ("lower" in reported and "upper" in reported
            and not reported["lower"] <= reported["estimate"] <= reported["upper"]):
        problems.append(f"{where}.reported: estimate {reported['estimate']} is not inside "
                        f"[{reported['lower']}, {reported['upper']}]; check the published numbers.")
    if kind != "continuous" and reported["estimate"] <= 0:
        problems.append(f"{where}.reported.estimate: {reported['estimate']} must be a ratio > 0 "
                        f"for a {kind} outcome (odds, hazard or rate ratio).")
    return problems


def _filter_problems(where: str, filters: list[dict[str, Any]]) -> list[str]:
    """Each filter has a condition and a non-empty range."""
    problems: list[str] = []
    for j, condition in enumerate(filters):
        if not ({"min", "max", "in"} & set(condition)):
            problems.append(f"{where}.filters[{j}]: filter on {condition['variable']!r} has no "
                            "condition; give min, max or in.")
        if "min" in condition and "max" in condition and condition["min"] > condition["max"]:
            problems.append(f"{where}.filters[{j}]: min {condition['min']} > max "
                            f"{condition['max']}.")
    return problems


def _continuous_problems(where: str, opts: dict[str, Any]) -> list[str]:
    """Fixed spline knots are strictly increasing."""
    knots = opts.get("spline_knots")
    if isinstance(knots, dict):
        vals = [float(v) for v in knots["values"]]
        if any(b <= a for a, b in zip(vals, vals[1:], strict=False)):
            return [f"{where}.spline_knots.values: {knots['values']} must be strictly increasing."]
    return []
