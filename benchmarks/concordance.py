"""CPU time and memory of Harrell's C of bootstrap replicates (``concordances``: one score on
the drawn rows as counts and on the full sample), against references timed in the same
process.

    python benchmarks/concordance.py                        # 10,000 / 200,000 rows, markdown
    python benchmarks/concordance.py --rows 200000 --json   # one size, JSON
    python benchmarks/concordance.py --baseline main        # also the module as it is at a
                                                            # git revision, alternated with it
    python benchmarks/concordance.py --rows 200000 1000000 --auc  # the registry sizes,
                                                            # and the binary AUC

The working tree's ``concordances`` is timed twice, alternated: by the compiled sweep
(``UNBIN_COMPILED=always``, ``unbin.models.compiled.concordance``) and by the numpy passes
(``never``); its results must be identical (the same integer counts). Its first call is made
before the clock starts (the kernel's import and load of its compiled code, timed apart as
``first_call_s``).

The sample is an invented registry cohort like the decision bootstrap's at scale: follow-up in
whole days (heavy ties), 8 strata, delayed entry for every row (age at study entry), about 20%
events, and two kinds of score: a grouped one (about 200 distinct values) and a continuous
one; every call gets the counts of one bootstrap draw (seeded) and None (the full sample).

References: ``weighted_concordance`` (the module's O(n log^2 n) pair sums, the same C from
the drawn rows with their counts as frequency weights; exact below 2^53, so the values agree
to the bit) and, with ``--baseline REV``, ``concordances`` as it is at that revision (git
show), its results required identical. Timings are CPU seconds of this process (one BLAS
thread), old and new alternated; on a shared machine prefer the ratios to the seconds.

Memory (tracemalloc, which numpy reports its arrays to): one replicate's C of ``--scores``
scores (the decision bootstrap's models; one call of ``scores_concordances``, or one call of
``concordances`` per score for a baseline without it) on a fresh time order: ``peak_mb`` the
largest traced memory above the start during the calls, ``kept_mb`` what is still traced
after them (work arrays left on the time order for its next call).
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import importlib.util  # noqa: E402
import json  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
import tracemalloc  # noqa: E402
from pathlib import Path  # noqa: E402
from types import ModuleType  # noqa: E402
from typing import Any  # noqa: E402

import numpy as np  # noqa: E402

from unbin.models.cox import concordance_order, weighted_concordance  # noqa: E402
from unbin.models.cox.concordance import concordances  # noqa: E402

SIZES = (10_000, 200_000)
ROOT = Path(__file__).resolve().parent.parent


def simulate(n: int, seed: int) -> dict[str, np.ndarray]:
    """Times (days), events, entries, strata and two scores of an invented cohort."""
    rng = np.random.default_rng(seed)
    marker = rng.normal(60.0, 20.0, n).clip(5, 150)
    age = rng.uniform(40, 90, n)
    lp = 0.0004 * (marker - 60.0) ** 2 + 0.05 * (age - 65)
    event_time = rng.exponential(3650 * np.exp(-lp))
    censor = rng.uniform(365, 3650, n)
    time_ = np.ceil(np.minimum(event_time, censor))
    event = event_time <= censor
    entry = np.floor(time_ * rng.uniform(0, 0.9, n)) - 1  # before the first day at risk
    return {
        "time": time_, "event": event, "entry": entry, "strata": rng.integers(0, 8, n),
        "grouped": np.round(lp, 2), "continuous": lp + rng.normal(0, 0.01, n),
    }


def load_revision(rev: str) -> ModuleType:
    """The concordance module as it is at git revision ``rev`` (its relative imports made
    absolute), loaded under another name."""
    text = subprocess.run(
        ["git", "show", f"{rev}:src/unbin/models/cox/concordance.py"], cwd=ROOT, check=True,
        capture_output=True, text=True).stdout
    text = text.replace("from .inputs import", "from unbin.models.cox.inputs import")
    folder = Path(tempfile.mkdtemp())
    path = folder / "concordance_baseline.py"
    path.write_text(text)
    spec = importlib.util.spec_from_file_location("concordance_baseline", path)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules["concordance_baseline"] = module
    spec.loader.exec_module(module)
    return module


def memory(module: ModuleType, d: dict[str, np.ndarray], draw: np.ndarray,
           scores: int) -> tuple[float, float]:
    """(peak, kept) traced MB of one replicate's C of ``scores`` scores with ``module``."""
    order = module.concordance_order(d["time"], d["event"], d["entry"], d["strata"])
    many = [d["grouped"] if k % 2 == 0 else d["continuous"] + 1e-3 * k for k in range(scores)]
    tracemalloc.start()
    start = tracemalloc.get_traced_memory()[0]
    if hasattr(module, "scores_concordances"):
        module.scores_concordances(order, many, [draw, None])
    else:
        for s in many:
            module.concordances(order, s, [draw, None])
    after, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return (peak - start) / 2**20, (after - start) / 2**20


