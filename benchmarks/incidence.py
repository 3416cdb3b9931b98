"""CPU time of one standardised cumulative incidence (``unbin.refit.standardise.cif_risks``,
two exposure values) under competing events, interpolated (the default) and summed row by row
(the previous algorithm, forced by raising ``INTERPOLATE_ROWS``), and their difference.

Data (invented, seeded): ``rows`` rows, two causes, the design an exposure and two adjusters
(``--adjusters continuous``: normal, every row its own relative hazards; ``patterned``: age in
tenths of a year and sex, about 1,500 patterns, as the registry benchmark's extract), event
times on a grid giving about ``--times`` distinct event times up to the horizon, coefficients
fixed (no fit is timed). BLAS on one thread; ``time.process_time``.

    python benchmarks/incidence.py --rows 200000 1000000 --times 5000 --direct-max 200000
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
from typing import Any  # noqa: E402

import numpy as np  # noqa: E402
from _measure import timed  # noqa: E402

from unbin.refit import standardise  # noqa: E402


def data(rows: int, times: int, adjusters: str, seed: int = 7) -> dict[str, Any]:
    """The invented competing-risk sample (module docstring)."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=rows)
    if adjusters == "patterned":
        age = np.clip(rng.normal(62, 12, rows), 18, 95).round(1)
        z = np.column_stack([(age - 62) / 12, rng.integers(0, 2, rows)])
    else:
        z = rng.normal(size=(rows, 2))
    X = np.column_stack([x, z])
    b1, b2 = np.array([0.3, 0.7, 0.3]), np.array([-0.1, 0.5, -0.2])
    t1 = rng.exponential(20.0 * np.exp(-X @ b1))
    t2 = rng.exponential(10.0 * np.exp(-X @ b2))
    horizon = 5.0
    cens = rng.uniform(2.0, 10.0, rows)
    t = np.minimum(np.minimum(t1, t2), cens)
    t = np.ceil(t * times / horizon) * horizon / times  # about `times` distinct times
    cause = np.where(cens < np.minimum(t1, t2), 0, np.where(t1 < t2, 1, 2))
    return {"X": X, "coefs": [b1, b2], "time": t, "cause": cause, "horizon": horizon}


def run(d: dict[str, Any], direct: bool) -> tuple[float, np.ndarray]:
    if direct:
        standardise.INTERPOLATE_ROWS = 1 << 62
    try:
        sec, (out, _) = timed(lambda: standardise.cif_risks(
            d["X"], 1, d["coefs"], [np.array([0.67]), np.array([-0.67])], d["time"],
            d["cause"], [1, 2], d["horizon"]), clock="cpu")
    finally:
        standardise.INTERPOLATE_ROWS = 500
    return sec, out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, nargs="+", default=[200_000, 1_000_000])
    ap.add_argument("--times", type=int, default=5000, help="distinct event times (about)")
    ap.add_argument("--adjusters", choices=("continuous", "patterned"), default="continuous")
    ap.add_argument("--direct-max", type=int, default=200_000,
                    help="time the row-by-row sum only up to this many rows")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    out = []
    for n in args.rows:
        d = data(n, args.times, args.adjusters)
        k = int(np.unique(d["time"][(d["cause"] > 0) & (d["time"] <= d["horizon"])]).size)
        sec, new = run(d, False)
        row: dict[str, Any] = {"rows": n, "event_times": k, "adjusters": args.adjusters,
                               "interpolated_s": sec, "incidence": new.tolist()}
        if n <= args.direct_max:
            sec_d, old = run(d, True)
            row.update(direct_s=sec_d, max_abs_diff=float(np.max(np.abs(new - old))))
        out.append(row)
        if not args.json:
            print(row, flush=True)
    if args.json:
        print(json.dumps(out))


if __name__ == "__main__":
    main()
