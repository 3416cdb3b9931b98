"""The spec: its data model, loading, validation and error messages.

A spec is YAML, loaded with ``yaml.safe_load`` and validated against the JSON schema shipped in
``unbin/workflow/schemas/spec.schema.json`` (the same file the Snakefile uses). Nothing in a spec
is ever evaluated as code: filters are structured (variable, min, max, in).
"""

from __future__ import annotations

import difflib
import hashlib
import json
import math
import re
from dataclasses import dataclass, field
from functools import cache
from importlib import resources
from pathlib import Path
from typing import Any

import yaml

from ..errors import SpecError

FORMS = ("linear", "spline", "fp")
DEFAULT_KNOTS = (3, 4, 5)
DEFAULT_SEED = 20240101

OUTCOME_FIELDS = {
    "binary": ("event",),
    "continuous": ("value",),
    "count": ("count", "persontime"),
    "survival": ("time", "event"),
}
OPTIONAL_OUTCOME_FIELDS = {
    "binary": (),
    "continuous": (),
    "count": (),
    "survival": ("entry", "horizon"),
}


@cache
def spec_schema() -> dict[str, Any]:
    """The JSON schema of the spec, as shipped inside the package."""
    text = resources.files("unbin").joinpath("workflow/schemas/spec.schema.json").read_text()
    return dict(json.loads(text))


@dataclass(frozen=True)
class Grouping:
    """How the legacy paper grouped one variable.

    Cut semantics: with ``closed="left"`` (default) the groups are ``x < c1``, ``c1 <= x < c2``,
    ..., ``x >= ck`` — a value equal to a cut belongs to the group above it. With
    ``closed="right"`` they are ``x <= c1``, ``c1 < x <= c2``, ..., ``x > ck`` — a value equal to a
    cut belongs to the group below it. ``quantiles=k`` asks for k equal-frequency groups whose cuts
    are the sample's j/k quantiles (linear interpolation, numpy's default) in the analysis sample.
    """

    variable: str
    cuts: tuple[float, ...] | None = None
    quantiles: int | None = None
    closed: str = "left"
    labels: tuple[str, ...] | None = None
    reference: str | None = None
    derived_from_data: bool = False

    @property
    def n_groups(self) -> int:
        if self.cuts is not None:
            return len(self.cuts) + 1
        assert self.quantiles is not None
        return self.quantiles


@dataclass(frozen=True)
class OutcomeSpec:
    type: str
    event: str | None = None
    value: str | None = None
    count: str | None = None
    persontime: str | None = None
    time: str | None = None
    entry: str | None = None
    horizon: float | None = None

    @property
    def columns(self) -> tuple[str, ...]:
        cols = [self.event, self.value, self.count, self.persontime, self.time, self.entry]
        return tuple(c for c in cols if c)


@dataclass(frozen=True)
class Filter:
    variable: str
    min: float | None = None
    max: float | None = None
    values: tuple[Any, ...] | None = None

    def describe(self) -> str:
        parts = []
        if self.min is not None:
            parts.append(f"{self.variable} >= {self.min:g}")
        if self.max is not None:
            parts.append(f"{self.variable} <= {self.max:g}")
        if self.values is not None:
            parts.append(f"{self.variable} in {list(self.values)}")
        return " and ".join(parts) or f"{self.variable} (no condition)"


@dataclass(frozen=True)
class Reported:
    contrast: str
    estimate: float
    lower: float | None = None
    upper: float | None = None

    def groups(self) -> tuple[str, str]:
        a, b = re.split(r"\s+vs\.?\s+", self.contrast.strip(), maxsplit=1)
        return a.strip(), b.strip()


@dataclass(frozen=True)
class ContinuousOptions:
    forms: tuple[str, ...] = FORMS
    spline_knots: tuple[int, ...] = DEFAULT_KNOTS
    knot_values: tuple[float, ...] | None = None
    adjust_knots: int = 4
    # Knots of the spline behind the tests (nonlinearity, added beyond the groups, information
    # kept): a fixed count at the default quantiles of the exposure, chosen before the outcome
    # is seen, unlike the drawn spline whose knot count AIC picks.
    test_knots: int = 4
    fp_alpha: float = 0.05
    grid_points: int = 100
    grid_range: tuple[float, float] | None = None
    reference_value: float | None = None
    common_knots: int = 4

    @property
    def basis_fixed(self) -> bool:
        """Knots, reference value and grid all fixed by the spec: no cohort summaries needed."""
        return (self.knot_values is not None and self.reference_value is not None
                and self.grid_range is not None)


