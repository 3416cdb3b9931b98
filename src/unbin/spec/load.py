"""Loading a spec: YAML reading, schema validation with located messages, and building the
model. Nothing in a spec is ever evaluated as code: filters are structured (variable, min, max,
in)."""

from __future__ import annotations

import difflib
import hashlib
import json
import os
import re
from functools import cache
from importlib import resources
from pathlib import Path
from typing import Any

import yaml

from ..errors import SpecError
from . import model
from .checks import _where, semantic_problems
from .model import (
    AGE_AT_ENTRY,
    ATTAINED_AGE,
    DEFAULT_SEED,
    TIME_AT_ENTRY,
    TIME_ON_STUDY,
    Analysis,
    ContinuousOptions,
    CsvDialect,
    FollowUp,
    Grouping,
    OutcomeSpec,
    Spec,
    VariableInfo,
    Weighting,
    _labels_for,
)


@cache
def spec_schema() -> dict[str, Any]:
    """The JSON schema of the spec, as shipped inside the package."""
    text = resources.files("unbin").joinpath("workflow/schemas/spec.schema.json").read_text()
    return dict(json.loads(text))


def read_yaml(path: str | Path) -> dict[str, Any]:
    return _read_yaml(Path(path))[0]


def _read_yaml(p: Path) -> tuple[dict[str, Any], str]:
    """The file's top-level mapping and the SHA-256 of the bytes it was read from."""
    if not p.is_file():
        raise SpecError(f"spec: file {str(p)!r} does not exist; pass the path of a YAML spec.")
    try:
        content = p.read_bytes()
        data = yaml.safe_load(content.decode("utf-8"))
    except yaml.YAMLError as exc:
        raise SpecError(yaml_message(p.name, exc)) from None
    except UnicodeDecodeError:
        raise SpecError(f"spec: {p.name} is not UTF-8 text; save it as UTF-8.") from None
    except RecursionError:
        raise SpecError(f"spec: {p.name} is nested too deeply to be a spec; a spec needs a "
                        "handful of levels.") from None
    except OSError as exc:
        raise SpecError(f"spec: cannot read {p.name}: {exc.strerror or exc}.") from None
    if not isinstance(data, dict):
        raise SpecError(f"spec: the top level of {p.name} must be a mapping (key: value), "
                        f"got {type(data).__name__}.")
    return data, hashlib.sha256(content).hexdigest()


def yaml_message(name: str, exc: yaml.YAMLError) -> str:
    """A YAML syntax error, located where the broken construct starts (an unclosed quote or
    bracket is only noticed lines later, often at the end of the file), then what was found."""
    mark = getattr(exc, "problem_mark", None)
    start = getattr(exc, "context_mark", None)
    problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
    context = getattr(exc, "context", None)
    at = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
    what = re.sub(r"^while (scanning|parsing) (an? )?", "", str(context or ""))
    unclosed = what.startswith(("quoted", "flow", "block scalar", "anchor", "alias", "tag"))
    if start is not None and unclosed and (mark is None or start.line != mark.line):
        return (f"spec: {name} is not valid YAML at line {start.line + 1}, column "
                f"{start.column + 1}: the {what} that starts there is not closed or not "
                f"indented as expected ({problem}{at}). Fix the YAML syntax at line "
                f"{start.line + 1} (indentation, colons, quotes, brackets).")
    return (f"spec: {name} is not valid YAML{at}: {problem}. Fix the YAML syntax "
            "(indentation, colons, quotes).")


# The workflow validates its spec once, when Snakemake reads the workflow, and puts the SHA-256
# of the text it validated into this environment variable for the jobs it starts
# (`validated_spec`). A job whose spec file holds that very text builds the spec without
# validating it again (importing the JSON-schema library alone took about a twentieth of a
# second of each job's CPU time); any other text is validated as usual.
VALIDATED_ENV = "UNBIN_VALIDATED_SPEC"


def load_spec(path: str | Path) -> Spec:
    """Read, validate and resolve a spec file. Raises SpecError listing every problem found."""
    p = Path(path).resolve()
    raw, sha = _read_yaml(p)
    if sha == os.environ.get(VALIDATED_ENV) and not _shape_problem(raw):
        return _build(_dates_as_text(raw), p.parent, p)
    return parse_spec(raw, base=p.parent, source=p)


