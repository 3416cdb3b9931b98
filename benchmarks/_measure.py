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


def timed(fn: Callable[[], Any]) -> tuple[float, Any]:
    start = time.perf_counter()
    out = fn()
    return time.perf_counter() - start, out


def fmt(value: Any, spec: str) -> str:
    """A markdown cell: a dash for a value that was not measured."""
    return "–" if value is None else format(value, spec)
