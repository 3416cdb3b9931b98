"""Labels of the competing-risk tables: every column of the Fine–Gray table, the confounding
table (whose marginal rows hold the standardised cumulative incidence), the two decision tables,
calibration and the decision bootstrap has a human label of its own (not one built from its
name), the columns with a unit say it, and README's output reference names each column. The
expected labels are written out by hand."""

from __future__ import annotations

import fnmatch
import re
from pathlib import Path

import pandas as pd
import pytest

from unbin.present import labels
from unbin.present.report.html import plain_table
from unbin.questions import (
    calibration,
    confounding,
    decision_resampling,
    net_benefit,
    subdistribution,
    thresholds,
)

TABLES = {"subdistribution": subdistribution.COLUMNS, "confounding": confounding.COLUMNS,
          "net_benefit": net_benefit.COLUMNS, "thresholds": thresholds.COLUMNS,
          "calibration": calibration.COLUMNS,
          "decision_resampling": decision_resampling.COLUMNS}
README = Path(__file__).resolve().parents[2] / "README.md"


@pytest.mark.parametrize("table", sorted(TABLES))
def test_every_column_of_the_competing_risk_tables_has_its_own_label(table: str) -> None:
    missing = [c for c in TABLES[table] if c not in labels.COLUMNS]
    assert not missing, f"{table}: no label for {missing}"
    raw = [c for c in TABLES[table] if "_" in labels.column(c)]
    assert not raw, f"{table}: labels with an underscore {raw}"


def test_the_fine_gray_columns_read_as_words() -> None:
    # the two columns that reached the report as their raw names
    assert labels.column("variance") == "SE from"
    assert labels.column("bootstrap_ok") == "bootstrap replicates refitted"
    assert labels.column("bootstrap_failed") == "bootstrap replicates failed"
    view = plain_table(pd.DataFrame({"estimate": [0.4], "variance": ["bootstrap"],
                                     "bootstrap_ok": [200]}), "Subdistribution")
    assert [c.header for c in view.columns] == ["estimate", "SE from",
                                                "bootstrap replicates refitted"]
    assert view.rows == [["0.4", "bootstrap", "200"]]


def test_columns_with_a_unit_name_it() -> None:
    assert labels.column("horizon") == "horizon (follow-up time units)"
    assert labels.column("true_positive") == "true positives per patient"
    assert labels.column("false_positive") == "false positives per patient"
    assert labels.column("estimate_continuous") == "continuous adjustment"
    assert labels.column("se_grouped") == "grouped adjustment, SE"
    assert labels.column("confounding") == "confounding (crude − continuous)"


def _listed(table: str) -> set[str]:
    """The column names README's output-reference row of ``table`` puts in backticks, with
    ``x_lower/upper`` read as ``x_lower`` and ``x_upper``."""
    row = next(line for line in README.read_text(encoding="utf-8").splitlines()
               if line.startswith(f"| `{table}` |"))
    out: set[str] = set()
    for tok in re.findall(r"`([^`]+)`", row.split("|", 3)[3]):
        out.add(tok)
        m = re.fullmatch(r"(\w+)_(\w+)/(\w+)", tok)
        if m:
            out |= {f"{m.group(1)}_{m.group(2)}", f"{m.group(1)}_{m.group(3)}"}
    return out


@pytest.mark.parametrize("table", sorted(TABLES))
def test_readme_lists_every_column(table: str) -> None:
    listed = _listed(table)
    absent = [c for c in TABLES[table]
              if c not in listed and not any(fnmatch.fnmatch(c, p) for p in listed if "*" in p)]
    assert not absent, f"README's {table} row does not name {absent}"
