"""CPU time and likelihood evaluations of the Cox bootstrap refits, three ways, in one process.

Data (invented): ``rows`` rows, times and delayed entry in whole days (heavily tied event
times), 4 strata, 6 columns (normal, binary, uniform), about 12% events. Replicates: rows drawn
with replacement (seeded), each drawn row repeated as often as drawn (as the resampling tables
lay them out), the replicate's layout prepared before timing (its CPU time is printed apart:
the batched refits do not need it), and the same layout derived from the full sample's
(``cox.layout.draw_layout``, as the resampling tables make it on every time scale; timed
apart too, and required identical to the prepared one).

Ways: ``own`` is ``unbin.models.cox.refit_near`` on the replicate's copy of its design rows
(its own standardisation and its own information at the start); ``shared`` is
``refit_replicate`` after one ``near_start`` (the full sample's standardisation and
information, scaled; the start's preparation is timed too, once); ``batched`` is
``refit_replicates`` of all the replicates at once after the same ``near_start`` (run in
between the replicates of the other two, so that the three see the same machine). All start at
the full sample's estimate. Printed per size: CPU seconds per refit (``time.process_time``,
BLAS on one thread), likelihood evaluations per refit (one-at-a-time ways), the ratio of
the batched way's time to the shared one's (with and without the replicate layouts the shared
one needs), and the largest change of any row's linear predictor between the ways' estimates
and from the engine's Newton fit to tol 1e-13 on the first replicates. ``--peak``: only the
batched refits, with the peak of the memory they allocate (tracemalloc; the inputs excluded).

    python benchmarks/cox_refits.py --rows 2000 200000 --replicates 40
    python benchmarks/cox_refits.py --rows 1000000 --replicates 8 --peak
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402
from _measure import peak_mib  # noqa: E402

import unbin.models.cox.fit as engine  # noqa: E402
from unbin.models.cox import (  # noqa: E402
    Layout,
    fit_cox,
    near_start,
    prepare_layout,
    refit_near,
    refit_replicate,
    refit_replicates,
)
from unbin.models.cox.inputs import _stratum_codes  # noqa: E402
from unbin.models.cox.layout import draw_layout  # noqa: E402


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


def draws(rows: int, replicates: int) -> np.ndarray:
    """(replicates, rows): how often each row is drawn (seeded, the same draws as ever)."""
    rng = np.random.default_rng(7)
    return np.stack([np.bincount(rng.integers(0, rows, rows), minlength=rows)
                     for _ in range(replicates)]).astype(float)


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

    C = draws(rows, replicates)
    half = replicates // 2
    batched = np.full((replicates, X.shape[1]), np.nan)
    cpu = {"own": 0.0, "shared": 0.0, "batched": 0.0, "layouts": 0.0, "derived": 0.0}
    codes = _stratum_codes(d["strata"], rows)[0]

    def batch(part: slice) -> None:  # the batched way on a half of the replicates
        t0 = time.process_time()
        got = refit_replicates(start, X, layout, C[part], C[part])
        cpu["batched"] += time.process_time() - t0
        batched[part] = got.coef

    engine._evaluate = counted  # type: ignore[assignment]
    try:
        t0 = time.process_time()
        start = near_start(X, full.coef, layout)
        prep = time.process_time() - t0
        assert start is not None
        evals = {"own": 0, "shared": 0}
        apart = batched_apart = from_ref = 0.0
        batch(slice(0, half))
        for b in range(replicates):
            if b == half:
                batch(slice(half, replicates))
            m = np.repeat(np.arange(rows), C[b].astype(np.int64))
            t0 = time.process_time()
            lay = prepare_layout(d["time"][m], d["event"][m], entry=d["entry"][m],
                                 strata=d["strata"][m])
            cpu["layouts"] += time.process_time() - t0
            # the same layout derived from the full sample's (what the resampling tables use
            # where the times are whole days); required identical
            t0 = time.process_time()
            derived = draw_layout(layout, C[b], None, codes)
            cpu["derived"] += time.process_time() - t0
            _same_layout(derived, lay)
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
            if got["own"] is None or got["shared"] is None or np.isnan(batched[b]).any():
                print(f"  replicate {b}: a refit declined (own {got['own'] is not None}, "
                      f"shared {got['shared'] is not None}, "
                      f"batched {not np.isnan(batched[b]).any()})")
                continue
            apart = max(apart, float(np.abs(X[m] @ (got["own"] - got["shared"])).max()))
            batched_apart = max(batched_apart,
                                float(np.abs(X[m] @ (batched[b] - got["shared"])).max()))
            if b < checked:
                ref = fit_cox(X[m], d["time"][m], d["event"][m], entry=d["entry"][m],
                              strata=d["strata"][m], tol=1e-13)
                from_ref = max(from_ref, float(np.abs(X[m] @ (batched[b] - ref.coef)).max()))
    finally:
        engine._evaluate = evaluate
    per = {k: 1e3 * v / replicates for k, v in cpu.items()}
    print(f"{rows:>9,} rows, {replicates} replicates, per refit: own {per['own']:.2f} ms "
          f"({evals['own'] / replicates:.2f} evaluations); shared {per['shared']:.2f} ms "
          f"({evals['shared'] / replicates:.2f} evaluations; + {1e3 * prep:.1f} ms once); "
          f"batched {per['batched']:.2f} ms; the replicate's layout {per['layouts']:.2f} ms "
          f"(derived from the full sample's {per['derived']:.2f} ms). "
          f"batched / shared {per['batched'] / per['shared']:.2f}, with the layouts "
          f"{per['batched'] / (per['shared'] + per['layouts']):.2f}. Linear predictors: own "
          f"from shared <= {apart:.1e}, batched from shared <= {batched_apart:.1e}, batched "
          f"from Newton 1e-13 <= {from_ref:.1e}")


def _same_layout(got: Layout | None, want: Layout) -> None:
    """``draw_layout``'s layout equals ``prepare_layout``'s array for array."""
    assert got is not None, "draw_layout declined a replicate"
    for name, value in vars(want).items():
        if name == "subsamples":
            continue
        other = getattr(got, name)
        if hasattr(value, "toarray"):
            assert all(np.array_equal(getattr(other, f), getattr(value, f))
                       for f in ("indptr", "indices", "data")), name
        elif isinstance(value, np.ndarray):
            assert value.dtype == other.dtype and np.array_equal(value, other), name
        else:
            assert value == other, name


def peak(rows: int, replicates: int) -> None:
    """The batched refits alone: CPU time, then (a second run) the peak of their allocations."""
    d = cohort(rows)
    X, kw = d["X"], {"entry": d["entry"], "strata": d["strata"]}
    full = fit_cox(X, d["time"], d["event"], **kw)  # type: ignore[arg-type]
    layout = prepare_layout(d["time"], d["event"], **kw)
    start = near_start(X, full.coef, layout)
    assert start is not None
    C = draws(rows, replicates)
    t0 = time.process_time()
    got = refit_replicates(start, X, layout, C, C)
    cpu = time.process_time() - t0
    mib = peak_mib(lambda: refit_replicates(start, X, layout, C, C))
    print(f"{rows:>9,} rows, {replicates} replicates batched: {cpu:.1f} s CPU "
          f"({1e3 * cpu / replicates:.0f} ms per refit), {int(got.done.sum())} done; peak "
          f"allocations {mib:.0f} MiB (the inputs, {C.nbytes / 2**20:.0f} MiB of draw "
          "counts among them, excluded)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, nargs="+", default=[2000, 200000])
    ap.add_argument("--replicates", type=int, default=40)
    ap.add_argument("--checked", type=int, default=5,
                    help="replicates also fitted by Newton to tol 1e-13")
    ap.add_argument("--peak", action="store_true",
                    help="only the batched refits, with their peak allocations")
    args = ap.parse_args()
    for rows in args.rows:
        if args.peak:
            peak(rows, args.replicates)
        else:
            run(rows, args.replicates, args.checked)


if __name__ == "__main__":
    main()
