"""The fractional-polynomial search: screened against exhaustive, in the same process.

    python benchmarks/fp_search.py                    # 200,000 rows, a markdown table
    python benchmarks/fp_search.py --rows 1000000 --json

On the invented registry extract of ``benchmarks/registry.py`` (its ten analyses: logistic,
Cox with and without strata and delayed entry, Poisson with person-time, linear), each
analysis' FP search (8 FP1 and 36 FP2 candidates) runs under both adjustment codings, once
exhaustively (every candidate fitted to convergence) and once screened
(``unbin.refit.fp_selection``). Reported per analysis: seconds of each, their ratio, the
candidates fitted in full by the screened search, and whether the best FP1 and FP2 powers and
log-likelihoods are the same (they must be). The null fits, the layout and the adjustment
columns are made before the clock starts and shared by both searches. BLAS: one thread; the
clock is this process' CPU time (``--clock wall`` for elapsed seconds), steadier on a shared
machine.
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
from functools import partial  # noqa: E402
from pathlib import Path  # noqa: E402
from typing import Any  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))

from _measure import timed  # noqa: E402
from registry import simulate, spec  # noqa: E402


def measure(rows: int, names: tuple[str, ...] = (), clock: str = "cpu") -> list[dict[str, Any]]:
    from unbin.data import analysis_sample
    from unbin.refit.analysis import ADJUSTMENTS, _Fitter, adjustment_terms, bare_refit
    from unbin.refit.fp_selection import exhaustive_best, screened_best
    from unbin.spec import parse_spec

    frame = simulate(rows)
    raw = spec(0, 0, only=names)
    with tempfile.TemporaryDirectory() as tmp:
        s = parse_spec(raw, base=Path(tmp))
    out: list[dict[str, Any]] = []
    for a in s.analyses:
        r = bare_refit(analysis_sample(frame, a, s), a, s, "registry")
        f = _Fitter(r, r.sample.frame)
        row: dict[str, Any] = {"analysis": a.name, "family": a.family, "rows": r.outcome.n,
                               "exhaustive_s": 0.0, "screened_s": 0.0, "full_fits": 0,
                               "same": True}
        for coding in ADJUSTMENTS:
            adjust = adjustment_terms(f.df, a, s, coding)
            null = f.run((), adjust)
            kept = dict(f.cache)
            t_ex, ex = timed(partial(exhaustive_best, f, adjust, r.x, a.exposure), clock)
            f.cache = dict(kept)
            t_sc, sc = timed(partial(screened_best, f, adjust, r.x, a.exposure, null), clock)
            row["full_fits"] += len(f.cache) - len(kept)
            f.cache = dict(kept)
            row["exhaustive_s"] += t_ex
            row["screened_s"] += t_sc
            for d in (1, 2):
                same = (d in ex) == (d in sc) and (d not in ex or (
                    ex[d][0] == sc[d][0] and abs(ex[d][1].loglik - sc[d][1].loglik)
                    <= 1e-8 * max(1.0, abs(ex[d][1].loglik))))
                row["same"] = row["same"] and same
        row["speed_up"] = row["exhaustive_s"] / row["screened_s"]
        out.append(row)
    return out


def markdown(rows: list[dict[str, Any]]) -> str:
    lines = ["| analysis | family | rows | exhaustive s | screened s | speed-up | full fits "
             "(of 88) | same choice |", "|---|---|---:|---:|---:|---:|---:|---|"]
    for r in rows:
        lines.append(f"| {r['analysis']} | {r['family']} | {r['rows']:,} | "
                     f"{r['exhaustive_s']:.1f} | {r['screened_s']:.1f} | "
                     f"{r['speed_up']:.1f}× | {r['full_fits']} | {r['same']} |")
    ex = sum(r["exhaustive_s"] for r in rows)
    sc = sum(r["screened_s"] for r in rows)
    lines.append(f"| all | | | {ex:.1f} | {sc:.1f} | {ex / sc:.1f}× | "
                 f"{sum(r['full_fits'] for r in rows)} | {all(r['same'] for r in rows)} |")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--rows", type=int, default=200_000, help="rows of the extract")
    parser.add_argument("--only", default="", help="comma-separated analysis names")
    parser.add_argument("--clock", choices=("cpu", "wall"), default="cpu")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    args = parser.parse_args(argv)
    rows = measure(args.rows, tuple(n for n in args.only.split(",") if n), args.clock)
    print(json.dumps(rows, indent=1) if args.json else markdown(rows))
    return 0 if all(r["same"] for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