def run(n: int, calls: int, seed: int, baseline: ModuleType | None,
        n_scores: int = 5) -> dict[str, Any]:
    d = simulate(n, seed)
    rng = np.random.default_rng(seed + 1)
    draws = [rng.multinomial(n, np.full(n, 1 / n)) for _ in range(calls)]
    scores = [d["grouped" if k % 2 == 0 else "continuous"] for k in range(calls)]
    order = concordance_order(d["time"], d["event"], d["entry"], d["strata"])
    old_order = (None if baseline is None else
                 baseline.concordance_order(d["time"], d["event"], d["entry"], d["strata"]))
    clock: dict[str, float] = {"new": 0.0, "numpy": 0.0, "baseline": 0.0}
    got: dict[str, list[list[float]]] = {"new": [], "numpy": [], "baseline": []}
    turns = ["new", "numpy"] + (["baseline"] if baseline is not None else [])
    os.environ["UNBIN_COMPILED"] = "always"
    start = time.process_time()
    concordances(order, scores[0], [draws[0], None])  # import and load the kernel
    first_call_s = time.process_time() - start
    for k in range(calls):
        for who in turns if k % 2 == 0 else turns[::-1]:
            module_order: Any = order if who != "baseline" else old_order
            fn = concordances if who != "baseline" else baseline.concordances  # type: ignore[union-attr]
            os.environ["UNBIN_COMPILED"] = "never" if who == "numpy" else "always"
            start = time.process_time()
            got[who].append(fn(module_order, scores[k], [draws[k], None]))
            clock[who] += time.process_time() - start
    os.environ["UNBIN_COMPILED"] = "auto"
    # the O(n log^2 n) weighted pair sums on the first call's drawn rows and full sample
    m = draws[0] > 0
    start = time.process_time()
    ref = [weighted_concordance(d["time"][m], scores[0][m], d["event"][m], draws[0][m],
                                entry=d["entry"][m], strata=d["strata"][m]),
           weighted_concordance(d["time"], scores[0], d["event"], np.ones(n),
                                entry=d["entry"], strata=d["strata"])]
    ref_s = time.process_time() - start
    out: dict[str, Any] = {
        "rows": n, "calls": calls, "events": int(d["event"].sum()),
        "new_ms_per_call": 1e3 * clock["new"] / calls,
        "numpy_ms_per_call": 1e3 * clock["numpy"] / calls,
        "compiled_speedup": clock["numpy"] / clock["new"],
        "compiled_identical": got["new"] == got["numpy"],
        "first_call_s": first_call_s,
        "weighted_pair_sums_ms": 1e3 * ref_s,
        "equal_to_weighted_pair_sums": got["new"][0] == ref,
    }
    this = sys.modules[concordances.__module__]
    out["peak_mb"], out["kept_mb"] = memory(this, d, draws[0], n_scores)
    if baseline is not None:
        out["baseline_peak_mb"], out["baseline_kept_mb"] = memory(baseline, d, draws[0],
                                                                  n_scores)
        out["baseline_ms_per_call"] = 1e3 * clock["baseline"] / calls
        out["speedup"] = clock["baseline"] / clock["new"]
        out["identical_to_baseline"] = got["new"] == got["baseline"]
    return out


