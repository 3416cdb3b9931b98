"""CPU time and likelihood evaluations of the Cox bootstrap refits, two ways, in one process.

Data (invented): ``rows`` rows, times and delayed entry in whole days (heavily tied event
times), 4 strata, 6 columns (normal, binary, uniform), about 12% events. Replicates: rows drawn
with replacement (seeded), each drawn row repeated as often as drawn (as the resampling tables
lay them out), the replicate's layout prepared before timing.

Ways: ``own`` is ``unbin.models.cox.refit_near`` on the replicate's copy of its design rows
(its own standardisation and its own information at the start); ``shared`` is
``refit_replicate`` after one ``near_start`` (the full sample's standardisation and
information, scaled; the start's preparation is timed too, once). Both start at the full
sample's estimate. Printed per size: CPU seconds per refit (``time.process_time``, BLAS on one
thread, the two ways alternated replicate by replicate), likelihood evaluations per refit, and
the largest change of any row's linear predictor between the two ways' estimates and from the
engine's Newton fit to tol 1e-13 on the first replicates.

    python benchmarks/cox_refits.py --rows 2000 200000 --replicates 40
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

import unbin.models.cox.fit as engine  # noqa: E402
from unbin.models.cox import (  # noqa: E402
    fit_cox,
    near_start,
    prepare_layout,
    refit_near,
    refit_replicate,
)


def cohort(rows: int, seed: int = 20) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = np.column_stack([rng.normal(size=rows), rng.binomial(1, 0.3, rows),
                         rng.uniform(40, 80, rows), rng.normal(size=(rows, 3))])
    stratum = rng.integers(0, 4, rows)
    beta = np.array([0.4, 0.5, 0.02, -0.2, 0.1, 0.0])
    latent = rng.exponential(1 / np.exp(X @ beta - 2.4 + 0.1 * stratum))
    follow = np.minimum(rng.exponential(6.0, rows), 5.0)
    time_ = np.ceil(np.minimum(latent, follow) * 365.25)
    late = rng.uniform(size=rows) < 0.3
    entry = np.floor(rng.uniform(0, 0.7, rows) * time_ * late)
    return {"X": np.ascontiguousarray(X), "time": time_, "event": (latent <= follow) * 1.0,
            "entry": entry, "strata": stratum}


def run(rows: int, replicates: int, checked: int) -> None:
    d = cohort(rows)
    X, kw = d["X"], {"entry": d["entry"], "strata": d["strata"]}
    full = fit_cox(X, d["time"], d["event"], **kw)  # type: ignore[arg-type]
    layout = prepare_layout(d["time"], d["event"], **kw)
    count = {"n": 0}
    evaluate = engine._evaluate

    def counted(*a: object, **k: object) -> object:
        count["n"] += 1
        return evaluate(*a, **k)  # type: ignore[arg-type]

    engine._evaluate = counted  # type: ignore[assignment]
    try:
        t0 = time.process_time()
        start = near_start(X, full.coef, layout)
        prep = time.process_time() - t0
        assert start is not None
        rng = np.random.default_rng(7)
        cpu = {"own": 0.0, "shared": 0.0}
        evals = {"own": 0, "shared": 0}
        apart = from_ref = 0.0
        for b in range(replicates):
            m = np.repeat(np.arange(rows), np.bincount(rng.integers(0, rows, rows),
                                                       minlength=rows))
            lay = prepare_layout(d["time"][m], d["event"][m], entry=d["entry"][m],
                                 strata=d["strata"][m])
            got = {}
            for way in (("own", "shared") if b % 2 == 0 else ("shared", "own")):
                count["n"] = 0
                t0 = time.process_time()
                if way == "own":
                    got[way] = refit_near(X[m], lay, full.coef)
                else:
                    out = refit_replicate(start, X, m, lay)
                    got[way] = None if out is None else out[0]
                cpu[way] += time.process_time() - t0
                evals[way] += count["n"]
            if got["own"] is None or got["shared"] is None:
                print(f"  replicate {b}: a refit declined (own {got['own'] is not None}, "
                      f"shared {got['shared'] is not None})")
                continue
            apart = max(apart, float(np.abs(X[m] @ (got["own"] - got["shared"])).max()))
            if b < checked:
                ref = fit_cox(X[m], d["time"][m], d["event"][m], entry=d["entry"][m],
                              strata=d["strata"][m], tol=1e-13)
                from_ref = max(from_ref, float(np.abs(X[m] @ (got["shared"] - ref.coef)).max()))
    finally:
        engine._evaluate = evaluate
    print(f"{rows:>9,} rows, {replicates} replicates: per refit own "
          f"{1e3 * cpu['own'] / replicates:.2f} ms, {evals['own'] / replicates:.2f} evaluations; "
          f"shared {1e3 * cpu['shared'] / replicates:.2f} ms, "
          f"{evals['shared'] / replicates:.2f} evaluations (+ {1e3 * prep:.1f} ms once); "
          f"linear predictors apart <= {apart:.1e}, shared from Newton 1e-13 <= {from_ref:.1e}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, nargs="+", default=[2000, 200000])
    ap.add_argument("--replicates", type=int, default=40)
    ap.add_argument("--checked", type=int, default=5,
                    help="replicates also fitted by Newton to tol 1e-13")
    args = ap.parse_args()
    for rows in args.rows:
        run(rows, args.replicates, args.checked)


if __name__ == "__main__":
    main()
