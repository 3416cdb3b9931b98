"""Time and peak memory of unbin's Cox engine against lifelines' CoxPHFitter, in one process.

    python benchmarks/cox.py                         # the table, as markdown
    python benchmarks/cox.py --n 200000 --p 8 --json # one size, one JSON object
    python benchmarks/cox.py --n 200000 --p 8 --time-unit days --clock cpu --cohorts 4
                                                     # four cohorts (seeds), and their median
    python benchmarks/cox.py --ties days --json      # the table with times in days, as JSON
                                                     # (--ties is another name of --time-unit)
    python benchmarks/cox.py --n 200000 --p 8 --time-unit days --phases
                                                     # where one fit's CPU time goes
    python benchmarks/cox.py --n 1000000 --p 8 --time-unit days --refits 4
                                                     # bootstrap replicates' refits (CPU ms)

The data are an invented registry cohort: a biomarker with a U-shaped log hazard, age and sex;
follow-up up to 10 years with administrative censoring and random loss. p = 2 fits the
biomarker and age linearly; p = 8 fits restricted cubic splines of the biomarker (5 knots,
4 columns) and age (4 knots, 3 columns), built by ``unbin.terms.SplineTerm``, plus sex. Both
engines fit Efron ties on the same arrays. Times are continuous by default; ``--time-unit days`` rounds them up to whole days
(about 3,650 distinct values), which gives heavy ties. The p = 8 columns are orthogonalised
(the same model and log-likelihood): on the raw spline basis, whose columns are nearly
collinear, lifelines' Newton iterations stop far from the maximum (``--raw-basis`` shows it;
unbin and statsmodels agree there).

unbin's time is the median of ``--repeats`` fits; lifelines is fitted once. Peak memory is
the tracemalloc peak of a separate fit of each engine (allocations during the fit only; the
input arrays are excluded). BLAS is limited to one thread (unless the environment says
otherwise), so the numbers are for one core; on a shared machine they are noisy, so prefer
the speed-up (both engines timed side by side) to the seconds. lifelines is skipped above ``--lifelines-max-n``
rows (200,000) unless ``--force-lifelines`` is given.
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import platform  # noqa: E402
import statistics  # noqa: E402
import sys  # noqa: E402
import warnings  # noqa: E402
from typing import Any  # noqa: E402

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from _measure import fmt as _fmt  # noqa: E402
from _measure import peak_mib as _peak_mib  # noqa: E402
from _measure import timed  # noqa: E402

from unbin.models.cox import fit_cox  # noqa: E402
from unbin.terms import SplineTerm  # noqa: E402

SIZES = (10_000, 100_000, 200_000, 1_000_000)
COLUMNS = (2, 8)


def simulate(
    n: int, p: int, seed: int, time_unit: str, raw_basis: bool = False
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """An invented cohort: (X, time in years or days, event)."""
    if p not in COLUMNS:
        raise SystemExit(f"--p must be one of {COLUMNS}")
    rng = np.random.default_rng(seed)
    marker = rng.lognormal(mean=4.2, sigma=0.35, size=n)  # e.g. a kidney-function-like level
    age = rng.uniform(40, 85, n)
    sex = rng.binomial(1, 0.5, n).astype(float)
    log_hazard = -3.5 + 0.4 * ((np.log(marker) - 4.2) / 0.35) ** 2 + 0.04 * (age - 60)
    log_hazard += 0.3 * sex
    latent = rng.exponential(1.0 / np.exp(log_hazard))
    loss = rng.exponential(25.0, n)
    time_years = np.minimum.reduce([latent, loss, np.full(n, 10.0)])
    event = (latent <= np.minimum(loss, 10.0)).astype(np.int8)
    if time_unit == "days":
        time_years = np.ceil(time_years * 365.25)
    if p == 2:
        return np.column_stack([marker, age]), time_years, event
    X = np.column_stack(
        [
            SplineTerm.at_quantiles("marker", marker, 5).basis(marker),
            SplineTerm.at_quantiles("age", age, 4).basis(age),
            sex,
        ]
    )
    if not raw_basis:
        # same model, same log-likelihood: orthonormal columns spanning the spline basis
        q, _ = np.linalg.qr(X - X.mean(axis=0))
        X = q * np.sqrt(n)
    return X, time_years, event






def measure(
    n: int,
    p: int,
    *,
    seed: int = 2011,
    time_unit: str = "continuous",
    raw_basis: bool = False,
    repeats: int = 3,
    lifelines: bool = True,
    memory: bool = True,
    clock: str = "wall",
) -> dict[str, Any]:
    """One size: unbin and (optionally) lifelines, timed in this process."""
    X, time_, event = simulate(n, p, seed, time_unit, raw_basis)
    run_unbin = lambda: fit_cox(X, time_, event)  # noqa: E731
    run_unbin()  # warm-up (imports, first-touch of memory)
    times = []
    fit = None
    for _ in range(max(1, repeats)):
        seconds, fit = timed(run_unbin, clock)
        times.append(seconds)
    assert fit is not None
    row: dict[str, Any] = {
        "n": n,
        "p": p,
        "time_unit": time_unit,
        "clock": clock,
        "events": int(event.sum()),
        "unbin_seconds": statistics.median(times),
        "unbin_iterations": fit.iterations,
        "unbin_converged": fit.converged,
        "unbin_peak_mib": _peak_mib(run_unbin) if memory else None,
        "lifelines_seconds": None,
        "lifelines_peak_mib": None,
        "speedup": None,
        "max_abs_coef_diff": None,
        "max_rel_se_diff": None,
        "lifelines_converged": None,
        "lifelines_loglik_minus_unbin": None,
    }
    if lifelines:
        from lifelines import CoxPHFitter

        frame = pd.DataFrame(X, columns=[f"x{j}" for j in range(p)])
        frame["time"] = time_
        frame["event"] = event
        run_ref = lambda: CoxPHFitter().fit(frame, "time", "event")  # noqa: E731
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            seconds, ref = timed(run_ref, clock)
        row["lifelines_converged"] = not any("converge" in str(w.message).lower() for w in caught)
        row["lifelines_loglik_minus_unbin"] = float(ref.log_likelihood_ - fit.loglik)
        row["lifelines_seconds"] = seconds
        row["speedup"] = seconds / row["unbin_seconds"]
        row["max_abs_coef_diff"] = float(np.max(np.abs(ref.params_.to_numpy() - fit.coef)))
        se = np.sqrt(np.diag(fit.cov))
        row["max_rel_se_diff"] = float(np.max(np.abs(se / ref.standard_errors_.to_numpy() - 1)))
        if memory:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                row["lifelines_peak_mib"] = _peak_mib(run_ref)
    return row




_PHASES = (
    ("lay out the sample", "_design_and_layout"),
    ("standardise X", "_standardised"),
    ("subsample start", "_warm_start"),
    ("full-data log-likelihood and r sums", "_point"),
    ("full-data score", "_score"),
    ("full-data information", "_information"),
)


def phases(n: int, p: int, seed: int, time_unit: str, repeats: int) -> dict[str, Any]:
    """CPU milliseconds of the parts of one ``fit_cox`` (median over ``repeats`` fits), by
    wrapping the engine's steps in its own module while the fits run (the results are the
    same); the evaluations count only those on the full data (the subsample's are part of its
    start), and ``other`` is the rest of the fit (the log-likelihood at zero, Newton's steps,
    the stopping tests)."""
    import time

    from unbin.models.cox import fit as engine

    X, time_, event = simulate(n, p, seed, time_unit)
    m = n
    spent: dict[str, float] = {}
    calls: dict[str, int] = {}
    depth = [0]  # inside the subsample start, evaluations belong to it

    def wrap(label: str, fn: Any, full_only: bool) -> Any:
        def wrapped(*args: Any, **kwargs: Any) -> Any:
            if depth[0] or (full_only and args[0].order.size != m):
                return fn(*args, **kwargs)  # (the subsample start's own parts: in its time)
            depth[0] += label == "subsample start"
            start = time.process_time()
            try:
                return fn(*args, **kwargs)
            finally:
                spent[label] = spent.get(label, 0.0) + time.process_time() - start
                calls[label] = calls.get(label, 0) + 1
                depth[0] -= label == "subsample start"
        return wrapped

    real = {name: getattr(engine, name) for _, name in _PHASES}
    fit_cox(X, time_, event)  # warm-up
    per_fit: list[dict[str, float]] = []
    try:
        for label, name in _PHASES:
            setattr(engine, name, wrap(label, real[name], name in ("_point", "_score",
                                                                     "_information")))
        for _ in range(max(1, repeats)):
            spent.clear()
            calls.clear()
            seconds, _fit = timed(lambda: fit_cox(X, time_, event), "cpu")
            row = {label: 1e3 * spent.get(label, 0.0) for label, _ in _PHASES}
            row["other"] = 1e3 * seconds - sum(row.values())
            row["total"] = 1e3 * seconds
            per_fit.append(row)
    finally:
        for name, fn in real.items():
            setattr(engine, name, fn)
    labels = [label for label, _ in _PHASES] + ["other", "total"]
    return {
        "n": n, "p": p, "time_unit": time_unit, "seed": seed,
        "cpu_ms": {k: statistics.median(r[k] for r in per_fit) for k in labels},
        "calls": dict(calls),
    }


def refits(n: int, p: int, seed: int, time_unit: str, replicates: int) -> dict[str, Any]:
    """CPU milliseconds per bootstrap replicate's refit (``near_start`` once, then
    ``refit_replicate`` with the log-likelihood, as the information bootstrap refits one at a
    time above 300,000 rows), and of it the secant steps (``_near_steps``: the evaluations
    after the start's and the stopping tests); the replicates' layouts are prepared before
    timing. Times in days are divided by 365.25 (years, as the registry benchmark's). Also the
    estimates and log-likelihoods, to compare two versions of the engine."""
    import time

    from unbin.models.cox import fit as engine
    from unbin.models.cox import prepare_layout

    X, time_, event = simulate(n, p, seed, time_unit)
    if time_unit == "days":
        time_ = time_ / 365.25
    full = prepare_layout(time_, event)
    start = engine.near_start(X, fit_cox(X, time_, event, layout=full).coef, full)
    assert start is not None
    rng = np.random.default_rng(seed + 1)
    drawn = []
    for _ in range(replicates + 1):
        rows = np.sort(rng.integers(0, n, n))
        drawn.append((rows, prepare_layout(time_[rows], event[rows])))
    spent = [0.0]
    real = engine._near_steps

    def steps(*args: Any, **kwargs: Any) -> Any:
        begin = time.process_time()
        try:
            return real(*args, **kwargs)
        finally:
            spent[0] += time.process_time() - begin

    engine._near_steps = steps
    try:
        engine.refit_replicate(start, X, *drawn[0], with_loglik=True)  # warm-up
        spent[0] = 0.0
        begin = time.process_time()
        got = [engine.refit_replicate(start, X, rows, L, with_loglik=True)
               for rows, L in drawn[1:]]
        total = time.process_time() - begin
    finally:
        engine._near_steps = real
    return {
        "n": n, "p": p, "time_unit": time_unit, "seed": seed, "replicates": replicates,
        "refit_cpu_ms": 1e3 * total / replicates,
        "secant_steps_cpu_ms": 1e3 * spent[0] / replicates,
        "estimates": [None if g is None else [*map(float, g[0]), g[1]] for g in got],
    }


def markdown(rows: list[dict[str, Any]]) -> str:
    head = (
        "| n | p | events | unbin s | unbin iterations | unbin peak MiB | lifelines s "
        "| lifelines peak MiB | speed-up | max abs coef diff | max rel SE diff "
        "| loglik diff |\n|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|"
    )
    lines = [head]
    for r in rows:
        lines.append(
            f"| {r['n']:,} | {r['p']} | {r['events']:,} | {r['unbin_seconds']:.3f} "
            f"| {r['unbin_iterations']} "
            f"| {_fmt(r['unbin_peak_mib'], '.0f')} | {_fmt(r['lifelines_seconds'], '.2f')} "
            f"| {_fmt(r['lifelines_peak_mib'], '.0f')} | {_fmt(r['speedup'], '.0f')}"
            f"{'×' if r['speedup'] is not None else ''} "
            f"| {_fmt(r['max_abs_coef_diff'], '.1e')}"
            f"{' (lifelines did not converge)' if r['lifelines_converged'] is False else ''} "
            f"| {_fmt(r['max_rel_se_diff'], '.1e')} "
            f"| {_fmt(r['lifelines_loglik_minus_unbin'], '.1e')} |"
        )
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--n", type=int, help="one size (rows); default: the table")
    parser.add_argument("--p", type=int, default=8, choices=COLUMNS, help="columns (with --n)")
    parser.add_argument(
        "--json", action="store_true",
        help="print JSON: one object with --n, otherwise the table's rows as a list",
    )
    parser.add_argument(
        "--time-unit", "--ties", dest="time_unit", choices=("continuous", "days"),
        default="continuous",
        help="days: times rounded up to whole days, heavy ties (--ties days is the same)",
    )
    parser.add_argument(
        "--raw-basis", action="store_true", help="p = 8: the raw (not orthogonalised) splines"
    )
    parser.add_argument("--repeats", type=int, default=3, help="unbin fits to take the median of")
    parser.add_argument("--lifelines-max-n", type=int, default=200_000)
    parser.add_argument("--force-lifelines", action="store_true", help="run lifelines at any n")
    parser.add_argument("--no-memory", action="store_true", help="skip the tracemalloc runs")
    parser.add_argument("--seed", type=int, default=2011)
    parser.add_argument(
        "--cohorts", type=int, default=1,
        help="with --n: this many cohorts (seeds --seed, --seed + 1, ...), one row each and "
             "the median speed-up (how many Newton steps a fit needs varies between cohorts)",
    )
    parser.add_argument("--phases", action="store_true",
                        help="with --n: CPU milliseconds of the parts of one unbin fit (no "
                             "lifelines), median of --repeats fits per cohort")
    parser.add_argument("--refits", type=int, metavar="R",
                        help="with --n: CPU ms per refit of R bootstrap replicates (one at a "
                             "time, from the full sample's estimate; no lifelines), as JSON")
    parser.add_argument("--clock", choices=("wall", "cpu"), default="wall",
                        help="wall: elapsed seconds; cpu: this process' CPU seconds (steadier on "
                             "a shared machine)")
    args = parser.parse_args(argv)

    def one(n: int, p: int, seed: int = args.seed) -> dict[str, Any]:
        return measure(
            n,
            p,
            seed=seed,
            time_unit=args.time_unit,
            raw_basis=args.raw_basis,
            repeats=args.repeats,
            lifelines=args.force_lifelines or n <= args.lifelines_max_n,
            memory=not args.no_memory,
            clock=args.clock,
        )

    if args.n is not None and args.refits:
        print(json.dumps(refits(args.n, args.p, args.seed, args.time_unit, args.refits)))
        return 0
    if args.n is not None and args.phases:
        parts = [phases(args.n, args.p, args.seed + i, args.time_unit, args.repeats)
                 for i in range(args.cohorts)]
        if args.json:
            print(json.dumps(parts))
            return 0
        print("| part | " + " | ".join(f"seed {r['seed']}" for r in parts) + " |")
        print("|---|" + "---:|" * len(parts))
        for label in parts[0]["cpu_ms"]:
            cells = " | ".join(f"{r['cpu_ms'][label]:.1f}" for r in parts)
            print(f"| {label} | {cells} |")
        print("\nCPU ms, median of", args.repeats, "fits; full-data calls per fit:",
              parts[-1]["calls"])
        return 0
    if args.n is not None and args.cohorts > 1:
        rows = [one(args.n, args.p, args.seed + i) for i in range(args.cohorts)]
        for r, i in zip(rows, range(args.cohorts), strict=True):
            r["seed"] = args.seed + i
        ups = [r["speedup"] for r in rows if r["speedup"] is not None]
        median = statistics.median(ups) if ups else None
        if args.json:
            print(json.dumps({"cohorts": rows, "median_speedup": median}))
        else:
            print(markdown(rows))
            print(f"\nmedian speed-up over {len(ups)} cohorts: {_fmt(median, '.1f')}")
        return 0
    if args.n is not None:
        row = one(args.n, args.p)
        print(json.dumps(row) if args.json else markdown([row]))
        return 0
    rows = []
    for p in COLUMNS:
        for n in SIZES:
            rows.append(one(n, p))
            print(f"done n={n:,} p={p}", file=sys.stderr, flush=True)
    if args.json:
        print(json.dumps(rows))
        return 0
    print(markdown(rows))
    print(
        f"\nEfron ties, {args.time_unit} times; one BLAS thread; {platform.processor() or ''} "
        f"{platform.machine()}, Python {platform.python_version()}, numpy {np.__version__}."
    )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