def validated_spec(path: str | Path) -> tuple[Spec, str]:
    """Read, validate (always) and resolve a spec file; also the SHA-256 of the text validated,
    which the workflow hands its jobs in ``UNBIN_VALIDATED_SPEC``."""
    p = Path(path).resolve()
    raw, sha = _read_yaml(p)
    return parse_spec(raw, base=p.parent, source=p), sha


MAX_SPEC_DEPTH = 32  # a spec needs about 7 levels
MAX_SPEC_NODES = 100_000


def _shape_problem(raw: Any) -> str:
    """A spec is a small tree. YAML aliases can make one that refers to itself, or expand a short
    file into billions of values; either would hang or crash the validators that walk it."""
    seen = 0
    stack: list[tuple[Any, int]] = [(raw, 0)]
    while stack:
        node, depth = stack.pop()
        seen += 1
        if depth > MAX_SPEC_DEPTH:
            return (f"spec: nested more than {MAX_SPEC_DEPTH} levels deep (a YAML alias that "
                    "refers to itself?); write the spec out plainly.")
        if seen > MAX_SPEC_NODES:
            return (f"spec: more than {MAX_SPEC_NODES:,} values (YAML aliases repeated inside "
                    "each other?); write the spec out plainly.")
        if isinstance(node, dict):
            stack += [(v, depth + 1) for v in node.values()]
        elif isinstance(node, list):
            stack += [(v, depth + 1) for v in node]
    return ""


def _dates_as_text(node: Any) -> Any:
    """YAML reads an unquoted 2025-06-30 as a date; the spec holds dates as ISO text."""
    import datetime as dt

    if isinstance(node, dt.date):
        return node.isoformat()
    if isinstance(node, dict):
        return {k: _dates_as_text(v) for k, v in node.items()}
    if isinstance(node, list):
        return [_dates_as_text(v) for v in node]
    return node


def parse_spec(raw: dict[str, Any], base: Path, source: Path | None = None) -> Spec:
    shape = _shape_problem(raw)
    if shape:
        raise SpecError(shape)
    raw = _dates_as_text(raw)
    problems = schema_problems(raw)
    # The semantic checks read the spec as the user meant it: a misspelled key with a close
    # match ('groupngs') is read as the suggestion, so its consequences (every exposure without
    # a grouping) do not bury the cause; independent problems are still all reported.
    try:
        problems += semantic_problems(_with_suggested_keys(raw) if problems else raw)
    except (KeyError, TypeError, ValueError, AttributeError, IndexError):
        if not problems:
            raise
        # A schema problem left the spec too malformed for the semantic checks: report those.
    if problems:
        raise SpecError(named_paths(problems, raw))
    return _build(raw, base, source)


def _with_suggested_keys(raw: dict[str, Any]) -> dict[str, Any]:
    """A copy of ``raw`` with each unknown key renamed to its 'did you mean' suggestion (when
    that key is not present already)."""
    import copy

    import jsonschema

    schema = spec_schema()
    fixed = copy.deepcopy(raw)
    for err in jsonschema.Draft202012Validator(schema).iter_errors(raw):
        if err.validator != "additionalProperties" or not isinstance(err.instance, dict):
            continue
        node: Any = fixed
        for part in err.absolute_path:
            node = node[part]
        allowed = _allowed_keys(schema, list(err.absolute_path))
        for key in sorted(set(err.instance) - set(allowed), key=str):
            close = difflib.get_close_matches(str(key), allowed, n=1, cutoff=0.6)
            if close and close[0] not in node and key in node:
                node[close[0]] = node.pop(key)
    return fixed


def named_paths(problems: list[str], raw: dict[str, Any]) -> list[str]:
    """One path style in every message: a cohort or an analysis by its name
    (``analyses[death_egfr].exposure``), by its position only when it has no usable name."""
    def name_of(key: str, i: int) -> str | None:
        items = raw.get(key)
        if not isinstance(items, list) or i >= len(items) or not isinstance(items[i], dict):
            return None
        name = items[i].get("name")
        if not isinstance(name, str) or not re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9_-]*", name):
            return None
        names = [x.get("name") for x in items if isinstance(x, dict)]
        return name if names.count(name) == 1 else None

    def rewrite(m: re.Match[str]) -> str:
        name = name_of(m.group(1), int(m.group(2)))
        return f"{m.group(1)}[{name}]" if name else m.group(0)

    pattern = re.compile(r"\b(cohorts|analyses)\[(\d+)\](?: \([^)]*\))?")
    return list(dict.fromkeys(pattern.sub(rewrite, p) for p in problems))