@dataclass(frozen=True)
class Analysis:
    name: str
    outcome: OutcomeSpec
    exposure: str
    adjust: tuple[str, ...] = ()
    strata: tuple[str, ...] = ()
    by: str | None = None
    filters: tuple[Filter, ...] = ()
    reported: Reported | None = None
    continuous: ContinuousOptions = field(default_factory=ContinuousOptions)
    # Decision thresholds on this analysis' risk scale (probability; rate per person-time unit
    # for count outcomes; the mean for continuous ones); None: the study's risk_thresholds.
    risk_thresholds: tuple[float, ...] | None = None

    @property
    def family(self) -> str:
        return self.outcome.type

    @property
    def columns(self) -> tuple[str, ...]:
        """Every column this analysis reads, in a stable order without repeats."""
        cols: list[str] = [*self.outcome.columns, self.exposure, *self.adjust, *self.strata]
        if self.by:
            cols.append(self.by)
        cols += [f.variable for f in self.filters]
        return tuple(dict.fromkeys(cols))


@dataclass(frozen=True)
class Cohort:
    name: str
    path: Path
    path_as_written: str
    groupings: dict[str, Grouping] = field(default_factory=dict)


@dataclass(frozen=True)
class VariableInfo:
    label: str | None = None
    unit: str | None = None
    type: str | None = None


@dataclass(frozen=True)
class Resampling:
    """Sizes of the resampling runs: bootstrap replicates (confounding share, re-derived cut
    point) and permutations (maximally selected statistic). 0 switches a run off."""

    bootstrap: int = 200
    permutations: int = 1000


@dataclass(frozen=True)
class CutpointSearch:
    """Range of the search for a data-derived cut: the share of the sample below a candidate
    cut must lie in [lower, upper]."""

    lower: float = 0.1
    upper: float = 0.9


@dataclass(frozen=True)
class Spec:
    study: str
    cohorts: tuple[Cohort, ...]
    analyses: tuple[Analysis, ...]
    groupings: dict[str, Grouping]
    variables: dict[str, VariableInfo]
    continuous: ContinuousOptions
    risk_thresholds: tuple[float, ...]
    min_cell: int
    seed: int
    raw: dict[str, Any] = field(repr=False)
    source: Path | None = None
    resampling: Resampling = field(default_factory=Resampling)
    cutpoint_search: CutpointSearch = field(default_factory=CutpointSearch)
    horizon: float | None = None  # default risk horizon of survival outcomes without their own
    report: bool = True  # figures and report.html at the end of a run

    def for_cohort(self, name: str) -> Spec:
        """The spec as one cohort sees it: its own legacy groupings override the study's."""
        c = self.cohort(name)
        if not c.groupings:
            return self
        from dataclasses import replace

        return replace(self, groupings={**self.groupings, **c.groupings})

    def analysis(self, name: str) -> Analysis:
        for a in self.analyses:
            if a.name == name:
                return a
        raise SpecError(f"analyses: no analysis named {name!r}; the spec has "
                        f"{[a.name for a in self.analyses]}.")

    def cohort(self, name: str) -> Cohort:
        for c in self.cohorts:
            if c.name == name:
                return c
        raise SpecError(f"cohorts: no cohort named {name!r}; the spec has "
                        f"{[c.name for c in self.cohorts]}.")

    def columns_for_cohort(self) -> tuple[str, ...]:
        cols: list[str] = []
        for a in self.analyses:
            cols += a.columns
        return tuple(dict.fromkeys(cols))

    def label(self, variable: str) -> str:
        info = self.variables.get(variable)
        text = info.label if info and info.label else variable
        if info and info.unit:
            text += f" ({info.unit})"
        return text

    def rng(self, analysis: str, purpose: str) -> Any:
        """A numpy Generator for one resampling run of one analysis: seeded from the spec's seed
        and a digest of (analysis, purpose) through numpy's SeedSequence, so that every run gives
        the same draws and the runs of different analyses and questions are independent."""
        import numpy as np

        key = hashlib.sha256(f"{analysis}\x00{purpose}".encode()).digest()
        words = [int.from_bytes(key[i:i + 4], "little") for i in range(0, 16, 4)]
        return np.random.default_rng(np.random.SeedSequence([self.seed, *words]))

    def slice_for(self, analysis: str, cohort: str | None = None) -> dict[str, Any]:
        """The spec entries one analysis (on one cohort, if given) depends on; its digest decides
        whether the analysis' jobs rerun."""
        a = self.analysis(analysis)
        raw_a = next(x for x in self.raw["analyses"] if x["name"] == analysis)
        groupings = self.raw.get("groupings", {})
        variables = self.raw.get("variables", {})
        used = set(a.columns)
        cohort_groupings = {c["name"]: {k: v for k, v in sorted((c.get("groupings") or {}).items())
                                        if k in used}
                            for c in self.raw["cohorts"]
                            if c.get("groupings") and cohort in (None, c["name"])}
        return {
            "study": self.study,
            "analysis": raw_a,
            **({"cohort_groupings": cohort_groupings} if any(cohort_groupings.values()) else {}),
            "groupings": {k: groupings[k] for k in sorted(groupings) if k in used},
            "variables": {k: variables[k] for k in sorted(variables) if k in used},
            "continuous": self.raw.get("continuous", {}),
            "risk_thresholds": self.raw.get("risk_thresholds", []),
            "disclosure": self.raw.get("disclosure", {}),
            "seed": self.seed,
            **{k: self.raw[k] for k in ("resampling", "cutpoint_search", "horizon")
               if k in self.raw},
        }


