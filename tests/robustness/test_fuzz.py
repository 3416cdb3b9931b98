"""Fuzzing the spec loader: mutated specs and malformed YAML give unbin's own validation error
(``SpecError``, one message per problem) or a usable spec, never a traceback.

Every test is derandomised (the same examples on every run, no example database) and bounded by
``max_examples`` so that the whole module runs in well under a minute.
"""

from __future__ import annotations

import copy
import math
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from unbin.demo import demo_spec
from unbin.errors import SpecError
from unbin.spec import Spec, digest, load_spec, parse_spec

FUZZ = settings(derandomize=True, database=None, deadline=None, max_examples=300,
                suppress_health_check=[HealthCheck.too_slow])

# Names the spec uses, so that mutations often hit something the semantic checks look at.
KNOWN = ("study", "cohorts", "name", "path", "groupings", "variables", "analyses", "outcome",
         "type", "event", "value", "count", "persontime", "time", "entry", "horizon", "exposure",
         "adjust", "strata", "by", "filters", "variable", "min", "max", "in", "reported",
         "contrast", "estimate", "lower", "upper", "continuous", "forms", "spline_knots",
         "values", "adjust_knots", "test_knots", "fp_alpha", "grid_points", "grid_range", "reference_value",
         "common_knots", "risk_thresholds", "disclosure", "min_cell", "seed", "resampling",
         "bootstrap", "permutations", "cutpoint_search", "cuts", "quantiles", "closed", "labels",
         "reference", "derived_from_data", "binary", "survival", "count", "left", "right",
         "linear", "spline", "fp", "age", "egfr", "sodium", "low vs normal", "<60 vs >=60",
         "<60", ">=60", "normal", "../escape", "a/b", "")

scalars = (st.none() | st.booleans() | st.integers(-(10**6), 10**6)
           | st.integers(min_value=-(2**70), max_value=2**70)
           | st.floats(allow_nan=True, allow_infinity=True) | st.text(max_size=12)
           | st.sampled_from(KNOWN))
keys = st.sampled_from(KNOWN) | st.text(max_size=8) | st.integers(-3, 3) | st.none() | st.booleans()
values = st.recursive(
    scalars,
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(keys, inner, max_size=4),
    max_leaves=8)


def full_spec() -> dict[str, Any]:
    """The demo spec plus every optional key the schema knows, so mutations reach them all."""
    raw = demo_spec()
    raw["analyses"][0]["continuous"] = {"spline_knots": {"values": [132, 138, 142, 147]},
                                        "grid_range": [130, 150], "reference_value": 140,
                                        "forms": ["spline"], "grid_points": 20}
    raw["analyses"][1]["risk_thresholds"] = [0.05, 0.1]
    raw["analyses"][2]["filters"] = [{"variable": "diabetes", "in": [0, 1]},
                                     {"variable": "age", "min": 18, "max": 90}]
    raw["groupings"]["bmi"]["closed"] = "right"
    raw["groupings"]["sodium"]["derived_from_data"] = False
    raw["groupings"]["quintile"] = {"quantiles": 5}
    raw["continuous"].update(adjust_knots=4, test_knots=4, fp_alpha=0.05, grid_points=50,
                             common_knots=4)
    raw.update(horizon=5, resampling={"bootstrap": 10, "permutations": 19},
               cutpoint_search={"lower": 0.1, "upper": 0.9})
    return raw


def _places(obj: Any, path: tuple[Any, ...] = ()) -> Iterator[tuple[Any, ...]]:
    """Every position in a nested dict/list structure, the root included."""
    yield path
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield from _places(v, (*path, k))
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            yield from _places(v, (*path, i))


def _at(obj: Any, path: tuple[Any, ...]) -> Any:
    for part in path:
        obj = obj[part]
    return obj


def _similar(node: Any) -> st.SearchStrategy[Any]:
    if isinstance(node, bool):
        return st.booleans()
    if isinstance(node, int):
        return st.integers(-5, 25) | st.integers(-(10**12), 10**12)
    if isinstance(node, float):
        return st.floats(-1e6, 1e6) | st.sampled_from([0.0, -0.0, 1e-300, 0.5, 1.0, 1e308])
    if isinstance(node, str):
        return st.sampled_from(KNOWN) | st.text(max_size=6)
    if isinstance(node, list):
        return st.permutations(node) | st.just(node + node) | st.just(node[:1]) | st.just([])
    if isinstance(node, dict):
        return st.just({k: node[k] for k in list(node)[1:]}) | st.just({})
    return st.none()