def _allowed_keys(schema: dict[str, Any], path: list[Any]) -> list[str]:
    """The property names the schema allows at ``path`` (for 'did you mean')."""
    node: Any = schema
    root = schema
    for part in path:
        if "$ref" in node:
            node = root["$defs"][node["$ref"].split("/")[-1]]
        if isinstance(part, int):
            node = node.get("items", {})
        elif "properties" in node and part in node["properties"]:
            node = node["properties"][part]
        elif isinstance(node.get("additionalProperties"), dict):
            node = node["additionalProperties"]
        else:
            return []
    if "$ref" in node:
        node = root["$defs"][node["$ref"].split("/")[-1]]
    return sorted(node.get("properties", {}))


def schema_problems(raw: dict[str, Any]) -> list[str]:
    """Every schema violation as one message naming the field path, the value and the fix."""
    import jsonschema

    schema = spec_schema()
    validator = jsonschema.Draft202012Validator(schema)
    problems: list[str] = []
    for err in sorted(validator.iter_errors(raw), key=lambda e: list(map(str, e.absolute_path))):
        where = _where(err.absolute_path)
        if err.validator == "additionalProperties":
            allowed = _allowed_keys(schema, list(err.absolute_path))
            if isinstance(err.instance, dict):
                problems += unknown_keys(where, err.instance, allowed)
        elif err.validator == "required":
            problems.append(f"{where}: {err.message}; add it.")
        elif err.validator == "enum":
            close = difflib.get_close_matches(str(err.instance), [str(v) for v in err.validator_value],
                                              n=1)
            hint = f" Did you mean {close[0]!r}?" if close else ""
            problems.append(f"{where}: {err.instance!r} is not one of "
                            f"{list(err.validator_value)}.{hint}")
        elif err.validator == "type":
            problems.append(f"{where}: {err.instance!r} has the wrong type; expected "
                            f"{err.validator_value}.")
        elif err.validator == "pattern":
            problems.append(f"{where}: {err.instance!r} is not a valid identifier; use letters, "
                            "digits, '_' and '-' (starting with a letter or digit).")
        elif (err.validator in ("minimum", "maximum") and where.endswith("_knots")
              and not isinstance(err.instance, bool)):
            problems.append(f"{where}: {err.instance!r} knots is not supported; use a whole "
                            "number of knots from 3 to 7 (4 is the usual choice).")
        elif err.validator == "oneOf" and where.endswith("outcome.time"):
            problems += _time_problems(where, err)
        elif err.validator == "oneOf" and where.endswith("spline_knots"):
            problems.append(f"{where}: {err.instance!r} is neither a list of knot counts (3–7) nor "
                            "{values: [at least 3 knot positions]}.")
        else:
            problems.append(f"{where}: {err.message}.")
    return problems


def unknown_keys(where: str, given: dict[str, Any], allowed: list[str]) -> list[str]:
    """One message per key the schema does not allow, with the closest allowed key."""
    out = []
    for key in sorted(set(given) - set(allowed), key=str):
        close = difflib.get_close_matches(str(key), allowed, n=1, cutoff=0.6)
        hint = f" Did you mean {close[0]!r}?" if close else ""
        out.append(f"{where}: unknown key {key!r}.{hint} Allowed keys: {', '.join(allowed)}.")
    return out