def canonical_json(obj: Any) -> str:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=True, default=str)


def digest(obj: Any) -> str:
    """SHA-256 of the canonical JSON of ``obj`` (sorted keys, no whitespace)."""
    return hashlib.sha256(canonical_json(obj).encode()).hexdigest()


# --------------------------------------------------------------------------- loading


def read_yaml(path: str | Path) -> dict[str, Any]:
    p = Path(path)
    if not p.is_file():
        raise SpecError(f"spec: file {str(p)!r} does not exist; pass the path of a YAML spec.")
    try:
        data = yaml.safe_load(p.read_text(encoding="utf-8"))
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
    return data


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


def load_spec(path: str | Path) -> Spec:
    """Read, validate and resolve a spec file. Raises SpecError listing every problem found."""
    p = Path(path).resolve()
    raw = read_yaml(p)
    return parse_spec(raw, base=p.parent, source=p)


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


def parse_spec(raw: dict[str, Any], base: Path, source: Path | None = None) -> Spec:
    shape = _shape_problem(raw)
    if shape:
        raise SpecError(shape)
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


def _where(path: Any) -> str:
    out = ""
    for part in path:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out or "(top level)"


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
            extras = (sorted(set(err.instance) - set(allowed), key=str)
                      if isinstance(err.instance, dict) else [])
            for key in extras:
                close = difflib.get_close_matches(str(key), allowed, n=1, cutoff=0.6)
                hint = f" Did you mean {close[0]!r}?" if close else ""
                problems.append(f"{where}: unknown key {key!r}.{hint} Allowed keys: "
                                f"{', '.join(allowed)}.")
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
        elif err.validator == "oneOf" and where.endswith("spline_knots"):
            problems.append(f"{where}: {err.instance!r} is neither a list of knot counts (3–7) nor "
                            "{values: [at least 3 knot positions]}.")
        else:
            problems.append(f"{where}: {err.message}.")
    return problems


def _labels_for(g: dict[str, Any]) -> list[str] | None:
    if "labels" in g:
        return list(g["labels"])
    if "cuts" in g:
        return default_labels(tuple(float(c) for c in g["cuts"]), g.get("closed", "left"))
    if "quantiles" in g:
        return [f"Q{j + 1}" for j in range(int(g["quantiles"]))]
    return None


def default_labels(cuts: tuple[float, ...], closed: str) -> list[str]:
    """Group labels written from the cuts: '<30', '30-<45', '>=60' (closed left)."""
    f = [f"{c:g}" for c in cuts]
    if closed == "left":
        labels = [f"<{f[0]}"] + [f"{f[i]}-<{f[i + 1]}" for i in range(len(f) - 1)] + [f">={f[-1]}"]
    else:
        labels = [f"<={f[0]}"] + [f">{f[i]}-{f[i + 1]}" for i in range(len(f) - 1)] + [f">{f[-1]}"]
    return labels


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


def _build(raw: dict[str, Any], base: Path, source: Path | None) -> Spec:
    groupings = _groupings(raw.get("groupings") or {})
    study_cont = _continuous(raw.get("continuous", {}), ContinuousOptions())
    analyses = []
    for a in raw["analyses"]:
        o = a["outcome"]
        rep = a.get("reported")
        analyses.append(Analysis(
            name=a["name"],
            outcome=OutcomeSpec(type=o["type"], event=o.get("event"), value=o.get("value"),
                                count=o.get("count"), persontime=o.get("persontime"),
                                time=o.get("time"), entry=o.get("entry"),
                                horizon=float(o["horizon"]) if "horizon" in o else None),
            exposure=a["exposure"],
            adjust=tuple(a.get("adjust", [])),
            strata=tuple(a.get("strata", [])),
            by=a.get("by"),
            filters=tuple(Filter(f["variable"], f.get("min"), f.get("max"),
                                 tuple(f["in"]) if "in" in f else None)
                          for f in a.get("filters", [])),
            reported=Reported(rep["contrast"], float(rep["estimate"]), rep.get("lower"),
                              rep.get("upper")) if rep else None,
            continuous=_continuous(a.get("continuous", {}), study_cont),
            risk_thresholds=(tuple(float(t) for t in a["risk_thresholds"])
                             if "risk_thresholds" in a else None),
        ))
    cohorts = tuple(Cohort(c["name"], (base / c["path"]).resolve(), c["path"],
                           _groupings(c.get("groupings") or {}))
                    for c in raw["cohorts"])
    variables = {k: VariableInfo(v.get("label"), v.get("unit"), v.get("type"))
                 for k, v in (raw.get("variables") or {}).items()}
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
        resampling=Resampling(**(raw.get("resampling") or {})),
        cutpoint_search=CutpointSearch(**{k: float(v) for k, v in
                                          (raw.get("cutpoint_search") or {}).items()}),
        horizon=float(raw["horizon"]) if "horizon" in raw else None,
        report=bool(raw.get("report", True)),
    )
