"""Each fit and resampling job asks for memory that grows with the extract's rows and the
analysis' imputed sets, and a local run caps what its jobs ask for together."""

from __future__ import annotations

import re
import subprocess
from dataclasses import replace
from pathlib import Path

import pytest
import yaml

from helpers import keep_analyses
from unbin.demo import COHORTS, demo_spec, simulate_registry
from unbin.errors import UnbinError
from unbin.pipeline.memory import FLOOR_MB, job_memory_mb, memory_budget_mb
from unbin.pipeline.runner import local_memory_mb, snakemake_command

ROWS = 800_000


def requests(spec: Path, out: Path) -> dict[tuple[str, str], int]:
    """The mem_mb of every fit and resampling job Snakemake plans (dry run), by (rule,
    analysis)."""
    cmd = snakemake_command(spec, out, 2, extra=["-n"], memory_mb=64000)
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    found: dict[tuple[str, str], int] = {}
    for block in re.split(r"\n(?=(?:local)?rule )", proc.stdout):
        rule = re.match(r"(?:local)?rule (\w+):", block)
        analysis = re.search(r"analysis=([\w-]+)", block)
        mem = re.search(r"resources: .*?\bmem_mb=(\d+)", block)
        if rule and analysis and mem and rule.group(1) in ("fit_analysis", "resample_analysis"):
            found[(rule.group(1), analysis.group(1))] = int(mem.group(1))
    return found


@pytest.mark.workflow
def test_jobs_ask_for_memory_by_rows_and_imputed_sets(tmp_path: Path) -> None:
    raw = demo_spec(COHORTS[:1])
    keep_analyses(raw, "readmission_sodium", "readmission_sodium_imputed")
    (tmp_path / "data").mkdir()
    c = COHORTS[0]
    simulate_registry(profile=replace(c, n=ROWS)).to_parquet(
        tmp_path / "data" / f"{c.name}.parquet", index=False)
    spec = tmp_path / "spec.yaml"
    spec.write_text(yaml.safe_dump(raw, sort_keys=False))
    sets = raw["analyses"][1]["missing"]["imputations"]
    assert sets > 1
    got = requests(spec, tmp_path)
    assert got == {
        ("fit_analysis", "readmission_sodium"): job_memory_mb("fit", ROWS, "binary"),
        ("resample_analysis", "readmission_sodium"): job_memory_mb("resample", ROWS, "binary"),
        ("fit_analysis", "readmission_sodium_imputed"):
            job_memory_mb("fit", ROWS, "binary", sets),
        ("resample_analysis", "readmission_sodium_imputed"):
            job_memory_mb("resample", ROWS, "binary", sets),
    }
    # at this size the resampling requests are above the floor and the imputed ones larger
    assert got[("resample_analysis", "readmission_sodium")] > FLOOR_MB
    assert (got[("resample_analysis", "readmission_sodium_imputed")]
            > got[("resample_analysis", "readmission_sodium")])


def test_request_grows_with_rows_sets_and_attempts() -> None:
    # the floor (the workflow's request before the estimate) for small extracts
    assert job_memory_mb("fit", 1_000) == FLOOR_MB
    assert job_memory_mb("resample", 1_000, attempt=2) == 2 * FLOOR_MB
    # above the measured peaks (pipeline.memory's docstring): at 1,000,000 rows fits up to
    # 981 MB, resampling up to 1,510 (Cox), 1,089 (logistic), 924 MB (linear); at 10,000,000
    # rows a logistic fit 7,267 MB, the linear resampling 6,920 MB (freed memory kept), a Cox
    # resampling job 5,780 MB
    assert job_memory_mb("fit", 1_000_000, "survival") > 981
    assert job_memory_mb("resample", 1_000_000, "survival") > 1_903  # with sorted designs
    assert job_memory_mb("resample", 1_000_000, "binary") > 1_089
    assert job_memory_mb("resample", 1_000_000, "continuous") > 924
    assert job_memory_mb("fit", 10_000_000, "binary") > 7_267
    assert job_memory_mb("resample", 10_000_000, "continuous") > 6_920
    assert job_memory_mb("resample", 10_000_000, "survival") > 5_780
    # an outcome type without its own figure gets the logistic one
    assert job_memory_mb("resample", 10**6, "other") == job_memory_mb("resample", 10**6)
    a, b, c = (job_memory_mb("resample", n, "survival") for n in (2 * 10**6, 4 * 10**6, 6 * 10**6))
    assert abs((c - b) - (b - a)) <= 1
    assert (job_memory_mb("resample", 2_000_000, "survival", 5)
            > job_memory_mb("resample", 2_000_000, "survival", 2))
    assert job_memory_mb("fit", 3_000_000, attempt=3) == 3 * job_memory_mb("fit", 3_000_000)
    with pytest.raises(ValueError, match="job 'bootstrap'"):
        job_memory_mb("bootstrap", 10)


def test_local_runs_cap_memory_cluster_runs_do_not(tmp_path: Path) -> None:
    meminfo = tmp_path / "meminfo"
    meminfo.write_text("MemTotal:       24684544 kB\nMemFree:         1000000 kB\n"
                       "MemAvailable:   20000000 kB\n")
    assert memory_budget_mb(meminfo) == int(0.9 * 20000000 / 1024)
    # without the file, the physical memory (where the system reports it), else no cap
    fallback = memory_budget_mb(tmp_path / "absent")
    assert fallback is None or fallback > 0
    assert local_memory_mb("slurm", None) is None
    assert local_memory_mb("slurm", 4000) == 4000
    assert local_memory_mb(None, 12000) == 12000
    assert local_memory_mb("local", None) == memory_budget_mb()
    with pytest.raises(UnbinError, match="--memory-mb 0"):
        local_memory_mb(None, 0)
    cmd = snakemake_command(tmp_path / "spec.yaml", tmp_path, 2, memory_mb=12000)
    assert cmd[cmd.index("--resources") + 1] == "mem_mb=12000"
    assert "--resources" not in snakemake_command(tmp_path / "spec.yaml", tmp_path, 2)


def test_a_cap_that_is_not_positive_is_refused_with_its_fix(tmp_path: Path,
                                                            capsys: pytest.CaptureFixture[str]
                                                            ) -> None:
    from unbin.cli import main

    raw = demo_spec(COHORTS[:1])
    keep_analyses(raw, "readmission_sodium")
    (tmp_path / "data").mkdir()
    c = COHORTS[0]
    simulate_registry(profile=replace(c, n=400)).to_parquet(
        tmp_path / "data" / f"{c.name}.parquet", index=False)
    spec = tmp_path / "spec.yaml"
    spec.write_text(yaml.safe_dump(raw, sort_keys=False))
    rc = main(["run", str(spec), "--out", str(tmp_path / "out"), "--memory-mb", "0", "--quiet"])
    assert rc == 2
    said = capsys.readouterr().out
    assert "--memory-mb 0" in said and "positive whole number" in said
    assert not (tmp_path / "out" / "tables").exists()
