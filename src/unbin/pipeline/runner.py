"""Driving Snakemake from the CLI: the command line in a subprocess (its Python API changes
between 9.x releases and ignores profiles), with progress read from its log."""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from importlib import resources
from pathlib import Path
from typing import Any

from ..errors import UnbinError
from .memory import memory_budget_mb
from .workflow_support import snakefile

PROGRESS = re.compile(r"(\d+) of (\d+) steps \((\d+(?:\.\d+)?)%\) done")
PROFILES = ("local", "slurm")


class JobTracker:
    """Follows Snakemake's log: jobs done and in total, and which jobs are running now (by
    cohort/analysis for the fits, by what they do for the study-level steps)."""

    RULE = re.compile(r"^\s*(?:local)?rule (\w+):")
    JOBID = re.compile(r"^\s*jobid: (\d+)")
    WILDCARDS = re.compile(r"^\s*wildcards: (.+)$")
    FINISHED = re.compile(r"Finished jobid: (\d+)")
    TOTAL = re.compile(r"^total\s+(\d+)\s*$")
    LABELS = {"collect_tables": "collecting the tables",
              "draw_study_figures": "drawing the study's figures",
              "build_report": "drawing the figures and the report", "all": ""}

    def __init__(self) -> None:
        self.done = 0
        self.total = 0
        self.running: dict[str, str] = {}
        self._rule = ""
        self._job = ""

    def feed(self, line: str) -> bool:
        """Read one log line; True when what the progress shows has changed."""
        if m := self.RULE.match(line):
            self._rule, self._job = m.group(1), ""
        elif (m := self.JOBID.match(line)) and self._rule:
            self._job = m.group(1)
            self.running[self._job] = self.LABELS.get(self._rule, self._rule)
            return True
        elif (m := self.WILDCARDS.match(line)) and self._job:
            values = dict(kv.split("=", 1) for kv in m.group(1).split(", ") if "=" in kv)
            label = "/".join(values.values())
            if self._rule != "fit_analysis":
                label = f"{self._rule.replace('_', ' ')} {label}"
            self.running[self._job] = label
            return True
        elif m := self.FINISHED.search(line):
            self.running.pop(m.group(1), None)
            return True
        elif m := PROGRESS.search(line):
            self.done, self.total = int(m.group(1)), int(m.group(2))
            return True
        elif (m := self.TOTAL.match(line)) and not self.total:
            self.total = int(m.group(1))
            return True
        return False

    def current(self) -> str:
        return ", ".join(v for v in self.running.values() if v)


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
                      extra: list[str] | None = None,
                      memory_mb: int | None = None) -> list[str]:
    """The Snakemake command line of a run. ``memory_mb`` caps what the jobs running at once on
    this computer may ask for together (``--resources mem_mb``; see ``pipeline.memory``): given
    only for local runs, where the jobs share this computer's memory."""
    cmd = [sys.executable, "-m", "snakemake", "--snakefile", str(snakefile()),
           "--directory", str(out), "--config", f"spec={spec.resolve()}",
           "--rerun-triggers", "params", "input", "--rerun-incomplete"]
    if profile:
        cmd += ["--profile", str(profile_path(profile))]
    # The command line wins over a profile: --cores caps local work (and local rules on a
    # cluster); no workflow profile is picked up implicitly.
    cmd += ["--cores", str(cores), "--workflow-profile", "none"]
    if memory_mb is not None:
        cmd += ["--resources", f"mem_mb={memory_mb}"]
    return cmd + (extra or [])


def local_memory_mb(profile: str | None, memory_mb: int | None) -> int | None:
    """The memory cap of a run: the one asked for; else, for a run on this computer (no profile
    or the ``local`` one), ``pipeline.memory.memory_budget_mb``; none for a cluster profile,
    whose jobs each get their own memory."""
    if memory_mb is not None:
        if memory_mb < 1:
            raise UnbinError(f"--memory-mb {memory_mb}: give the megabytes the jobs may use at "
                             "once on this computer, a positive whole number (e.g. 16000).")
        return memory_mb
    if profile not in (None, "local"):
        return None
    return memory_budget_mb()


def run_manifest(out: Path, spec: Path, cores: int, profile: str | None, started: float,
                 ended: float, returncode: int,
                 memory_mb: int | None = None) -> dict[str, Any]:
    """The run manifest (``out/run.json``): versions, the spec's digest, per-rule timings from
    Snakemake's benchmark files, start and end times. Times live here, never in the results."""
    from ..results.provenance import versions
    from ..spec import digest, read_yaml

    rules: dict[str, dict[str, Any]] = {}
    for tsv in sorted((out / "benchmarks").glob("*/**/*.tsv")):
        rule = tsv.relative_to(out / "benchmarks").parts[0]
        with open(tsv) as fh:
            header = fh.readline().rstrip("\n").split("\t")
            values = fh.readline().rstrip("\n").split("\t")
        row = dict(zip(header, values, strict=False))
        r = rules.setdefault(rule, {"jobs": 0, "seconds_total": 0.0, "seconds_max": 0.0,
                                    "max_rss_mb": 0.0})
        s = float(row.get("s", "nan"))
        rss = float(row.get("max_rss", "0") or 0) if row.get("max_rss", "-") != "-" else 0.0
        r["jobs"] += 1
        r["seconds_total"] = round(r["seconds_total"] + s, 3)
        r["seconds_max"] = round(max(r["seconds_max"], s), 3)
        r["max_rss_mb"] = round(max(r["max_rss_mb"], rss), 1)
    stamp = lambda t: datetime.fromtimestamp(t, tz=UTC).isoformat(timespec="seconds")  # noqa: E731
    return {
        "spec": str(spec.resolve()),
        "spec_digest": digest(read_yaml(spec)),
        "spec_git": spec_git(spec),
        "versions": versions(),
        "cores": cores,
        "memory_mb": memory_mb,
        "profile": profile or "none",
        "started": stamp(started),
        "ended": stamp(ended),
        "seconds": round(ended - started, 2),
        "returncode": returncode,
        "rules": rules,
    }


