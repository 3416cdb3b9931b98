"""Measuring helpers shared by the benchmark scripts (time, tracemalloc peak, table cells)."""

from __future__ import annotations

import time
import tracemalloc
from collections.abc import Callable
from typing import Any


def peak_mib(fn: Callable[[], Any]) -> float:
    """Peak of Python-tracked allocations while ``fn`` runs, in MiB (inputs excluded)."""
    tracemalloc.start()
    tracemalloc.reset_peak()
    try:
        fn()
        return tracemalloc.get_traced_memory()[1] / 2**20
    finally:
        tracemalloc.stop()


def timed(fn: Callable[[], Any], clock: str = "wall") -> tuple[float, Any]:
    """Seconds ``fn`` took and its result. ``clock="cpu"``: this process' CPU time (on a
    shared machine less disturbed by other work than the wall clock; with one BLAS thread it
    is the time the computation needs)."""
    now = time.process_time if clock == "cpu" else time.perf_counter
    start = now()
    out = fn()
    return now() - start, out


def fmt(value: Any, spec: str) -> str:
    """A markdown cell: a dash for a value that was not measured."""
    return "–" if value is None else format(value, spec)
