"""Time and peak memory of unbin's logistic and Poisson fits against statsmodels' formula API.

    python benchmarks/glm.py                          # the table (10^6 rows), as markdown
    python benchmarks/glm.py --n 200000 --p 8 --json  # one size, both families, JSON lines

unbin fits a family through ``unbin.models.fit(family, X, Outcome(...), names)`` on numpy
arrays; no formula or data frame is involved. The reference is the route a formula user
takes: ``statsmodels.formula.api.glm("y ~ x1 + ... + xp", data=frame, ...)`` on a data frame
holding the same design columns, so both fit the same model and the coefficients must agree.
Both run in this process, one after the other, on the same arrays.

The data are an invented registry cohort (a biomarker with a U-shaped effect, age, sex):
``binary`` is a 0/1 outcome (logistic), ``count`` an event count over a person-time whose log
is the offset (Poisson). p = 2 fits the biomarker and age linearly; p = 8 fits restricted
cubic splines of the biomarker (5 knots, 4 columns) and age (4 knots, 3 columns), built by
``unbin.terms.SplineTerm``, plus sex.

Times are medians of ``--repeats`` fits of each route (after one warm-up fit). Peak memory is
the tracemalloc peak during one more fit of each route: allocations made by the fit only (the
input arrays and the data frame exist before it starts; numpy reports its buffers to
tracemalloc). BLAS is limited to one thread unless the environment says otherwise, so the
numbers are for one core; on a shared machine they are noisy, so take the ratios, which are
measured side by side, rather than the seconds.
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import platform  # noqa: E402
import statistics  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from collections.abc import Callable  # noqa: E402
from dataclasses import dataclass  # noqa: E402
from typing import Any  # noqa: E402

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from _measure import fmt as _fmt  # noqa: E402
from _measure import peak_mib as _peak_mib  # noqa: E402

from unbin.models import Outcome, fit  # noqa: E402
from unbin.terms import SplineTerm  # noqa: E402

FAMILIES = ("binary", "count")
COLUMNS = (2, 8)
ROWS = 1_000_000


@dataclass(frozen=True)
class Cohort:
    X: np.ndarray  # (n, p) design columns
    names: tuple[str, ...]
    y_binary: np.ndarray
    y_count: np.ndarray
    log_years: np.ndarray  # log person-time: the Poisson offset


def simulate(n: int, p: int, seed: int) -> Cohort:
    """An invented cohort; every association is made up."""
    if p not in COLUMNS:
        raise SystemExit(f"--p must be one of {COLUMNS}")
    rng = np.random.default_rng(seed)
    marker = rng.lognormal(mean=4.2, sigma=0.35, size=n)
    age = rng.uniform(40, 85, n)
    sex = rng.binomial(1, 0.5, n).astype(float)
    bend = ((np.log(marker) - 4.2) / 0.35) ** 2
    logit = -2.0 + 0.4 * bend + 0.04 * (age - 60) + 0.3 * sex
    y_binary = (rng.uniform(size=n) < 1 / (1 + np.exp(-logit))).astype(float)
    years = rng.uniform(0.5, 5.0, n)
    rate = np.exp(-2.5 + 0.3 * bend + 0.03 * (age - 60) + 0.2 * sex)
    y_count = rng.poisson(rate * years).astype(float)
    if p == 2:
        X = np.column_stack([marker, age])
        names: tuple[str, ...] = ("marker", "age")
    else:
        marker_term = SplineTerm.at_quantiles("marker", marker, 5)
        age_term = SplineTerm.at_quantiles("age", age, 4)
        X = np.column_stack([marker_term.basis(marker), age_term.basis(age), sex])
        names = (*marker_term.names(), *age_term.names(), "sex")
    return Cohort(X, names, y_binary, y_count, np.log(years))




def _median_seconds(fn: Callable[[], Any], repeats: int) -> tuple[float, Any]:
    out = fn()  # warm-up (imports, first touch of memory)
    times = []
    for _ in range(max(1, repeats)):
        start = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times), out


def measure(
    cohort: Cohort, family: str, *, repeats: int = 3, memory: bool = True
) -> dict[str, Any]:
    """One family on one cohort: unbin and the formula route, timed in this process."""
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    n, p = cohort.X.shape
    if family == "binary":
        outcome = Outcome("binary", cohort.y_binary)
        y, offset, sm_family = cohort.y_binary, None, sm.families.Binomial()
    else:
        outcome = Outcome("count", cohort.y_count, offset=cohort.log_years)
        y, offset, sm_family = cohort.y_count, cohort.log_years, sm.families.Poisson()
    # the formula route's data frame (built before timing: a formula user already has one)
    columns = [f"x{j + 1}" for j in range(p)]
    frame = pd.DataFrame(cohort.X, columns=columns)
    frame["y"] = y
    formula = "y ~ " + " + ".join(columns)

    def run_unbin() -> Any:
        return fit(family, cohort.X, outcome, cohort.names)

    def run_formula() -> Any:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # e.g. the formula engine's own deprecations
            return smf.glm(formula, data=frame, family=sm_family, offset=offset).fit()

    unbin_s, res = _median_seconds(run_unbin, repeats)
    ref_s, ref = _median_seconds(run_formula, repeats)
    if not res.ok:
        raise SystemExit(f"unbin's {family} fit failed: {res.message}")
    ref_coef = ref.params.to_numpy()  # Intercept, x1 .. xp: the order of unbin's names
    return {
        "family": family,
        "n": n,
        "p": p,
        "events": int(y.sum()),
        "unbin_seconds": unbin_s,
        "unbin_peak_mib": _peak_mib(run_unbin) if memory else None,
        "formula_seconds": ref_s,
        "formula_peak_mib": _peak_mib(run_formula) if memory else None,
        "speedup": ref_s / unbin_s,
        "max_abs_coef_diff": float(np.max(np.abs(res.coef - ref_coef))),
        "max_rel_se_diff": float(
            np.max(np.abs(np.sqrt(np.diag(res.cov)) / ref.bse.to_numpy() - 1.0))
        ),
        "loglik_diff": float(res.loglik - ref.llf),
    }




def markdown(rows: list[dict[str, Any]]) -> str:
    head = (
        "| family | n | p | unbin s | unbin peak MiB | formula s | formula peak MiB "
        "| speed-up | memory ratio | max abs coef diff | max rel SE diff |\n"
        "|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|"
    )
    lines = [head]
    for r in rows:
        ratio = (
            r["formula_peak_mib"] / r["unbin_peak_mib"]
            if r["unbin_peak_mib"] and r["formula_peak_mib"] is not None
            else None
        )
        lines.append(
            f"| {r['family']} | {r['n']:,} | {r['p']} | {r['unbin_seconds']:.2f} "
            f"| {_fmt(r['unbin_peak_mib'], '.0f')} | {r['formula_seconds']:.2f} "
            f"| {_fmt(r['formula_peak_mib'], '.0f')} | {r['speedup']:.1f}× "
            f"| {_fmt(ratio, '.1f')}{'×' if ratio is not None else ''} "
            f"| {r['max_abs_coef_diff']:.1e} | {r['max_rel_se_diff']:.1e} |"
        )
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--n", type=int, help=f"one size (rows); default: {ROWS:,} and both p")
    parser.add_argument("--p", type=int, default=8, choices=COLUMNS, help="columns (with --n)")
    parser.add_argument("--family", choices=FAMILIES, help="one family (default: both)")
    parser.add_argument("--json", action="store_true", help="print one JSON object per line")
    parser.add_argument("--repeats", type=int, default=3, help="fits to take the median of")
    parser.add_argument("--no-memory", action="store_true", help="skip the tracemalloc runs")
    parser.add_argument("--seed", type=int, default=2011)
    args = parser.parse_args(argv)
    families = (args.family,) if args.family else FAMILIES
    sizes = [(args.n, args.p)] if args.n is not None else [(ROWS, p) for p in COLUMNS]
    rows = []
    for n, p in sizes:
        cohort = simulate(n, p, args.seed)
        for family in families:
            row = measure(cohort, family, repeats=args.repeats, memory=not args.no_memory)
            rows.append(row)
            if args.json:
                print(json.dumps(row), flush=True)
    if not args.json:
        print(markdown(rows))
        print(
            f"\nMedians of {args.repeats} fits; one BLAS thread; {platform.machine()}, "
            f"Python {platform.python_version()}, numpy {np.__version__}."
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
