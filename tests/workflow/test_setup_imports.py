"""What the workflow's set-up (rules/common.smk, run by Snakemake before any job starts, and
again inside every cluster job) imports: the names of tables and the spec, never the
statistics libraries (scipy.stats, scipy.optimize, statsmodels, matplotlib took about a second
of CPU there). A structural check, not a timing."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import unbin

HEAVY = ("scipy.stats", "scipy.optimize", "statsmodels", "matplotlib", "lifelines")


def test_workflow_setup_imports_no_statistics_library() -> None:
    common = Path(unbin.__file__).parent / "workflow" / "rules" / "common.smk"
    text = common.read_text(encoding="utf-8")
    # The import statements of unbin (one may span lines in parentheses).
    imports = re.findall(r"^from unbin[\w.]* import (?:\([^)]*\)|[^\n]*)", text, flags=re.M)
    assert len(imports) >= 4, imports
    code = "\n".join(imports) + (
        "\nimport sys\nprint(' '.join(m for m in " + repr(HEAVY) + " if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.strip() == "", f"the workflow set-up imports {out.stdout.strip()}"
