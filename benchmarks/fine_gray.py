"""CPU time and peak memory of one Fine–Gray fit, without the counting-process expansion (the
current fit) and on the expansion, on the registry benchmark's invented extract.

Data: ``registry.simulate(rows)`` (rows that never enter dropped), follow-up and entry in
whole days (heavily tied event times, as registries record them), death from a kidney-related
cause (1) with other deaths competing (2); design eGFR, age, sex; strata: centre (8). Each
(size, path) runs in its own process (data generation not timed; BLAS on one thread), which
prints the fit's CPU seconds (``time.process_time``), the process' peak resident set, the
rows the expansion has or would have, and the coefficients; the table gives old / new.

Paths: ``new`` is ``unbin.models.competing.fit_fine_gray`` (fit, sandwich with the weights'
estimation terms, baseline). ``expansion`` builds the expansion (with its size limit lifted)
and fits it with the Cox engine, its robust sandwich and baseline, without the weights'
estimation terms: a lower bound of what the fit on the expansion cost. With ``--old-src
PATH`` (the ``src`` folder of a checkout from before the change) the old path is instead that
checkout's own ``fit_fine_gray``, its size limit lifted. A path whose expansion would exceed
``--max-expanded`` rows is not run (it would not fit in memory).

    python benchmarks/fine_gray.py --rows 30000 200000 --new-only 1000000 [--old-src PATH]

With ``--replicates B``: the decision bootstrap's replicate refits instead (``replicates``'s
docstring), both ways in one process, alternated:

    python benchmarks/fine_gray.py --rows 30000 200000 --replicates 10
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import resource  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402
from typing import Any  # noqa: E402

import numpy as np  # noqa: E402

HERE = Path(__file__).resolve().parent


def sample(rows: int) -> tuple[np.ndarray, Any, np.ndarray]:
    """Design, Outcome and cause codes of the registry extract in days."""
    sys.path.insert(0, str(HERE))
    import registry

    from unbin.models.base import Outcome

    df = registry.simulate(rows).dropna(subset=["followup_years"])
    entry = np.floor(df["entry_years"].to_numpy(float) * 365.25)
    time_ = np.maximum(np.ceil(df["followup_years"].to_numpy(float) * 365.25), entry + 1)
    cause = df["death_cause"].to_numpy(float)
    X = df[["egfr", "age", "sex"]].to_numpy(float)
    o = Outcome("survival", (cause == 1).astype(float), time=time_, entry=entry,
                strata=df["centre"].to_numpy(), cause=cause, event_of_interest=1)
    return X, o, cause


def expansion_size(o: Any, cause: np.ndarray) -> int:
    from unbin.models.competing import fine_gray_layout

    return int(fine_gray_layout(o, cause, 1).expanded_rows)


def one(rows: int, path: str) -> dict[str, Any]:
    """Fit once in this process and say what it cost."""
    X, o, cause = sample(rows)
    names = ("egfr", "age", "sex")
    import unbin.models.competing as competing

    if path == "new":
        start = time.process_time()
        res = competing.fit_fine_gray(X, o, cause, 1, names)
        cpu = time.process_time() - start
        coef, expanded_rows = res.coef, res.extra["expanded_rows"]
    elif path == "old-src":
        competing.EXPANSION_ROWS = 10**12  # type: ignore[misc]
        start = time.process_time()
        res = competing.fit_fine_gray(X, o, cause, 1, names)
        cpu = time.process_time() - start
        coef, expanded_rows = res.coef, res.extra["expanded_rows"]
    else:
        from unbin.models import fit
        from unbin.models.cox import baseline_cumhaz

        competing.EXPANSION_ROWS = 10**12  # type: ignore[misc]
        start = time.process_time()
        expanded, data = competing.fine_gray_outcome(o, cause, 1)
        res = fit("survival", data.take(X), expanded, names)
        lp = data.take(X @ res.coef)
        baseline_cumhaz((lp - lp.mean())[:, None], expanded.time, expanded.y, [1.0],
                        entry=expanded.entry, strata=expanded.strata, weights=expanded.weights)
        cpu = time.process_time() - start
        coef, expanded_rows = res.coef, data.stop.size
    return {"rows": rows, "path": path, "cpu": cpu, "ok": bool(res.ok),
            "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
            "expanded_rows": int(expanded_rows), "coef": [float(v) for v in coef]}


def replicates(rows: int, count: int, seed: int = 11) -> dict[str, Any]:
    """CPU time per bootstrap replicate refit (coefficients and baseline, as the decision
    bootstrap needs them), both ways alternated in this process on the same replicates (the
    drawn rows repeated as drawn): ``own`` lays the replicate out from scratch and starts from
    its own information (``fine_gray_near`` on the drawn rows, the previous path), ``shared``
    takes the full sample's standardisation, information and sorted times
    (``fine_gray_replicate``); and how far apart their estimates are on the linear predictor."""
    import dataclasses

    from unbin.models.competing import fine_gray_near, fine_gray_replicate, fit_fine_gray

    X, o, cause = sample(rows)
    start = fit_fine_gray(X, o, cause, 1, ("egfr", "age", "sex")).coef
    draws = np.random.default_rng(seed)
    cpu = {"own": 0.0, "shared": 0.0}
    gap = 0.0
    for _ in range(count):
        m = np.sort(draws.integers(0, o.n, o.n))
        got = {}
        for way in ("own", "shared"):
            rep = dataclasses.replace(o.subset(m), cluster=None, cache={})
            t0 = time.process_time()
            got[way] = (fine_gray_near(X[m], rep, start) if way == "own"
                        else fine_gray_replicate(X, m, rep, o, start))[0]
            cpu[way] += time.process_time() - t0
        gap = max(gap, float(np.abs(X[m] @ (got["own"] - got["shared"])).max()))
    return {"rows": rows, "replicates": count, "own_ms": 1e3 * cpu["own"] / count,
            "shared_ms": 1e3 * cpu["shared"] / count, "max_linear_predictor_gap": gap}


def spawn(rows: int, path: str, src: str) -> dict[str, Any]:
    env = {**os.environ, "PYTHONPATH": src}
    out = subprocess.run([sys.executable, __file__, "--one", str(rows), path], env=env,
                         capture_output=True, text=True, check=True)
    return dict(json.loads(out.stdout.strip().splitlines()[-1]))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--rows", type=int, nargs="*", default=[30_000, 200_000],
                        help="sizes timed on both paths (default 30000 200000)")
    parser.add_argument("--new-only", type=int, nargs="*", default=[],
                        help="sizes timed without the expansion only (e.g. 1000000)")
    parser.add_argument("--old-src", help="src folder of a checkout from before the change: "
                        "time its own fit_fine_gray as the old path")
    parser.add_argument("--max-expanded", type=float, default=2e7,
                        help="run no old path whose expansion exceeds this many rows")
    parser.add_argument("--replicates", type=int, default=0,
                        help="instead: time this many bootstrap replicate refits per size, "
                        "from the replicate's own start and from the full sample's")
    parser.add_argument("--one", nargs=2, metavar=("ROWS", "PATH"), help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.one:
        print(json.dumps(one(int(args.one[0]), args.one[1])))
        return 0
    if args.replicates:
        print(json.dumps([replicates(rows, args.replicates) for rows in args.rows]))
        return 0
    here_src = str(HERE.parent / "src")
    results = []
    for rows in args.rows:
        new = spawn(rows, "new", here_src)
        row: dict[str, Any] = {"rows": rows, "expanded_rows": new["expanded_rows"], "new": new}
        if new["expanded_rows"] <= args.max_expanded:
            old = (spawn(rows, "old-src", args.old_src) if args.old_src
                   else spawn(rows, "expansion", here_src))
            row["old"] = old
            row["ratio"] = old["cpu"] / new["cpu"]
            row["max_coef_difference"] = float(np.max(np.abs(np.subtract(old["coef"],
                                                                         new["coef"]))))
        results.append(row)
    for rows in args.new_only:
        new = spawn(rows, "new", here_src)
        results.append({"rows": rows, "expanded_rows": new["expanded_rows"], "new": new})
    print("| rows | expansion rows | old CPU s | old peak RSS MiB | new CPU s | new peak RSS MiB "
          "| old / new |")
    print("| --- | --- | --- | --- | --- | --- | --- |")
    for r in results:
        old = r.get("old")
        print(f"| {r['rows']:,} | {r['expanded_rows']:,} | "
              f"{'not run' if old is None else format(old['cpu'], '.2f')} | "
              f"{'–' if old is None else format(old['peak_rss_mib'], '.0f')} | "
              f"{r['new']['cpu']:.2f} | {r['new']['peak_rss_mib']:.0f} | "
              f"{'–' if old is None else format(r['ratio'], '.1f')} |")
    print(json.dumps(results))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
