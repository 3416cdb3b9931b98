"""Operating characteristics of unbin's tests and intervals, by seeded simulation.

    python benchmarks/validity.py                     # every check at its default size, a table
    python benchmarks/validity.py --json              # the same as JSON (one object)
    python benchmarks/validity.py --only nonlinearity --replicates 500

Each check lives in ``benchmarks/checks/<name>.py`` and exposes ``run(replicates, seed) ->
dict``: the simulation's design, the known truth and the observed rate (a type-I error, a
coverage, or the largest disagreement with a brute-force computation) with its Monte-Carlo
standard error. The README's "How the statistics were checked" table comes from this script.
The unit tests run smaller versions of the same simulations with two-sided Monte-Carlo bands;
this script is never part of the test suite.
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import importlib.util  # noqa: E402
import json  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402
from types import ModuleType  # noqa: E402
from typing import Any  # noqa: E402

CHECKS_DIR = Path(__file__).resolve().parent / "checks"
# Replicates per check by default: 2,000 (a Monte-Carlo SE of 0.005 at a 5% rate), except the
# confounding check (1,000), each of whose replicates is itself a 200-replicate bootstrap.
DEFAULT_REPLICATES = 2000
REPLICATES = {"confounding": 1000, "fine_gray": 1000, "competing_confounding": 500}


def available() -> list[str]:
    return sorted(p.stem for p in CHECKS_DIR.glob("*.py") if not p.stem.startswith("_"))


def load(name: str) -> ModuleType:
    path = CHECKS_DIR / f"{name}.py"
    spec = importlib.util.spec_from_file_location(f"unbin_checks_{name}", path)
    if spec is None or spec.loader is None:
        raise SystemExit(f"cannot load the check {name!r} from {path}")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def run_all(names: list[str], replicates: int | None, seed: int) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for name in names:
        start = time.perf_counter()
        result = load(name).run(replicates or REPLICATES.get(name, DEFAULT_REPLICATES), seed)
        result["seconds"] = round(time.perf_counter() - start, 1)
        out[name] = result
    return out


def _flatten(prefix: str, value: Any) -> list[tuple[str, Any]]:
    if isinstance(value, dict):
        rows: list[tuple[str, Any]] = []
        for k, v in value.items():
            rows += _flatten(f"{prefix}.{k}" if prefix else str(k), v)
        return rows
    return [(prefix, value)]


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--replicates", type=int, default=None,
                        help="replicates per simulation (default 2000; 1000 for confounding and fine_gray)")
    parser.add_argument("--seed", type=int, default=20261203, help="base seed")
    parser.add_argument("--only", action="append", choices=available(),
                        help="run only this check (repeatable)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    args = parser.parse_args(argv)
    names = args.only or available()
    results = run_all(names, args.replicates, args.seed)
    if args.json:
        print(json.dumps(results, indent=2, sort_keys=True, default=float))
        return
    for name, result in results.items():
        print(f"## {name}")
        for key, value in _flatten("", result):
            shown = f"{value:.4g}" if isinstance(value, float) else value
            print(f"  {key}: {shown}")


if __name__ == "__main__":
    main()
