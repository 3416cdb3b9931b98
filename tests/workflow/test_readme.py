"""The README is the reference: every column a table builder states (its module's COLUMNS), every
column the demo writes and every key the spec schema accepts is documented there. A column or key
added without a line in the README fails here."""

from __future__ import annotations

import json
import re
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pandas as pd
import pytest

from unbin.questions import KEY_COLUMNS, QUESTION_TABLES, RESAMPLING_TABLES, table_columns

ROOT = Path(__file__).resolve().parents[2]
README = (ROOT / "README.md").read_text(encoding="utf-8")
SCHEMA = ROOT / "src" / "unbin" / "workflow" / "schemas" / "spec.schema.json"


def documented_names(text: str) -> list[re.Pattern[str]]:
    """Patterns for every name the README writes in backticks: `lr_<form>` and `boot_cut_p*`
    stand for families of names, `added_lr/df/p` for added_lr, added_df and added_p."""
    patterns: list[re.Pattern[str]] = []
    for token in re.findall(r"`([^`\n]+)`", text):
        for part in re.split(r"[\s,=()]+", token):
            if not part:
                continue
            pieces = part.split("/")
            stem = pieces[0].rsplit("_", 1)[0] + "_" if "_" in pieces[0] else ""
            names = [pieces[0]] + [stem + p for p in pieces[1:]]
            for name in names:
                rx = re.escape(name).replace(re.escape("*"), ".*")
                rx = re.sub(r"<[^>]+>", "[a-z0-9_]+", rx.replace("\\<", "<").replace("\\>", ">"))
                patterns.append(re.compile(rx))
    return patterns


PATTERNS = documented_names(README)


def documented(name: str) -> bool:
    return any(p.fullmatch(name) for p in PATTERNS)


def schema_keys(node: Any, root: dict[str, Any], path: str = "") -> Iterator[tuple[str, str]]:
    if isinstance(node, dict):
        if "$ref" in node:
            yield from schema_keys(root["$defs"][node["$ref"].split("/")[-1]], root, path)
        for key, sub in (node.get("properties") or {}).items():
            yield f"{path}.{key}" if path else key, key
            yield from schema_keys(sub, root, f"{path}.{key}" if path else key)
        for branch in ("oneOf", "anyOf", "allOf"):
            for sub in node.get(branch, []):
                yield from schema_keys(sub, root, path)
        if isinstance(node.get("items"), dict):
            yield from schema_keys(node["items"], root, path + "[]")
        if isinstance(node.get("additionalProperties"), dict):
            yield from schema_keys(node["additionalProperties"], root, path + ".*")


def test_the_pattern_reading_is_itself_right() -> None:
    pats = documented_names("`lr_<form>`, `added_lr/df/p`, `boot_cut_p*` and `n`")
    ok = ("lr_spline", "added_df", "added_p", "boot_cut_p50", "n")
    assert all(any(p.fullmatch(s) for p in pats) for s in ok)
    assert not any(p.fullmatch("events") for p in pats)


def test_every_spec_key_is_in_the_readme() -> None:
    schema = json.loads(SCHEMA.read_text(encoding="utf-8"))
    yaml_keys = set(re.findall(r"^\s*(?:- )?\{?([a-z_]+):", README, flags=re.M))
    yaml_keys |= set(re.findall(r"[{,]\s*([a-z_]+):", README))
    missing = sorted({path for path, key in schema_keys(schema, schema)
                      if key not in yaml_keys and not documented(key)})
    assert not missing, f"spec keys missing from the README: {missing}"


@pytest.mark.workflow
def test_every_column_the_demo_writes_is_in_the_readme(demo_out: Path) -> None:
    missing: dict[str, list[str]] = {}
    folders = [demo_out / "tables", *sorted((demo_out / "bundles").glob("*"))]
    for folder in folders:
        for path in sorted(folder.glob("*.parquet")):
            cols = [c for c in pd.read_parquet(path).columns if not documented(c)]
            if cols:
                missing[f"{folder.name}/{path.stem}"] = cols
    assert not missing, f"columns missing from the README: {missing}"


def readme_rows(text: str) -> dict[str, str]:
    """The README's output-reference rows by table name: lines that read "| `table` | ...|"."""
    return {m.group(1): m.group(0) for m in re.finditer(r"^\| `([a-z_]+)` \|.*$", text, re.M)}


ROWS = readme_rows(README)


def test_the_row_reading_is_itself_right() -> None:
    rows = readme_rows("| `fits` | fitted model | `form`, `n` |\n| `cuts` | a | `cut` |\n")
    assert set(rows) == {"fits", "cuts"} and "`form`" in rows["fits"]


@pytest.mark.parametrize("table", sorted({**QUESTION_TABLES, **RESAMPLING_TABLES}))
def test_every_column_a_builder_states_is_in_its_readme_row(table: str) -> None:
    """Each builder's COLUMNS (no workflow run needed) against the README row of its own table;
    the key columns are stated once, in the sentence on how every per-cohort table starts."""
    assert table in ROWS, f"README has no row for the table {table!r}"
    patterns = documented_names(ROWS[table])
    missing = [c for c in table_columns(table) if not any(p.fullmatch(c) for p in patterns)]
    assert not missing, f"columns of {table!r} missing from its README row: {missing}"
    starts = re.search(r"Every per-cohort table starts with (.+?)\(", README, re.S)
    assert starts and all(f"`{k}`" in starts.group(1) for k in KEY_COLUMNS)
