"""Interrupting a run: Ctrl-C after the first job, the same command killed outright (as the
out-of-memory killer or a power cut would), then the same command once more.

While the interrupted runs are going, every table under its final name must be a complete parquet
file at every moment (tables are written to a temporary name and renamed into place); after the
last run, the results are byte for byte those of an uninterrupted run, and jobs that had finished
were not redone.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest

from unbin.cli import main
from unbin.results.tables import read_table, write_table

from .test_bad_input import _flat, _write, base_raw, registry


def _as_in_a_terminal() -> None:
    """Ctrl-C's default action in the run: a shell without job control (a CI script that puts a
    job in the background) starts its children with SIGINT ignored, which is not what a user at a
    terminal has, and would let the run finish through the signal."""
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def _command(spec: Path, out: Path) -> list[str]:
    return [sys.executable, "-m", "unbin.cli", "run", str(spec), "--out", str(out), "--cores", "1",
            "--quiet"]


def _tables(root: Path) -> list[Path]:
    """Every parquet file under its final name (temporary files start with a dot)."""
    return sorted(p for p in root.rglob("*.parquet") if not p.name.startswith("."))


def _unreadable(root: Path) -> list[str]:
    """Final-named parquet files that are not complete parquet files right now."""
    bad = []
    for p in _tables(root):
        try:
            pq.read_metadata(p)
        except FileNotFoundError:  # removed between listing and reading (an incomplete output)
            continue
        except Exception as exc:
            bad.append(f"{p.relative_to(root)}: {type(exc).__name__}: {exc}")
    return bad


def _job_logs(out: Path) -> list[Path]:
    return sorted(p for p in (out / "logs").glob("*/*/*.log"))


def _finished_jobs(out: Path) -> int:
    """Jobs that Snakemake recorded as finished (each writes its benchmark file at the end)."""
    return len(list((out / "benchmarks").glob("*/*/*.tsv")))


def _watch(proc: subprocess.Popen[str], out: Path, until: object, seen_bad: list[str]) -> None:
    """Check the tables while the run goes, until ``until()`` is true."""
    deadline = time.monotonic() + 300
    while not until():  # type: ignore[operator]
        assert proc.poll() is None, "the run ended before it could be interrupted"
        assert time.monotonic() < deadline
        seen_bad += _unreadable(out)
        time.sleep(0.05)


@pytest.mark.workflow
@pytest.mark.slow
def test_interrupted_and_killed_run_resumes_to_the_same_bytes(tmp_path: Path) -> None:
    spec = _write(tmp_path, base_raw(), registry())
    reference, interrupted = tmp_path / "reference", tmp_path / "interrupted"
    # The uninterrupted run goes alongside (one core each).
    ref = subprocess.Popen(_command(spec, reference), stdout=subprocess.PIPE,
                           stderr=subprocess.STDOUT, text=True)
    seen_bad: list[str] = []
    try:
        # 1. Ctrl-C once the first job has finished. The run gets its own session so that
        # SIGINT reaches the whole process group, as Ctrl-C in a terminal does: the CLI,
        # Snakemake and the running job all get it.
        proc = subprocess.Popen(_command(spec, interrupted), stdout=subprocess.PIPE,
                                stderr=subprocess.STDOUT, text=True, start_new_session=True,
                                preexec_fn=_as_in_a_terminal)
        # With one core, the first job has finished (and is recorded) once the second started.
        _watch(proc, interrupted, lambda: len(_job_logs(interrupted)) >= 2, seen_bad)
        first_log = _job_logs(interrupted)[0].relative_to(interrupted)
        os.killpg(proc.pid, signal.SIGINT)
        output, _ = proc.communicate(timeout=120)
        seen_bad += _unreadable(interrupted)
        assert proc.returncode == 130
        assert "Traceback" not in output
        assert ("Interrupted. Finished jobs are kept; run the same command again to finish the "
                "rest.") in _flat(output)
        assert not (interrupted / "tables").exists()  # stopped before the study-level tables

        # 2. The same command, killed outright once one more job has finished: nothing can
        # clean up, and Snakemake's lock stays behind.
        done = _finished_jobs(interrupted)
        proc = subprocess.Popen(_command(spec, interrupted), stdout=subprocess.PIPE,
                                stderr=subprocess.STDOUT, text=True, start_new_session=True,
                                preexec_fn=_as_in_a_terminal)
        _watch(proc, interrupted, lambda: _finished_jobs(interrupted) > done, seen_bad)
        os.killpg(proc.pid, signal.SIGKILL)
        proc.communicate(timeout=60)
        seen_bad += _unreadable(interrupted)
        assert proc.returncode == -signal.SIGKILL
        assert list((interrupted / ".snakemake" / "locks").iterdir())  # the stale lock
        assert not (interrupted / "tables" / "status.parquet").exists()

        # 3. Once more: it finishes, without redoing the first job.
        rerun = subprocess.run(_command(spec, interrupted), capture_output=True, text=True,
                               timeout=600)
        assert rerun.returncode == 0, rerun.stdout + rerun.stderr
        log = (interrupted / "logs" / "snakemake.log").read_text()
        assert f"log: {first_log}" not in log
    finally:
        ref_out, _ = ref.communicate(timeout=600)
    assert ref.returncode == 0, ref_out
    assert seen_bad == []  # no table under its final name was ever half-written
    ref_log = (reference / "logs" / "snakemake.log").read_text()
    assert log.count("\nlocalrule ") + log.count("\nrule ") < (
        ref_log.count("\nlocalrule ") + ref_log.count("\nrule "))

    ref_tables = [p.relative_to(reference) for p in _tables(reference)]
    assert ref_tables == [p.relative_to(interrupted) for p in _tables(interrupted)]
    assert any(p.parts[0] == "tables" for p in ref_tables)
    for rel in ref_tables:
        assert (interrupted / rel).read_bytes() == (reference / rel).read_bytes(), rel
    # A job killed mid-write may leave its temporary file behind, never under a final name.
    assert not list((interrupted / "tables").glob(".*"))


def test_a_write_cut_short_leaves_the_previous_table_intact(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A write that dies half-way (the process killed while pyarrow writes) leaves the table
    under its final name as it was: complete, with its old contents."""
    path = tmp_path / "fits.parquet"
    old = pd.DataFrame({"cohort": ["north"], "analysis": ["a"], "loglik": [-120.5]})
    write_table(old, path, {"table": "fits"})
    before = path.read_bytes()
    real_write = pq.write_table

    def dies_half_way(table: object, where: object, **kwargs: object) -> None:
        real_write(table, where, **kwargs)
        target = Path(str(where))
        target.write_bytes(target.read_bytes()[: target.stat().st_size // 2])
        raise KeyboardInterrupt

    monkeypatch.setattr(pq, "write_table", dies_half_way)
    new = pd.DataFrame({"cohort": ["north"] * 3, "analysis": ["a"] * 3,
                        "loglik": [-1.0, -2.0, -3.0]})
    with pytest.raises(KeyboardInterrupt):
        write_table(new, path, {"table": "fits"})
    assert path.read_bytes() == before
    pd.testing.assert_frame_equal(read_table(path), old)
    (tmp,) = [p for p in tmp_path.iterdir() if p != path]
    assert tmp.name.startswith(".fits.parquet.tmp-")  # the half-written file is not a table
    with pytest.raises(Exception, match="(?i)parquet"):
        pq.read_metadata(tmp)


@pytest.mark.skipif(not hasattr(os, "fork"), reason="POSIX file locks")
def test_a_second_run_on_the_same_folder_is_refused(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Two runs writing the same folder would overwrite each other's tables: while one holds
    the folder, another is refused with a message (and no output of the first is touched)."""
    import fcntl

    spec = _write(tmp_path, base_raw(), registry())
    out = tmp_path / "out"
    out.mkdir()
    with open(out / ".unbin-run.lock", "w") as held:
        fcntl.flock(held, fcntl.LOCK_EX | fcntl.LOCK_NB)  # what a running `unbin run` holds
        assert main(["run", str(spec), "--out", str(out), "--cores", "1", "--quiet"]) == 2
    assert (f"unbin: another unbin run is writing to {out}; wait for it to finish or choose "
            "another --out folder.") in _flat(capsys.readouterr().out)
    assert sorted(p.name for p in out.iterdir()) == [".unbin-run.lock"]
