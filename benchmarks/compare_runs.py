"""Two result folders of the same spec, table by table, and the CPU time of their jobs.

    python benchmarks/compare_runs.py OLD NEW            # every table, then CPU time per rule
    python benchmarks/compare_runs.py --cpu RUN [RUN..]  # CPU time per rule only

For a change that should only make a run faster: every parquet file under ``tables/``,
``work/`` and ``bundles/`` of OLD is read with its counterpart in NEW, and per table the
largest absolute difference of the numeric columns is printed (NaN in the same cells counts as
equal; a NaN against a number is a difference of ``inf``), with exact equality of every other
column (text, booleans, categories) and of the shape, the column names and the row order. The
exit status is 1 when a table is missing, differs in shape or in a non-numeric cell, or differs
by more than ``--tolerance`` (default 1e-8) in a number.

CPU time: Snakemake's benchmark files (``benchmarks/<rule>/...tsv``, one per job) hold each
job's ``cpu_time`` (user + system seconds of the job's process tree); summed per rule, they
move far less with other work on a shared machine than the run's wall time does.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
import pandas as pd

FOLDERS = ("tables", "work", "bundles")


def cpu_by_rule(run: Path) -> dict[str, tuple[int, float]]:
    """Per rule: (jobs, summed cpu_time in seconds) from the run's benchmark files."""
    out: dict[str, tuple[int, float]] = {}
    for f in sorted((run / "benchmarks").rglob("*.tsv")):
        rule = f.relative_to(run / "benchmarks").parts[0]
        cpu = float(pd.read_csv(f, sep="\t")["cpu_time"].sum())
        jobs, total = out.get(rule, (0, 0.0))
        out[rule] = (jobs + 1, total + cpu)
    return out


def compare_table(old: pd.DataFrame, new: pd.DataFrame) -> tuple[float, list[str]]:
    """(largest absolute difference of the numeric columns, problems of everything else)."""
    problems: list[str] = []
    if list(old.columns) != list(new.columns):
        return float("inf"), [f"columns differ: {list(old.columns)} vs {list(new.columns)}"]
    if old.shape != new.shape:
        return float("inf"), [f"shape {old.shape} vs {new.shape}"]
    worst = 0.0
    for col in old.columns:
        a, b = old[col], new[col]
        numeric = (pd.api.types.is_numeric_dtype(a) and pd.api.types.is_numeric_dtype(b)
                   and not pd.api.types.is_bool_dtype(a) and not pd.api.types.is_bool_dtype(b))
        if numeric:
            x = a.to_numpy(dtype=float, na_value=np.nan)
            y = b.to_numpy(dtype=float, na_value=np.nan)
            both_nan = np.isnan(x) & np.isnan(y)
            same = (x == y) | both_nan  # equal infinities too
            with np.errstate(invalid="ignore"):
                diff = np.where(same, 0.0, np.abs(x - y))
            diff = np.where(np.isnan(diff), np.inf, diff)  # NaN against a number
            if diff.size:
                worst = max(worst, float(diff.max()))
        else:
            eq = (a.astype(object).where(a.notna(), None).tolist()
                  == b.astype(object).where(b.notna(), None).tolist())
            if not eq:
                bad = [i for i, (u, v) in enumerate(zip(a.tolist(), b.tolist(), strict=True))
                       if not (pd.isna(u) and pd.isna(v))
                       and (pd.isna(u) or pd.isna(v) or u != v)]
                problems.append(f"column {col!r} differs in {len(bad)} rows (first row {bad[0]}: "
                                f"{a.iloc[bad[0]]!r} vs {b.iloc[bad[0]]!r})" if bad else
                                f"column {col!r} differs in type: {a.dtype} vs {b.dtype}")
    return worst, problems


def compare_runs(old: Path, new: Path, tolerance: float) -> bool:
    files = sorted({p.relative_to(old) for d in FOLDERS for p in (old / d).rglob("*.parquet")}
                   | {p.relative_to(new) for d in FOLDERS for p in (new / d).rglob("*.parquet")})
    ok = True
    for rel in files:
        if not (old / rel).is_file() or not (new / rel).is_file():
            print(f"MISSING  {rel} (only in {'OLD' if (old / rel).is_file() else 'NEW'})")
            ok = False
            continue
        worst, problems = compare_table(pd.read_parquet(old / rel), pd.read_parquet(new / rel))
        bad = bool(problems) or worst > tolerance
        ok &= not bad
        if bad or str(rel).startswith("tables"):
            print(f"{'DIFFERS' if bad else 'same   '}  {rel}  max |diff| {worst:.3g}"
                  + "".join(f"\n         {p}" for p in problems))
    print(f"{len(files)} tables compared: "
          + ("all identical within the tolerance" if ok else "DIFFERENCES (above)"))
    return ok


def print_cpu(runs: list[Path]) -> None:
    sums = [cpu_by_rule(r) for r in runs]
    rules = sorted({k for s in sums for k in s})
    print("rule".ljust(20) + "".join(f"{r.name[-18:]:>24}" for r in runs))
    for rule in rules:
        cells = [s.get(rule, (0, 0.0)) for s in sums]
        print(rule.ljust(20) + "".join(f"{f'{j} jobs {c:7.1f} s':>24}" for j, c in cells))
    print("total".ljust(20) + "".join(
        f"{f'{sum(j for j, _ in s.values())} jobs {sum(c for _, c in s.values()):7.1f} s':>24}"
        for s in sums))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("runs", nargs="+", type=Path, help="result folders (OLD NEW)")
    ap.add_argument("--cpu", action="store_true", help="CPU time per rule only")
    ap.add_argument("--tolerance", type=float, default=1e-8)
    args = ap.parse_args(argv)
    if args.cpu:
        print_cpu(args.runs)
        return 0
    if len(args.runs) != 2:
        ap.error("give two result folders, OLD and NEW")
    ok = compare_runs(args.runs[0], args.runs[1], args.tolerance)
    print()
    print_cpu(args.runs)
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