def _time_problems(where: str, err: Any) -> list[str]:
    """A survival time that is neither a column name nor a valid mapping of dates: what is
    wrong inside the mapping, key by key."""
    if not isinstance(err.instance, dict):
        return [f"{where}: {err.instance!r} is neither a column name nor the follow-up's dates "
                "{start: DATE_COLUMN, end: DATE_COLUMN}."]
    out = []
    allowed = sorted(err.validator_value[1]["properties"])
    for e in err.context:
        if not e.relative_schema_path or e.relative_schema_path[0] != 1:
            continue
        w = where + "".join(f".{p}" for p in e.relative_path)
        if e.validator == "required":
            out.append(f"{w}: {e.message}; add it (a date column).")
        elif e.validator == "additionalProperties":
            out += unknown_keys(w, e.instance, allowed)
        elif e.validator == "enum":
            out.append(f"{w}: {e.instance!r} is not one of {list(e.validator_value)}.")
        elif e.validator == "pattern":
            out.append(f"{w}: {e.instance!r} is not a date written YYYY-MM-DD.")
        else:
            out.append(f"{w}: {e.message}.")
    return out or [f"{where}: {err.message}."]


def _continuous(raw: dict[str, Any], base: ContinuousOptions) -> ContinuousOptions:
    knots = raw.get("spline_knots")
    knot_counts, knot_values = base.spline_knots, base.knot_values
    if isinstance(knots, dict):
        knot_values = tuple(float(v) for v in knots["values"])
        knot_counts = (len(knot_values),)
    elif knots is not None:
        knot_counts = tuple(sorted(set(int(k) for k in knots)))
        knot_values = None
    return ContinuousOptions(
        forms=tuple(raw.get("forms", base.forms)),
        spline_knots=knot_counts,
        knot_values=knot_values,
        adjust_knots=int(raw.get("adjust_knots", base.adjust_knots)),
        test_knots=int(raw.get("test_knots", base.test_knots)),
        fp_alpha=float(raw.get("fp_alpha", base.fp_alpha)),
        grid_points=int(raw.get("grid_points", base.grid_points)),
        grid_range=(tuple(float(v) for v in raw["grid_range"])  # type: ignore[arg-type]
                    if "grid_range" in raw else base.grid_range),
        reference_value=(float(raw["reference_value"]) if "reference_value" in raw
                         else base.reference_value),
        common_knots=int(raw.get("common_knots", base.common_knots)),
    )


def _groupings(raw: dict[str, Any]) -> dict[str, Grouping]:
    groupings = {}
    for var, g in raw.items():
        labels = _labels_for(g)
        groupings[var] = Grouping(
            variable=var,
            cuts=tuple(float(c) for c in g["cuts"]) if "cuts" in g else None,
            quantiles=int(g["quantiles"]) if "quantiles" in g else None,
            closed=g.get("closed", "left"),
            labels=tuple(labels) if labels else None,
            reference=g.get("reference", labels[0] if labels else None),
            derived_from_data=bool(g.get("derived_from_data", False)),
        )
    return groupings


def _outcome(o: dict[str, Any]) -> OutcomeSpec:
    """The outcome; a survival time given as dates or on the attained-age scale gets its
    ``followup`` and the analysis sample's names of the built columns."""
    time, entry, followup = o.get("time"), o.get("entry"), None
    scale = o.get("time_scale", "on_study")
    if o["type"] == "survival" and (isinstance(time, dict) or scale == "attained_age"):
        dates = time if isinstance(time, dict) else {}
        followup = FollowUp(scale=scale, start=dates.get("start"), end=dates.get("end"),
                            entry_date=dates.get("entry"), unit=dates.get("unit", "years"),
                            study_end=dates.get("study_end"),
                            duration=None if dates else time, entry=entry, age=o.get("age"))
        if scale == "attained_age":
            time, entry = ATTAINED_AGE, AGE_AT_ENTRY
        else:
            time = TIME_ON_STUDY
            entry = TIME_AT_ENTRY if followup.entry_date else entry
    return OutcomeSpec(type=o["type"], event=o.get("event"), value=o.get("value"),
                       count=o.get("count"), persontime=o.get("persontime"), time=time,
                       entry=entry, horizon=float(o["horizon"]) if "horizon" in o else None,
                       followup=followup, count_model=o.get("count_model", "poisson"),
                       follow_up_windows=tuple(float(c) for c in o.get("follow_up_windows", [])),
                       **_competing_fields(o))


def _competing_fields(o: dict[str, Any]) -> dict[str, Any]:
    """A survival outcome's competing-risks keys (``event_of_interest``, ``competing``,
    ``subdistribution_variance``)."""
    variance = ({"subdistribution_variance": o["subdistribution_variance"]}
                if "subdistribution_variance" in o else {})
    if "competing" not in o and "event_of_interest" not in o:
        return variance
    return {"event_of_interest": int(o.get("event_of_interest", 1)),
            "competing": tuple(int(c) for c in o.get("competing", [])), **variance}