def spec_git(spec: Path) -> dict[str, Any] | None:
    """Where the spec stands in version control, when it lives in a git repository: the commit
    checked out, whether the working tree was clean (no changed tracked file), and whether the
    spec itself is tracked and unchanged. None outside a repository or without git. Only the run
    manifest holds this; result tables stay byte-stable."""
    folder = spec.resolve().parent

    def git(*args: str) -> str | None:
        try:
            proc = subprocess.run(["git", "-C", str(folder), *args], capture_output=True,
                                  text=True, timeout=30, check=False)
        except (OSError, subprocess.TimeoutExpired):
            return None
        return proc.stdout.strip() if proc.returncode == 0 else None

    commit = git("rev-parse", "HEAD")
    if not commit:
        return None
    changed = git("status", "--porcelain", "--untracked-files=no")
    name = spec.resolve().name
    spec_state = git("status", "--porcelain", "--", name)
    tracked = git("ls-files", "--error-unmatch", "--", name) is not None
    return {
        "commit": commit,
        "clean": changed == "",
        "spec_tracked": tracked,
        "spec_unchanged": tracked and spec_state == "",
    }


def run_workflow(spec: Path, out: Path, cores: int = 1, profile: str | None = None,
                 extra: list[str] | None = None,
                 on_progress: Callable[[int, int, str], None] | None = None,
                 memory_mb: int | None = None) -> int:
    """Run the workflow; returns Snakemake's exit code. Its log goes to ``out/logs/snakemake.log``
    and the run manifest to ``out/run.json``. ``memory_mb``: the local jobs' memory cap
    (default: :func:`local_memory_mb`)."""
    started = time.time()
    memory_mb = local_memory_mb(profile, memory_mb)
    with _folder_lock(out) as held:
        if held:
            _remove_stale_lock(spec, out, cores, profile)
        rc = _run_snakemake(spec, out, cores, profile, extra, on_progress, memory_mb)
    if not extra or "-n" not in extra:
        manifest = run_manifest(out, spec, cores, profile, started, time.time(), rc, memory_mb)
        (out / "run.json").write_text(json.dumps(manifest, indent=1, sort_keys=True) + "\n")
    return rc


@contextmanager
def _folder_lock(out: Path) -> Iterator[bool]:
    """One unbin run at a time per output folder. The kernel releases this lock however the run
    ends (even killed, or on power loss), unlike the lock files Snakemake leaves behind: holding
    it shows that a Snakemake lock found in the folder is stale. Yields whether it is held (not
    on systems without ``fcntl``)."""
    out.mkdir(parents=True, exist_ok=True)
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX: Snakemake's own locking only
        yield False
        return
    with open(out / ".unbin-run.lock", "w") as fh:
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise UnbinError(f"another unbin run is writing to {out}; wait for it to finish or "
                             "choose another --out folder.") from None
        yield True


def _remove_stale_lock(spec: Path, out: Path, cores: int, profile: str | None) -> None:
    """A run that was killed (SIGKILL, out of memory, power loss) leaves Snakemake's lock behind,
    and every later run would stop at it; with the folder lock held, no run is using it."""
    locks = out / ".snakemake" / "locks"
    if locks.is_dir() and any(locks.iterdir()):
        subprocess.run(snakemake_command(spec, out, cores, profile, ["--unlock"]),
                       stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=False)


def _run_snakemake(spec: Path, out: Path, cores: int, profile: str | None,
                   extra: list[str] | None,
                   on_progress: Callable[[int, int, str], None] | None,
                   memory_mb: int | None = None) -> int:
    out.mkdir(parents=True, exist_ok=True)
    (out / "logs").mkdir(exist_ok=True)
    cmd = snakemake_command(spec, out, cores, profile, extra, memory_mb)
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
            jobs = JobTracker()
            for line in proc.stdout:
                log.write(line)
                if jobs.feed(line) and on_progress:
                    on_progress(jobs.done, jobs.total, jobs.current())
            return proc.wait()
        except KeyboardInterrupt:
            # Snakemake ignores SIGTERM while jobs run: ask with SIGINT, then kill.
            proc.send_signal(signal.SIGINT)
            try:
                proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                proc.kill()
            raise
