"""How much memory a fit or resampling job asks for, and how much a local run may use at once.

A job's peak grows with the extract's rows: the sample, its designs and their standardised
copies are a few dozen float64 values per row alive at once. Measured peaks (Snakemake's
``max_rss`` per job in ``benchmarks/registry.py --rows 1000000``, the ten registry analyses;
single jobs at 10,000,000 rows with ``benchmarks/job_memory.py``):

- fit jobs at 1,000,000 rows: 716–981 MB (every family; the Cox with strata and delayed entry
  the largest); a logistic fit at 10,000,000 rows: 7,267 MB (an older release);
- resampling at 1,000,000 rows (before the sorted designs below): Cox 823–1,510 MB, logistic and Poisson 931–1,089 MB, linear
  689–924 MB; at 10,000,000 rows the linear ldl_bmi job 6,100 MB (6,920 MB with
  :func:`keep_freed_memory`), where the line through its 1,000,000-row peak and 350 MB at no
  rows predicts 6,090 MB, and the Cox death_age job 5,780 MB.

So a job is taken to hold ``BASE_MB`` (the interpreter, pandas, pyarrow, the compiled kernels and
the extract's reading) plus a family's megabytes per million rows (``PER_MILLION_ROWS_MB``: the
largest slope seen for the job and family). A survival resampling job also holds the sorted
designs its bootstrap refits copy from, at most ``models.cox.fit.SORTED_BUDGET`` (512 MB) per
sample: with them death_sbp's job peaked at 1,660 MB and death_egfr's at 1,903 MB at 1,000,000
rows (1,167 and 1,510 MB without). Imputed analyses (M sets) held 2.0–2.4 times the
complete-case part at M = 5, so each further set adds ``FURTHER_SET_SHARE`` of it. The request
is that line times ``MARGIN``, never below the 1,000 MB the workflow asked for before this
estimate, and doubled, tripled… on a retry (``attempt``), as Snakemake's retries expect.

On a cluster the request becomes the job's memory (``sbatch --mem``). A local run caps the sum
of its running jobs' requests at a budget (``--resources mem_mb``): by default 90% of the memory
available when the run starts, so two ten-million-row jobs that would not fit side by side run
one after the other instead of being killed. A job whose request exceeds the whole budget still
runs, alone (Snakemake lowers its request to the budget).
"""

from __future__ import annotations

import math
import os
from pathlib import Path

JOBS = ("fit", "resample")
BASE_MB = 350.0
# per million rows, by job and outcome type (others: the logistic/Poisson figure)
PER_MILLION_ROWS_MB = {
    "fit": {"survival": 700.0, "binary": 700.0, "count": 700.0, "continuous": 700.0},
    "resample": {"survival": 1200.0, "binary": 750.0, "count": 750.0, "continuous": 600.0},
}
# the sorted designs of a survival resampling job: 8 designs of 1 + 6 columns of float64 and
# their rows' positions at 1,000,000 rows, up to the cap
SORTED_SHARE_MB_PER_MILLION = 500.0
FURTHER_SET_SHARE = 0.35
MARGIN = 1.2
FLOOR_MB = 1000
BUDGET_SHARE = 0.9


def job_memory_mb(job: str, rows: int, family: str = "binary", imputations: int = 1,
                  attempt: int = 1) -> int:
    """The memory (MB) a ``fit`` or ``resample`` job of an analysis of outcome type ``family``
    on ``rows`` rows asks for on its ``attempt``-th try, with ``imputations`` imputed sets (1:
    complete cases)."""
    if job not in PER_MILLION_ROWS_MB:
        raise ValueError(f"job {job!r}: expected one of {', '.join(JOBS)}")
    if rows < 0 or imputations < 1 or attempt < 1:
        raise ValueError(f"rows {rows}, imputations {imputations}, attempt {attempt}: rows must "
                         "be at least 0, imputations and attempt at least 1")
    slope = PER_MILLION_ROWS_MB[job].get(family, PER_MILLION_ROWS_MB[job]["binary"])
    per_row = slope * (1.0 + FURTHER_SET_SHARE * (imputations - 1)) / 1e6
    held = 0.0
    if job == "resample" and family == "survival":
        from ..models.cox.fit import SORTED_BUDGET

        held = min(SORTED_BUDGET / 2**20, SORTED_SHARE_MB_PER_MILLION * rows / 1e6)
    estimate = MARGIN * (BASE_MB + held + per_row * rows)
    return int(math.ceil(max(FLOOR_MB, estimate))) * attempt


def memory_budget_mb(meminfo: str | Path = "/proc/meminfo") -> int | None:
    """What a local run's jobs may hold at once (MB): ``BUDGET_SHARE`` of the memory the system
    reports available now (Linux' ``MemAvailable``), else of the physical memory; None where
    neither can be read (then Snakemake sets no cap)."""
    try:
        with open(meminfo, encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    kib = int(line.split()[1])
                    return int(BUDGET_SHARE * kib / 1024)
    except (OSError, ValueError, IndexError):
        pass
    try:
        total = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (AttributeError, ValueError, OSError):
        return None
    return int(BUDGET_SHARE * total / 2**20) if total > 0 else None


# glibc's mallopt parameters (malloc.h)
_M_TRIM_THRESHOLD = -1
_M_MMAP_THRESHOLD = -3
KEEP_BELOW_BYTES = 256 * 2**20
TRIM_ABOVE_BYTES = 512 * 2**20


def keep_freed_memory() -> bool:
    """Let the C library reuse freed arrays of up to 256 MB instead of returning them to the
    system (glibc only; True when applied).

    glibc serves a block above its mmap threshold (at most 32 MB however it adapts) with fresh
    pages from the kernel and returns them when freed, so at 10,000,000 rows every 80 MB
    temporary array is zero-filled page by page again: 1.3 million page faults and 39% of the
    CPU of a linear resampling job (``benchmarks/job_memory.py``, ldl_bmi at 10,000,000 rows:
    139 s CPU, 55 s of it in the kernel). Served from the heap and kept after ``free`` (up to
    512 MB at its top), the same job took 109 s (24 s in the kernel, 0.1 million faults) and
    peaked at 6.9 instead of 6.2 GB; at 1,000,000 rows 11.0 -> 10.1 s CPU, 955 -> 1,018 MB.
    Results are unchanged (only where memory comes from). A variable ``MALLOC_MMAP_THRESHOLD_``
    or ``MALLOC_TRIM_THRESHOLD_`` already set in the environment is the user's choice and wins.
    """
    import ctypes
    import platform

    if platform.system() != "Linux" or platform.libc_ver()[0] != "glibc":
        return False
    if "MALLOC_MMAP_THRESHOLD_" in os.environ or "MALLOC_TRIM_THRESHOLD_" in os.environ:
        return False
    try:
        libc = ctypes.CDLL("libc.so.6")
    except OSError:
        return False
    return bool(libc.mallopt(_M_MMAP_THRESHOLD, KEEP_BELOW_BYTES)
                and libc.mallopt(_M_TRIM_THRESHOLD, TRIM_ABOVE_BYTES))
