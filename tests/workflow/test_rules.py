"""The workflow's anchors: Snakemake's linter on the packaged Snakefile with the tiny `.test/`
config (Snakemake's catalog convention), a dry run of that config planning every rule, and the
conventions of DEVELOPERS.md ("The workflow") read from the rule files: every rule that runs a
script has a `log:` and a `benchmark:`, and no rule passes the spec's path through `params:`."""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
WORKFLOW = ROOT / "src" / "unbin" / "workflow"
SNAKEFILE = WORKFLOW / "Snakefile"
TEST_CONFIG = ROOT / ".test"

# The one lint left standing, on purpose: every rule runs unbin's own code in the interpreter
# that runs Snakemake (`unbin run` starts `python -m snakemake` with its own interpreter, whose
# packages the wheel pins), so there is no separate per-rule environment to name; a conda file
# or container image would have to install an unbin that no channel or registry serves.
SOFTWARE_LINT = "Specify a conda environment or container for each rule."


def _rule_blocks() -> dict[str, str]:
    """Each rule's body as written (snakefmt layout: four-space keywords)."""
    text = "\n".join(p.read_text(encoding="utf-8") for p in [SNAKEFILE, *sorted(
        (WORKFLOW / "rules").glob("*.smk"))])
    return dict(re.findall(r"^rule (\w+):\n((?:    .*\n|\n)*)", text, flags=re.M))


def _keyword_body(block: str, keyword: str) -> str:
    m = re.search(rf"^    {keyword}:\n((?:        .*\n)*)", block, flags=re.M)
    return m.group(1) if m else ""


def _snakemake(workdir: Path, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "snakemake", "--snakefile", str(SNAKEFILE),
                           "--directory", str(workdir), "--configfile",
                           str(workdir / "config" / "config.yaml"), *args],
                          capture_output=True, text=True, timeout=600, cwd=workdir)


@pytest.fixture
def test_config(tmp_path: Path) -> Path:
    """A copy of `.test/` (Snakemake writes its `.snakemake/` folder into the working
    directory; the repository stays clean)."""
    return Path(shutil.copytree(TEST_CONFIG, tmp_path / "check"))


def test_every_script_rule_has_a_log_and_a_benchmark() -> None:
    blocks = _rule_blocks()
    script_rules = {name for name, body in blocks.items() if "    script:\n" in body}
    assert script_rules == {"fit_analysis", "resample_analysis", "collect_tables",
                            "summarise_sample", "common_basis", "bundle_cohort", "pool_bundles",
                            "draw_figures", "draw_study_figures", "build_report"}
    for name in script_rules:
        assert _keyword_body(blocks[name], "log").strip(), f"rule {name} has no log:"
        bench = _keyword_body(blocks[name], "benchmark")
        assert f'"benchmarks/{name}/' in bench, f"rule {name}: benchmark {bench!r}"


def test_no_rule_passes_the_spec_path_through_params() -> None:
    """Rule scripts read the spec's path from the config (workflow_support.spec_path): a path
    in params would rerun every job when a folder moves (DEVELOPERS.md, "The workflow")."""
    for name, block in _rule_blocks().items():
        params = _keyword_body(block, "params")
        assert not re.search(r"UNBIN_SPEC_PATH|config\[|^\s*spec\s*=", params, flags=re.M), (
            f"rule {name} params: {params}")
        names = re.findall(r"^\s*(\w+)=", params, flags=re.M)
        assert set(names) <= {"digests"}, f"rule {name} params: {names}"


@pytest.mark.workflow
def test_snakemake_lint_passes_on_the_test_config(test_config: Path) -> None:
    proc = _snakemake(test_config, "--lint")
    text = proc.stdout + proc.stderr
    linted = re.findall(r"^Lints for (rule (\w+) \(.*\)|snakefile .*):$", text, flags=re.M)
    titles = set(re.findall(r"^    \* (.+):$", text, flags=re.M))
    # Anything Snakemake reports beyond the one expected lint fails here, with its text.
    assert titles <= {SOFTWARE_LINT}, text
    assert not [w for w, _ in linted if w.startswith("snakefile")], text
    if not linted:
        assert proc.returncode == 0, text
    # The linter really read the workflow: it names the script rules (or, once each rule names
    # an environment, reports nothing and exits 0).
    assert {r for _, r in linted if r} in (set(), {
        "fit_analysis", "resample_analysis", "collect_tables", "summarise_sample",
        "common_basis", "bundle_cohort", "pool_bundles", "draw_figures", "draw_study_figures",
        "build_report"}), text


@pytest.mark.workflow
def test_dry_run_of_the_test_config_plans_every_rule(test_config: Path) -> None:
    """Two cohorts x one analysis: per (cohort, analysis) a fit, a resampling job and a summary;
    one common basis; per cohort a bundle and its figures; once the tables, the pool, the
    study's figures, the report and the target."""
    proc = _snakemake(test_config, "-n", "--cores", "1")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    stats = dict(re.findall(r"^(\w+)\s+(\d+)$", proc.stdout + proc.stderr, flags=re.M))
    assert {k: int(v) for k, v in stats.items()} == {
        "fit_analysis": 2, "resample_analysis": 2, "summarise_sample": 2, "common_basis": 1,
        "bundle_cohort": 2, "draw_figures": 2, "collect_tables": 1, "pool_bundles": 1,
        "draw_study_figures": 1, "build_report": 1, "all": 1, "total": 16}