def _derived_variables(analyses: list[Analysis]) -> dict[str, VariableInfo]:
    """Labels and units of the follow-up columns the analysis samples build (they say which
    time scale a horizon and an absolute risk are on)."""
    out: dict[str, VariableInfo] = {}
    for a in analyses:
        f = a.outcome.followup
        if f is None:
            continue
        if f.scale == "attained_age":
            out[ATTAINED_AGE] = VariableInfo("Attained age", "years")
            out[AGE_AT_ENTRY] = VariableInfo("Age at entry", "years")
        else:
            out[TIME_ON_STUDY] = VariableInfo("Time on study", f.unit)
            out[TIME_AT_ENTRY] = VariableInfo("Time on study at entry", f.unit)
    return out


def _weighting(raw: Any) -> Weighting | None:
    return None if raw is None else Weighting(str(raw["column"]), str(raw["kind"]))


def _design(raw: Any) -> model.Design:
    """The analysis' ``design`` block (sampling and fitting of binary outcomes)."""
    if not raw:
        return model.Design()
    prevalence = raw.get("prevalence")
    return model.Design(matched_set=raw.get("matched_set"),
                        case_control=bool(raw.get("case_control", False)),
                        prevalence=None if prevalence is None else float(prevalence),
                        firth=bool(raw.get("firth", False)))


def _build(raw: dict[str, Any], base: Path, source: Path | None) -> Spec:
    groupings = _groupings(raw.get("groupings") or {})
    study_cont = _continuous(raw.get("continuous", {}), ContinuousOptions())
    analyses: list[Analysis] = []
    for a in raw["analyses"]:
        o = a["outcome"]
        rep = a.get("reported")
        analyses.append(model.Analysis(
            name=a["name"],
            outcome=_outcome(o),
            exposure=a["exposure"],
            adjust=tuple(a.get("adjust", [])),
            strata=tuple(a.get("strata", [])),
            by=a.get("by"),
            filters=tuple(model.Filter(f["variable"], f.get("min"), f.get("max"),
                                       tuple(f["in"]) if "in" in f else None)
                          for f in a.get("filters", [])),
            reported=model.Reported(rep["contrast"], float(rep["estimate"]), rep.get("lower"),
                                    rep.get("upper")) if rep else None,
            continuous=_continuous(a.get("continuous", {}), study_cont),
            risk_thresholds=(tuple(float(t) for t in a["risk_thresholds"])
                             if "risk_thresholds" in a else None),
            # the analysis' own weights/cluster (null switches the study's off), else the study's
            weights=_weighting(a["weights"] if "weights" in a else raw.get("weights")),
            cluster=a["cluster"] if "cluster" in a else raw.get("cluster"),
            design=_design(a.get("design")),
        ))
    cohorts = tuple(model.Cohort(c["name"], (base / c["path"]).resolve(), c["path"],
                           _groupings(c.get("groupings") or {}),
                           CsvDialect(**c["csv"]) if c.get("csv") else None)
                    for c in raw["cohorts"])
    variables = {**_derived_variables(analyses),
                 **{k: model.VariableInfo(v.get("label"), v.get("unit"), v.get("type"))
                    for k, v in (raw.get("variables") or {}).items()}}
    return Spec(
        study=raw["study"],
        cohorts=cohorts,
        analyses=tuple(analyses),
        groupings=groupings,
        variables=variables,
        continuous=study_cont,
        risk_thresholds=tuple(float(t) for t in raw.get("risk_thresholds", [])),
        min_cell=int((raw.get("disclosure") or {}).get("min_cell", 10)),
        seed=int(raw.get("seed", DEFAULT_SEED)),
        raw=raw,
        source=source,
        resampling=model.Resampling(**(raw.get("resampling") or {})),
        cutpoint_search=model.CutpointSearch(**{k: float(v) for k, v in
                                          (raw.get("cutpoint_search") or {}).items()}),
        horizon=float(raw["horizon"]) if "horizon" in raw else None,
        report=bool(raw.get("report", True)),
    )
