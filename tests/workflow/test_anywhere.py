"""Running anywhere, reproducibly: reruns that follow content digests, `unbin compare`, the
workflow as a Snakemake module from an installed wheel, and a real SLURM cluster."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import venv
from dataclasses import replace
from pathlib import Path

import pandas as pd
import pytest
import yaml

from helpers import keep_analyses
from unbin.demo import COHORTS, demo_spec, simulate_registry
from unbin.pipeline.runner import snakemake_command
from unbin.results.tables import read_table

pytestmark = pytest.mark.workflow
ROOT = Path(__file__).resolve().parents[2]


def small_spec(folder: Path, n: int = 700) -> Path:
    """Two invented cohorts, two analyses, fixed common basis (so cohorts rerun independently),
    small resampling: quick to run."""
    raw = demo_spec(COHORTS[:2])
    keep_analyses(raw, "readmission_sodium", "visits_bmi")
    raw["continuous"] = {"forms": ["linear", "spline"], "spline_knots": [4]}
    raw["analyses"][0]["continuous"] = {"spline_knots": {"values": [132, 137, 141, 146]},
                                        "reference_value": 140, "grid_range": [130, 150]}
    raw["analyses"][1]["continuous"] = {"spline_knots": {"values": [21, 25, 29, 35]},
                                        "reference_value": 24, "grid_range": [19, 38]}
    raw["resampling"] = {"bootstrap": 10, "permutations": 19}
    (folder / "data").mkdir(parents=True, exist_ok=True)
    for c in COHORTS[:2]:
        simulate_registry(profile=replace(c, n=n)).to_parquet(
            folder / "data" / f"{c.name}.parquet", index=False)
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(raw, sort_keys=False))
    return path


def cli(*args: str, env: dict[str, str] | None = None,
        timeout: int = 900) -> subprocess.CompletedProcess[str]:
    proc = subprocess.run([sys.executable, "-m", "unbin.cli", *args], capture_output=True,
                          text=True, timeout=timeout, env=env)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    return proc


def planned(spec: Path, out: Path) -> set[tuple[str, str]]:
    """The jobs Snakemake plans (dry run) as (rule, wildcards) pairs."""
    cmd = snakemake_command(spec, out, 1, extra=["-n"])
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    text = proc.stdout + proc.stderr
    jobs: set[tuple[str, str]] = set()
    current = None
    for line in text.splitlines():
        m = re.match(r"^(?:local)?rule (\w+):", line.strip())
        if m:
            current = m.group(1)
            jobs.add((current, ""))
            continue
        m = re.match(r"^wildcards: (.*)$", line.strip())
        if m and current:
            jobs.discard((current, ""))
            jobs.add((current, m.group(1)))
    return jobs


@pytest.fixture(scope="module")
def small_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    folder = tmp_path_factory.mktemp("small")
    spec = small_spec(folder)
    out = folder / "out"
    cli("run", str(spec), "--out", str(out), "--cores", "2", "--quiet")
    return spec, out


def _fits(jobs: set[tuple[str, str]]) -> set[str]:
    return {w for r, w in jobs if r == "fit_analysis"}


def test_nothing_reruns_for_timestamps_or_formatting(small_run: tuple[Path, Path]) -> None:
    spec, out = small_run
    for extract in (spec.parent / "data").glob("*.parquet"):
        os.utime(extract)  # newer timestamps, same content
    raw = yaml.safe_load(spec.read_text())
    spec.write_text("# reformatted, same content\n" + yaml.safe_dump(raw, sort_keys=True))
    assert planned(spec, out) == set()


def test_changing_one_analysis_reruns_only_its_jobs(small_run: tuple[Path, Path],
                                                    tmp_path: Path) -> None:
    spec, out = small_run
    raw = yaml.safe_load(spec.read_text())
    raw["analyses"][1]["adjust"] = ["age"]  # visits_bmi loses one adjustment variable
    changed = tmp_path / "spec.yaml"
    changed.write_text(yaml.safe_dump(raw))
    (tmp_path / "data").symlink_to(spec.parent / "data")
    jobs = planned(changed, out)
    assert _fits(jobs) == {"cohort=lindenfeld, analysis=visits_bmi",
                           "cohort=marrowby, analysis=visits_bmi"}
    assert {w for r, w in jobs if r == "resample_analysis"} == _fits(jobs)
    assert {r for r, _ in jobs} <= {"fit_analysis", "resample_analysis", "bundle_cohort",
                                    "pool_bundles", "collect_tables", "draw_figures",
                                    "draw_study_figures", "build_report", "all"}


def test_replacing_one_extract_reruns_only_that_cohort(small_run: tuple[Path, Path],
                                                       tmp_path: Path) -> None:
    spec, out = small_run
    shutil.copytree(out, tmp_path / "out", symlinks=True)
    data = spec.parent / "data" / "marrowby.parquet"
    backup = tmp_path / "marrowby.parquet"
    shutil.copy2(data, backup)
    try:
        df = pd.read_parquet(data)
        df.iloc[:-5].to_parquet(data, index=False)  # a new delivery: five rows fewer
        jobs = planned(spec, tmp_path / "out")
    finally:
        shutil.copy2(backup, data)
    assert _fits(jobs) == {"cohort=marrowby, analysis=readmission_sodium",
                           "cohort=marrowby, analysis=visits_bmi"}
    bundles = {w for r, w in jobs if r == "bundle_cohort"}
    assert bundles == {"cohort=marrowby"}


def test_compare_reports_the_changed_cut_and_only_it(small_run: tuple[Path, Path],
                                                     tmp_path: Path) -> None:
    """Two runs that differ in one legacy cut point: `unbin compare` names that analysis (and
    the spec change behind it) and nothing else."""
    spec, out = small_run
    new = tmp_path / "new"
    shutil.copytree(out, new, symlinks=True)
    raw = yaml.safe_load(spec.read_text())
    raw["groupings"]["bmi"]["cuts"] = [25, 31]
    changed = spec.parent / "spec_changed.yaml"
    changed.write_text(yaml.safe_dump(raw))
    cli("run", str(changed), "--out", str(new), "--cores", "2", "--quiet")
    proc = cli("compare", str(out), str(new))
    table = read_table(new / "comparison.parquet")
    assert len(table) > 0
    assert set(table["analysis"]) == {"visits_bmi"}, table[["change", "analysis", "item"]]
    assert "spec changed" in set(table["change"]) and "estimate moved" in set(table["change"])
    assert "visits_bmi" in proc.stdout


def test_run_manifest_beside_results(small_run: tuple[Path, Path]) -> None:
    import json

    manifest = json.loads((small_run[1] / "run.json").read_text())
    assert manifest["returncode"] == 0
    assert manifest["rules"]["fit_analysis"]["jobs"] == 4
    assert manifest["started"] <= manifest["ended"]
    assert "statsmodels" in manifest["versions"]
    # a local run caps its jobs' memory requests (pipeline.memory), and says at what
    if Path("/proc/meminfo").is_file():
        assert isinstance(manifest["memory_mb"], int) and manifest["memory_mb"] > 0


def test_report_false_plans_no_figures_and_no_report(tmp_path: Path) -> None:
    """`report: false` (large batch runs): a fresh run plans every fit, resampling and table
    job but no figure or report job; `unbin report DIR` draws them later."""
    folder = tmp_path / "batch"
    folder.mkdir()
    spec = small_spec(folder, n=300)
    raw = yaml.safe_load(spec.read_text())
    with_report = {r for r, _ in planned(spec, folder / "out")}
    raw["report"] = False
    spec.write_text(yaml.safe_dump(raw))
    without = {r for r, _ in planned(spec, folder / "out")}
    figure_rules = {"draw_figures", "draw_study_figures", "build_report"}
    assert figure_rules <= with_report
    assert without == with_report - figure_rules
    assert {"fit_analysis", "resample_analysis", "collect_tables"} <= without


def test_module_from_installed_wheel(tmp_path: Path) -> None:
    """Build a wheel, install it into a fresh virtual environment, and run a consumer workflow
    that imports unbin's workflow with Snakemake's `module` directive and a prefix. The wheel is
    installed without dependencies; the dependencies come from the project's environment on
    PYTHONPATH (not unbin itself: the editable install's path hook is not active there), so the
    only unbin on the path is the wheel's — proving the Snakefile, rules, scripts and schemas
    ship inside it."""
    wheels = tmp_path / "wheels"
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps",
                    "-q", "-w", str(wheels), str(ROOT)], check=True, timeout=600)
    (wheel,) = wheels.glob("unbin-*.whl")
    env_dir = tmp_path / "venv"
    venv.EnvBuilder(with_pip=True).create(env_dir)
    py = env_dir / "bin" / "python"
    # Without PYTHONPATH: a source tree on it (a run from a checkout with PYTHONPATH=src) holds
    # the build's unbin.egg-info, and pip would take unbin as installed already.
    clean = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    subprocess.run([str(py), "-m", "pip", "install", "-q", "--no-deps", str(wheel)], check=True,
                   timeout=600, env=clean)
    site = next(p for p in sys.path if p.endswith("site-packages"))
    env = dict(os.environ, PYTHONPATH=site)
    where = subprocess.run([str(py), "-c", "import unbin, unbin.workflow_support as w; "
                            "print(unbin.__file__); print(w.snakefile())"], capture_output=True,
                           text=True, env=env)
    assert where.returncode == 0, where.stdout + where.stderr
    assert str(env_dir) in where.stdout and str(ROOT / "src") not in where.stdout
    consumer = tmp_path / "consumer"
    consumer.mkdir()
    spec = small_spec(consumer, n=500)
    raw = yaml.safe_load(spec.read_text())
    raw["cohorts"] = raw["cohorts"][:1]
    raw["analyses"] = raw["analyses"][1:]
    spec.write_text(yaml.safe_dump(raw))
    (consumer / "Snakefile").write_text(CONSUMER)
    proc = subprocess.run([str(py), "-m", "snakemake", "--cores", "2", "--workflow-profile",
                           "none", "--directory", str(consumer), "--snakefile",
                           str(consumer / "Snakefile")], capture_output=True, text=True, env=env,
                          timeout=900)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    # A `localrules:` list named the unprefixed rules, so Snakemake warned here and the
    # bookkeeping rules lost their local status under the consumer's prefix.
    assert "localrules directive specifies rules that are not present" not in proc.stdout + \
        proc.stderr
    assert (consumer / "results" / "unbin" / "tables" / "information.parquet").is_file()
    assert (consumer / "results" / "consortium_note.txt").read_text().startswith("rows:")


def test_bookkeeping_rules_declare_themselves_local() -> None:
    """Each bookkeeping rule carries `localrule: True` in its own definition: Snakemake records
    it under the rule's final name, so it holds under a consumer's `use rule * ... as unbin_*`
    too (a `localrules:` list would name rules that the prefix renamed). The fitting rules are
    cluster jobs."""
    rules = ROOT / "src" / "unbin" / "workflow"
    text = "\n".join(p.read_text() for p in [rules / "Snakefile", *sorted(
        (rules / "rules").glob("*.smk"))])
    blocks = dict(re.findall(r"^rule (\w+):\n((?:    .*\n|\n)*)", text, flags=re.M))
    local = {name for name, body in blocks.items() if "    localrule: True" in body}
    assert local == {"all", "collect_tables", "common_basis", "bundle_cohort", "pool_bundles"}
    assert not re.search(r"^localrules:", text, flags=re.M)
    assert {"fit_analysis", "resample_analysis", "summarise_sample", "draw_figures",
            "build_report"} <= set(blocks) - local


CONSUMER = """
import unbin.workflow_support as unbin_support


rule all:  # the consumer's first rule is its default target
    input:
        "results/consortium_note.txt",


module unbin:
    snakefile: str(unbin_support.snakefile())
    config: {"spec": "spec.yaml"}
    prefix: "results/unbin"

use rule * from unbin as unbin_*


rule note:
    input:
        "results/unbin/tables/information.parquet",
    output:
        "results/consortium_note.txt",
    run:
        import pandas as pd

        n = len(pd.read_parquet(input[0]))
        with open(output[0], "w") as fh:
            fh.write(f"rows: {n}\\n")
"""


def _slurm_ready() -> str:
    if shutil.which("sinfo") is None:
        return "sinfo not found: no SLURM on this machine (run tests/cluster/slurm_up.sh)"
    proc = subprocess.run(["sinfo", "-h", "-o", "%T"], capture_output=True, text=True)
    if proc.returncode != 0 or "idle" not in proc.stdout and "mixed" not in proc.stdout:
        return f"SLURM is installed but no node is idle: {proc.stdout.strip()} {proc.stderr}"
    return ""


def test_slurm_run_equals_local_run(small_run: tuple[Path, Path], tmp_path: Path) -> None:
    """The same spec through the real SLURM executor (sbatch, sacct) gives the same tables as
    the local run. Skipped loudly when no SLURM cluster is up."""
    why = _slurm_ready()
    if why:
        if os.environ.get("UNBIN_REQUIRE_SLURM"):
            pytest.fail(f"UNBIN_REQUIRE_SLURM is set but {why}")
        pytest.skip(f"SLURM INTEGRATION TEST NOT RUN: {why}")
    spec, out = small_run
    slurm_out = tmp_path / "slurm"
    env = dict(os.environ)
    cli("run", str(spec), "--out", str(slurm_out), "--profile", "slurm", "--cores", "2",
        "--quiet", env=env, timeout=1200)
    log = (slurm_out / "logs" / "snakemake.log").read_text()
    ids = re.findall(r"has been submitted with SLURM jobid (\d+)", log)
    fits = re.findall(r"rule_fit_analysis/", log)
    assert len(ids) >= 4 and len(fits) >= 4, log[-3000:]  # the four fits went through sbatch
    assert "(100%) done" in log
    states = subprocess.run(["sacct", "-n", "-X", "-P", "-o", "JobID,State", "-j", ",".join(ids)],
                            capture_output=True, text=True, check=True).stdout
    done = {line.split("|")[0]: line.split("|")[1] for line in states.split()}
    assert all(done.get(i) == "COMPLETED" for i in ids), states
    for table in sorted((out / "tables").glob("*.parquet")):
        assert (slurm_out / "tables" / table.name).read_bytes() == table.read_bytes(), table.name
