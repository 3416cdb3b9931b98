"""CPU time and memory of writing one bootstrap replicate's Cox design, two ways, in one process.

Data (invented): ``rows`` rows of ``p`` normal columns, times in years (whole days / 365.25,
rounded to 3 decimals, as a registry extract stores them), 4 strata, delayed entry, about 12%
events. One replicate: rows drawn with replacement (seeded), each drawn row repeated as often
as drawn, laid out by ``cox.layout.draw_layout`` from the full sample's layout (timed apart,
against ``prepare_layout`` of the drawn rows).

Ways, each writing the replicate's rows in the layout's order, centred and scaled by the full
sample's statistics, with the column extremes and the events' summed w x (what
``cox.fit._replicate_design`` needs): ``scatter`` is the kernel the replicates used before
(``cox_standardise.positions`` then ``scatter_standardised``: X read in drawn-row order, each
row stored at its layout position); ``gather`` is ``_replicate_design`` now (the drawn rows'
source rows in layout order, then ``gather_standardised``: rows read ahead a block at a time,
written in order). The two alternate, ``--repeats`` times each; printed: the smallest and the
median CPU milliseconds (``time.process_time``), the peak of the memory each way allocates
beyond the inputs and the output (tracemalloc), and whether both wrote the same rows.

    python benchmarks/replicate_design.py --rows 1000000 --p 3 6 9
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
os.environ.setdefault("UNBIN_COMPILED", "always")

import argparse  # noqa: E402
import time  # noqa: E402
from collections.abc import Callable  # noqa: E402
from functools import partial  # noqa: E402

import numpy as np  # noqa: E402
from _measure import peak_mib  # noqa: E402

from unbin.models.compiled import cox_standardise  # noqa: E402
from unbin.models.cox import prepare_layout  # noqa: E402
from unbin.models.cox.fit import _replicate_design  # noqa: E402
from unbin.models.cox.inputs import _stratum_codes  # noqa: E402
from unbin.models.cox.layout import Layout, draw_layout  # noqa: E402


def _sample(n: int, seed: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    days = np.ceil(rng.exponential(2500.0, n)) + 30
    entry_days = np.floor(rng.uniform(0, 0.5, n) * days * (rng.uniform(size=n) < 0.4))
    return {"time": np.round(days / 365.25, 3), "entry": np.round(entry_days / 365.25, 3),
            "event": rng.uniform(size=n) < 0.12, "strata": rng.integers(0, 4, n)}


def _scatter(Xa: np.ndarray, rows: np.ndarray, L: Layout, mean: np.ndarray,
             inv: np.ndarray) -> np.ndarray:
    """The replicate design as written before (the scatter)."""
    p = Xa.shape[1]
    X1 = np.empty((L.order.size, 1 + p))
    X1[:, 0] = 1.0
    pos, we_src = np.empty(rows.size, dtype=np.int64), np.empty(rows.size)
    cox_standardise.positions(np.asarray(L.order, dtype=np.int64), L.we, pos, we_src)
    bounds, xwe = np.empty((2, p)), np.empty(p)
    cox_standardise.scatter_standardised(X1, Xa, rows, pos, we_src, mean, inv, bounds, True,
                                         xwe)
    return X1


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--p", type=int, nargs="+", default=[3, 6, 9])
    ap.add_argument("--repeats", type=int, default=9)
    args = ap.parse_args()
    n = args.rows
    s = _sample(n, 11)
    full = prepare_layout(s["time"], s["event"], entry=s["entry"], strata=s["strata"])
    codes = _stratum_codes(s["strata"], n)[0]
    copies = np.random.default_rng(5).multinomial(n, np.full(n, 1.0 / n))
    rows = np.repeat(np.arange(n), copies)
    t0 = time.process_time()
    L = draw_layout(full, copies, None, codes)
    t_draw = time.process_time() - t0
    t0 = time.process_time()
    prepare_layout(s["time"][rows], s["event"][rows], entry=s["entry"][rows],
                   strata=s["strata"][rows])
    t_prep = time.process_time() - t0
    assert L is not None
    print(f"{n:,} rows, {L.order.size:,} laid out; replicate layout: draw_layout "
          f"{t_draw * 1e3:.0f} ms, prepare_layout {t_prep * 1e3:.0f} ms CPU")
    print("| p | scatter ms (min / median) | gather ms (min / median) | scatter MiB | "
          "gather MiB | same rows |")
    print("| --- | --- | --- | --- | --- | --- |")
    for p in args.p:
        Xa = np.random.default_rng(p).normal(size=(n, p)) * np.arange(1, p + 1)
        mean, inv = Xa.mean(0), 1.0 / Xa.std(0)
        old = _scatter(Xa, rows, L, mean, inv)
        new = _replicate_design(Xa, rows, L, mean, inv)[0].X1
        same = bool(np.array_equal(old, new))
        ways: dict[str, Callable[[], object]] = {
            "scatter": partial(_scatter, Xa, rows, L, mean, inv),
            "gather": partial(_replicate_design, Xa, rows, L, mean, inv)}
        times: dict[str, list[float]] = {"scatter": [], "gather": []}
        for _ in range(args.repeats):
            for way, fn in ways.items():
                t0 = time.process_time()
                fn()
                times[way].append(time.process_time() - t0)
        out_mib = L.order.size * (p + 1) * 8 / 2**20  # the design written, not counted below
        mib = {way: peak_mib(fn) - out_mib for way, fn in ways.items()}
        cells = [f"{min(v) * 1e3:.1f} / {np.median(v) * 1e3:.1f}" for v in times.values()]
        print(f"| {p} | {cells[0]} | {cells[1]} | {mib['scatter']:.0f} | {mib['gather']:.0f} "
              f"| {same} |")


if __name__ == "__main__":
    main()