@st.composite
def mutated_specs(draw: st.DrawFn) -> dict[str, Any]:
    """The full spec after one to four random edits: a value replaced by a random one (of any
    type), a key or list item dropped, an unknown key inserted, an item appended."""
    raw = full_spec()
    for _ in range(draw(st.integers(1, 4))):
        places = list(_places(raw))
        path = draw(st.sampled_from(places))
        op = draw(st.sampled_from(("similar", "similar", "replace", "drop", "insert", "append")))
        if op == "similar" and path:
            # A value of the same type: the spec often stays schema-valid, which exercises the
            # semantic checks and the building of the spec objects.
            _at(raw, path[:-1])[path[-1]] = draw(_similar(_at(raw, path)))
        elif op == "replace" and path:
            _at(raw, path[:-1])[path[-1]] = draw(values)
        elif op == "drop" and path:
            parent = _at(raw, path[:-1])
            del parent[path[-1]]
        else:
            node = _at(raw, path)
            if isinstance(node, dict) and op == "insert":
                node[draw(keys)] = draw(values)
            elif isinstance(node, list):
                repeat = bool(node) and draw(st.booleans())
                node.append(copy.deepcopy(node[0]) if repeat else draw(values))
    return raw


def _use(spec: Spec) -> None:
    """What the workflow does with a spec at parse time: per-cohort views and the digests of
    every analysis' slice (the rerun triggers)."""
    digest(spec.raw)
    for c in spec.cohorts:
        view = spec.for_cohort(c.name)
        for a in view.analyses:
            assert len(digest(view.slice_for(a.name, c.name))) == 64
            assert a.columns and a.exposure in view.groupings


def _load_or_spec_error(raw: Any, base: Path) -> Spec | None:
    try:
        spec = parse_spec(raw, base=base)
    except SpecError as exc:
        assert exc.problems and all(isinstance(p, str) and p for p in exc.problems)
        return None
    _use(spec)
    return spec


def test_the_unmutated_spec_is_usable(tmp_path: Path) -> None:
    spec = _load_or_spec_error(full_spec(), tmp_path)
    assert spec is not None and len(spec.analyses) == 5


@settings(FUZZ, max_examples=1000)
@given(raw=mutated_specs())
def test_mutated_specs_give_spec_errors_only(raw: dict[str, Any]) -> None:
    _load_or_spec_error(raw, Path("/nonexistent/base"))


@FUZZ
@given(raw=values)
def test_any_yaml_value_as_the_whole_spec_gives_spec_errors_only(raw: Any) -> None:
    # parse_spec is typed for a mapping, but the workflow passes it whatever the config holds.
    _load_or_spec_error(raw, Path("/nonexistent/base"))


@pytest.fixture(scope="module")
def yaml_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("yaml")


def _load_file(path: Path, content: bytes) -> None:
    path.write_bytes(content)
    try:
        spec = load_spec(path)
    except SpecError as exc:
        assert exc.problems and all(isinstance(p, str) and p for p in exc.problems)
    else:
        _use(spec)


@FUZZ
@given(content=st.binary(max_size=200))
def test_random_bytes_as_yaml_give_spec_errors_only(yaml_dir: Path, content: bytes) -> None:
    _load_file(yaml_dir / "bytes.yaml", content)


# YAML-ish text: indentation, flow collections, anchors, tags, documents and scalars.
yaml_tokens = st.sampled_from(
    ["\n", "  ", "- ", ": ", "{", "}", "[", "]", ",", "&a ", "*a", "!!python/object:os.system ",
     "!!binary ", "!!float ", "---\n", "...\n", "? ", "|\n", ">\n", "'", '"', "#", "~", "null",
     "1e999", ".nan", "-.inf", "0x1F", "2024-01-01", "yes", "<<: *a", "\t", "\x00", "\ufeff",
     "study", "cohorts", "analyses", "name", "path", "outcome", "type", "binary", "cuts"])


@FUZZ
@given(parts=st.lists(yaml_tokens | st.text(max_size=6), max_size=40))
def test_yaml_like_text_gives_spec_errors_only(yaml_dir: Path, parts: list[str]) -> None:
    _load_file(yaml_dir / "text.yaml", "".join(parts).encode("utf-8", "surrogatepass"))


