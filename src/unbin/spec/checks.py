"""The checks the JSON schema cannot express (sorted cuts, references, required outcome
fields, finite numbers, text keys)."""

from __future__ import annotations

import difflib
import math
import re
from typing import Any

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
    """Checks the schema cannot express: sorted cuts, references, required outcome fields."""
    problems: list[str] = _value_problems(raw)
    # The schema's identifier pattern ends in '$', which also matches before a final line break;
    # names become folders of the output, so they must be identifiers through to the end.
    named = [("study", raw.get("study"))]
    named += [(f"{key}[{i}].name", item.get("name")) for key in ("cohorts", "analyses")
              for i, item in enumerate(raw.get(key, []))]
    for where, name in named:
        if isinstance(name, str) and name.endswith("\n"):
            problems.append(f"{where}: {name!r} is not a valid identifier; use letters, digits, "
                            "'_' and '-' (starting with a letter or digit).")
    groupings = raw.get("groupings", {}) or {}
    sources = [(f"groupings.{var}", g) for var, g in groupings.items()]
    for i, c in enumerate(raw.get("cohorts", [])):
        for var, g in (c.get("groupings") or {}).items():
            sources.append((f"cohorts[{i}].groupings.{var}", g))
            if var not in groupings:
                problems.append(f"cohorts[{i}].groupings.{var}: {var!r} has no study-level "
                                f"grouping; declare groupings.{var} too (the cohorts' own cuts "
                                "override it).")
    for where, g in sources:
        has_cuts, has_q = "cuts" in g, "quantiles" in g
        if has_cuts == has_q:
            problems.append(f"{where}: give exactly one of 'cuts' (cut points) or 'quantiles' "
                            f"(number of equal-frequency groups); got {sorted(g)}.")
            continue
        if has_cuts:
            cuts = [float(c) for c in g["cuts"]]
            if any(b <= a for a, b in zip(cuts, cuts[1:], strict=False)):
                problems.append(f"{where}.cuts: {g['cuts']} must be strictly increasing with no "
                                f"repeats; write them as {sorted(set(cuts))}.")
        labels = _labels_for(g)
        n_groups = len(g["cuts"]) + 1 if has_cuts else int(g["quantiles"])
        if "labels" in g:
            if len(g["labels"]) != n_groups:
                problems.append(f"{where}.labels: {len(g['labels'])} labels given for {n_groups} "
                                f"groups; give one label per group, lowest group first.")
            elif len(set(g["labels"])) != len(g["labels"]):
                problems.append(f"{where}.labels: {g['labels']} contains repeats; labels must be "
                                "distinct.")
        if "reference" in g and labels is not None and g["reference"] not in labels:
            close = difflib.get_close_matches(str(g["reference"]), labels, n=1)
            hint = f" Did you mean {close[0]!r}?" if close else ""
            problems.append(f"{where}.reference: {g['reference']!r} is not one of the groups "
                            f"{labels}.{hint}")
    names = [c.get("name") for c in raw.get("cohorts", [])]
    for dup in sorted({n for n in names if names.count(n) > 1}):
        problems.append(f"cohorts: the name {dup!r} is used more than once; cohort names must be "
                        "unique.")
    anames = [a.get("name") for a in raw.get("analyses", [])]
    for dup in sorted({n for n in anames if anames.count(n) > 1}):
        problems.append(f"analyses: the name {dup!r} is used more than once; analysis names "
                        "must be unique.")
    for i, a in enumerate(raw.get("analyses", [])):
        where = f"analyses[{i}] ({a.get('name')})"
        out = a["outcome"]
        kind = out["type"]
        for f_ in OUTCOME_FIELDS[kind]:
            if f_ not in out:
                problems.append(f"{where}.outcome: a {kind} outcome needs '{f_}' (a column name); "
                                "add it.")
        allowed = set(OUTCOME_FIELDS[kind]) | set(OPTIONAL_OUTCOME_FIELDS[kind]) | {"type"}
        known = {k for fs in (*OUTCOME_FIELDS.values(), *OPTIONAL_OUTCOME_FIELDS.values())
                 for k in fs}
        for f_ in sorted((set(out) - allowed) & known):  # unknown keys: the schema reports them
            problems.append(f"{where}.outcome.{f_}: not used by a {kind} outcome (it takes "
                            f"{sorted(allowed - {'type'})}); remove it.")
        if out.get("count_model", "poisson") != "poisson" and kind != "count":
            problems.append(f"{where}.outcome.count_model: only count outcomes take a count "
                            f"model (this outcome is {kind}); remove it.")
        for t in a.get("risk_thresholds", []):
            if (kind in ("binary", "survival") and not 0 < t < 1) or (kind == "count" and t <= 0):
                scale = "a probability in (0, 1)" if kind != "count" else "a rate > 0"
                problems.append(f"{where}.risk_thresholds: {t} is not {scale} (the risk scale of a "
                                f"{kind} outcome).")
        if a.get("strata") and kind != "survival":
            problems.append(f"{where}.strata: strata are for survival (Cox) outcomes only; put "
                            f"{a['strata']} under 'adjust' for a {kind} outcome.")
        exp = a["exposure"]
        if exp not in groupings:
            problems.append(f"{where}.exposure: {exp!r} has no entry under 'groupings'; declare "
                            f"how the legacy analysis grouped it (groupings.{exp}: {{cuts: [...]}}).")
        lists = [a.get(k) for k in ("adjust", "strata")]  # not lists: the schema reports them
        involved = ([exp, *(v for vs in lists if isinstance(vs, list) for v in vs)]
                    + ([a["by"]] if "by" in a else []))
        for v in sorted({v for v in involved if involved.count(v) > 1}):
            problems.append(f"{where}: variable {v!r} appears more than once among exposure, "
                            "adjust, strata and by; list it once.")
        if "reported" in a and exp in groupings:
            rep = a["reported"]
            labels = _labels_for(groupings[exp]) or []
            parts = re.split(r"\s+vs\.?\s+", str(rep["contrast"]).strip(), maxsplit=1)
            if len(parts) != 2:
                problems.append(f"{where}.reported.contrast: {rep['contrast']!r} must read "
                                f"'<group> vs <reference group>' with groups from {labels}.")
            else:
                for part in parts:
                    if part.strip() not in labels:
                        problems.append(f"{where}.reported.contrast: group {part.strip()!r} is not "
                                        f"one of {exp}'s groups {labels}.")
            if "lower" in rep and "upper" in rep and not rep["lower"] <= rep["estimate"] <= rep["upper"]:
                problems.append(f"{where}.reported: estimate {rep['estimate']} is not inside "
                                f"[{rep['lower']}, {rep['upper']}]; check the published numbers.")
            if kind != "continuous" and rep["estimate"] <= 0:
                problems.append(f"{where}.reported.estimate: {rep['estimate']} must be a ratio > 0 "
                                f"for a {kind} outcome (odds, hazard or rate ratio).")
        for j, flt in enumerate(a.get("filters", [])):
            if not ({"min", "max", "in"} & set(flt)):
                problems.append(f"{where}.filters[{j}]: filter on {flt['variable']!r} has no "
                                "condition; give min, max or in.")
            if "min" in flt and "max" in flt and flt["min"] > flt["max"]:
                problems.append(f"{where}.filters[{j}]: min {flt['min']} > max {flt['max']}.")
        for opts_where, opts in ((f"{where}.continuous", a.get("continuous", {})),):
            problems += _continuous_problems(opts_where, opts)
    problems += _continuous_problems("continuous", raw.get("continuous", {}))
    return problems


def _continuous_problems(where: str, opts: dict[str, Any]) -> list[str]:
    knots = opts.get("spline_knots")
    if isinstance(knots, dict):
        vals = [float(v) for v in knots["values"]]
        if any(b <= a for a, b in zip(vals, vals[1:], strict=False)):
            return [f"{where}.spline_knots.values: {knots['values']} must be strictly increasing."]
    return []
