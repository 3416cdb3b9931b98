"""Driving Snakemake from the CLI: the command line in a subprocess (its Python API changes
between 9.x releases and ignores profiles), with progress read from its log."""

from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
from collections.abc import Callable
from importlib import resources
from pathlib import Path

from .errors import UnbinError
from .workflow_support import snakefile

PROGRESS = re.compile(r"(\d+) of (\d+) steps \((\d+(?:\.\d+)?)%\) done")
PROFILES = ("local", "slurm")


def profile_path(profile: str) -> Path:
    """A shipped profile by name (local, slurm), or a folder given by path."""
    if profile in PROFILES:
        p = Path(str(resources.files("unbin").joinpath("profiles", profile)))
        if (p / "config.yaml").is_file():
            return p
        raise UnbinError(f"profile {profile!r} is not shipped with this installation.")
    p = Path(profile)
    if not (p / "config.yaml").is_file():
        raise UnbinError(f"--profile {profile!r}: no config.yaml in that folder; give 'local', "
                         "'slurm' or the path of a Snakemake profile folder.")
    return p.resolve()


def snakemake_command(spec: Path, out: Path, cores: int, profile: str | None = None,
                      extra: list[str] | None = None) -> list[str]:
    cmd = [sys.executable, "-m", "snakemake", "--snakefile", str(snakefile()),
           "--directory", str(out), "--config", f"spec={spec.resolve()}",
           "--rerun-triggers", "params", "input", "--rerun-incomplete"]
    if profile:
        cmd += ["--profile", str(profile_path(profile))]
    # The command line wins over a profile: --cores caps local work (and local rules on a
    # cluster); no workflow profile is picked up implicitly.
    cmd += ["--cores", str(cores), "--workflow-profile", "none"]
    return cmd + (extra or [])


def run_workflow(spec: Path, out: Path, cores: int = 1, profile: str | None = None,
                 extra: list[str] | None = None,
                 on_progress: Callable[[int, int, str], None] | None = None) -> int:
    """Run the workflow; returns Snakemake's exit code. Its log goes to ``out/logs/snakemake.log``."""
    out.mkdir(parents=True, exist_ok=True)
    (out / "logs").mkdir(exist_ok=True)
    cmd = snakemake_command(spec, out, cores, profile, extra)
    env = dict(os.environ)
    env.setdefault("PYTHONHASHSEED", "0")
    # Each job is single-threaded; parallelism comes from Snakemake jobs. A multi-threaded BLAS
    # inside every job only oversubscribes the cores (small matrix calls slow down ~1000x).
    for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        env.setdefault(var, "1")
    logfile = out / "logs" / "snakemake.log"
    with open(logfile, "w") as log, subprocess.Popen(
            cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, env=env) as proc:
        try:
            assert proc.stdout is not None
            current = ""
            for line in proc.stdout:
                log.write(line)
                m = re.search(r"wildcards: cohort=([\w-]+), analysis=([\w-]+)", line)
                if m:
                    current = f"{m.group(1)}/{m.group(2)}"
                m = PROGRESS.search(line)
                if m and on_progress:
                    on_progress(int(m.group(1)), int(m.group(2)), current)
            return proc.wait()
        except KeyboardInterrupt:
            # Snakemake ignores SIGTERM while jobs run: ask with SIGINT, then kill.
            proc.send_signal(signal.SIGINT)
            try:
                proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                proc.kill()
            raise