@FUZZ
@given(raw=mutated_specs(), cut=st.integers(0, 400), junk=st.text(max_size=10))
def test_truncated_or_spliced_spec_files_give_spec_errors_only(
        yaml_dir: Path, raw: dict[str, Any], cut: int, junk: str) -> None:
    """A spec file cut short or with stray text spliced in (an editor or a copy gone wrong)."""
    text = yaml.safe_dump(raw, sort_keys=False, allow_unicode=True)
    pos = min(cut * len(text) // 400, len(text))
    _load_file(yaml_dir / "spliced.yaml",
               (text[:pos] + junk + text[pos:]).encode("utf-8", "surrogatepass"))
    _load_file(yaml_dir / "truncated.yaml", text[:pos].encode("utf-8", "surrogatepass"))


def test_yaml_is_loaded_safely(tmp_path: Path) -> None:
    """A python tag in a spec is a YAML error, never an object constructed (let alone code run):
    the spec is read with yaml.safe_load (PyYAML's documented safe loader)."""
    marker = tmp_path / "ran"
    path = tmp_path / "tagged.yaml"
    path.write_text(f"study: !!python/object/apply:os.system ['touch {marker}']\n"
                    "cohorts: []\nanalyses: []\n", encoding="utf-8")
    with pytest.raises(SpecError) as err:
        load_spec(path)
    assert "is not valid YAML" in err.value.problems[0]
    assert not marker.exists()


ALIAS_BOMB = "a: &a [x, x, x, x, x, x, x, x, x, x]\n" + "".join(
    f"{k}: &{k} [{', '.join([f'*{j}'] * 10)}]\n" for j, k in zip("abcdef", "bcdefg", strict=True))


@pytest.mark.parametrize(("text", "expected"), [
    ("[" * 3000 + "]" * 3000, "nested too deeply"),
    ("study: &s [*s]\ncohorts: []\nanalyses: []\n", "a YAML alias that refers to itself"),
    (ALIAS_BOMB, "more than 100,000 values"),  # 10^7 values from a 300-byte file
])
def test_pathological_yaml_is_refused_quickly(tmp_path: Path, text: str, expected: str) -> None:
    path = tmp_path / "odd.yaml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SpecError) as err:
        load_spec(path)
    (msg,) = err.value.problems
    assert expected in msg


def test_keys_yaml_reads_as_values_are_named(tmp_path: Path) -> None:
    """Unquoted yes/no/on/off, numbers and null are booleans, numbers and None in YAML 1.1
    (PyYAML's safe loader), not names: a spec whose keys they are is refused, naming the key."""
    text = yaml.safe_dump(demo_spec(), sort_keys=False)
    extra = "  on: {label: On treatment}\n  2019: {label: Enrolled in 2019}\n  ~: {}\n"
    assert text.count("\nvariables:\n") == 1
    path = tmp_path / "keys.yaml"
    path.write_text(text.replace("\nvariables:\n", "\nvariables:\n" + extra), encoding="utf-8")
    with pytest.raises(SpecError) as err:
        load_spec(path)
    assert sorted(err.value.problems) == sorted(
        f"variables: the key {k!r} is not text (YAML reads unquoted numbers, dates, null, "
        "yes/no/on/off as values); quote it." for k in (True, 2019, None))


@pytest.mark.parametrize("name", ["../x", "a/b", "/abs", "..", ".hidden", "x\\y", "a b", "_study",
                                  "tables/../../x", "", "ok\n", "ok\n/../x"])
@pytest.mark.parametrize("where", ["cohort", "analysis"])
def test_names_used_in_output_paths_cannot_leave_the_output_folder(
        tmp_path: Path, name: str, where: str) -> None:
    """Cohort and analysis names become folders under the output folder (work/<cohort>/
    <analysis>/, figures/, bundles/, summaries/): only identifiers are accepted, so no name can
    point outside it. Extract paths are only read, so they may point anywhere."""
    raw = demo_spec()
    if where == "cohort":
        raw["cohorts"][0]["name"] = name
        field = "cohorts[0].name"
    else:
        raw["analyses"][0]["name"] = name
        field = "analyses[0].name"
    with pytest.raises(SpecError) as err:
        parse_spec(raw, base=tmp_path)
    msg = next(p for p in err.value.problems if p.startswith(field))
    assert f"{name!r} is not a valid identifier" in msg
    assert "use letters, digits, '_' and '-'" in msg


def test_extract_paths_may_point_anywhere(tmp_path: Path) -> None:
    raw = demo_spec()
    raw["cohorts"][0]["path"] = "../../elsewhere/lindenfeld.parquet"
    spec = parse_spec(raw, base=tmp_path / "a" / "b")
    assert spec.cohorts[0].path == (tmp_path / "elsewhere" / "lindenfeld.parquet").resolve()


def test_non_finite_numbers_are_not_silently_accepted_as_cuts(tmp_path: Path) -> None:
    # YAML reads .nan and .inf as floats; a cut at NaN would put every value in one group.
    raw = demo_spec()
    raw["groupings"]["egfr"]["cuts"] = [math.nan]
    with pytest.raises(SpecError) as err:
        parse_spec(raw, base=tmp_path)
    assert any(p.startswith("groupings.egfr.cuts") for p in err.value.problems)