def run_auc(n: int, calls: int, seed: int) -> dict[str, Any]:
    """The binary AUC of bootstrap draws and the full sample (``count_aucs``) by the compiled
    pass and by the numpy reductions, alternated; the full sample's against scipy's
    Mann-Whitney U."""
    from scipy import stats

    from unbin.models.discrimination import compared_score, count_aucs

    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    y = rng.random(n) < 1 / (1 + np.exp(-x))
    scores = [compared_score(x + rng.normal(0, 1, n)) for _ in range(calls)]
    draws = [rng.multinomial(n, np.full(n, 1 / n)) for _ in range(calls)]
    os.environ["UNBIN_COMPILED"] = "always"
    count_aucs(y, scores[0], [draws[0], None])  # import and load the kernel
    clock = {"always": 0.0, "never": 0.0}
    got: dict[str, list[Any]] = {"always": [], "never": []}
    for k in range(calls):
        for who in ("always", "never") if k % 2 == 0 else ("never", "always"):
            os.environ["UNBIN_COMPILED"] = who
            start = time.process_time()
            got[who].append(count_aucs(y, scores[k], [draws[k], None]))
            clock[who] += time.process_time() - start
    os.environ["UNBIN_COMPILED"] = "auto"
    u = stats.mannwhitneyu(scores[0][y], scores[0][~y]).statistic / (y.sum() * (~y).sum())
    return {"rows": n, "compiled_ms": 1e3 * clock["always"] / calls,
            "numpy_ms": 1e3 * clock["never"] / calls,
            "identical": got["always"] == got["never"],
            "mann_whitney_abs_diff": abs(got["always"][0][1] - u)}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rows", type=int, nargs="*", default=list(SIZES))
    ap.add_argument("--calls", type=int, default=20, help="replicate scores per size")
    ap.add_argument("--seed", type=int, default=20261204)
    ap.add_argument("--scores", type=int, default=5,
                    help="scores per replicate in the memory measurement")
    ap.add_argument("--baseline", metavar="REV", help="also time concordances at this git "
                    "revision (e.g. main), alternated with the working tree's")
    ap.add_argument("--auc", action="store_true", help="also the binary AUC of the draws "
                    "(count_aucs), compiled against numpy, alternated")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    baseline = None if args.baseline is None else load_revision(args.baseline)
    rows = [run(n, args.calls, args.seed, baseline, args.scores) for n in args.rows]
    aucs = [run_auc(n, args.calls, args.seed) for n in args.rows] if args.auc else []
    if args.json:
        print(json.dumps(rows + aucs, indent=1))
        return
    print("| rows | events | ms per call | numpy ms | compiled speed-up | identical | "
          "baseline ms | speed-up | identical | "
          "weighted pair sums ms (2 C) | equal | peak MB | baseline peak MB | kept MB | "
          "baseline kept MB |")
    print("|---:|---:|---:|---:|---:|:---:|---:|---:|:---:|---:|:---:|---:|---:|---:|---:|")
    for r in rows:
        print(f"| {r['rows']:,} | {r['events']:,} | {r['new_ms_per_call']:.1f} | "
              f"{r['numpy_ms_per_call']:.1f} | {r['compiled_speedup']:.2f} | "
              f"{r['compiled_identical']} | "
              f"{r.get('baseline_ms_per_call', float('nan')):.1f} | "
              f"{r.get('speedup', float('nan')):.2f} | {r.get('identical_to_baseline', '–')} | "
              f"{r['weighted_pair_sums_ms']:.0f} | {r['equal_to_weighted_pair_sums']} | "
              f"{r['peak_mb']:.1f} | {r.get('baseline_peak_mb', float('nan')):.1f} | "
              f"{r['kept_mb']:.1f} | {r.get('baseline_kept_mb', float('nan')):.1f} |")

    if aucs:
        print("\n| rows | AUC compiled ms | AUC numpy ms | speed-up | identical | "
              "abs diff to Mann-Whitney U |")
        print("|---:|---:|---:|---:|:---:|---:|")
        for a in aucs:
            print(f"| {a['rows']:,} | {a['compiled_ms']:.1f} | {a['numpy_ms']:.1f} | "
                  f"{a['numpy_ms'] / a['compiled_ms']:.2f} | {a['identical']} | "
                  f"{a['mann_whitney_abs_diff']:.1e} |")


if __name__ == "__main__":
    main()
