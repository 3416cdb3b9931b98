"""Compiled loops (numba, CPU only) for the registry-size kernels.

Each kernel lives in its own module in this package and imports numba when that module is
imported. Callers import a kernel module lazily, only when :func:`wanted` says the sample is
large enough, so small jobs (the demo, most tests) never pay numba's import (about 0.13 s) or a
first compilation. Kernels are ``@numba.njit(cache=True, nogil=True, error_model="numpy")`` functions on plain numpy
arrays, and every one is tested against the numpy path it stands in for and against an outside
reference (DEVELOPERS.md, "Compiled kernels").

``UNBIN_COMPILED`` chooses the path for tests and benchmarks: ``auto`` (the default: by size),
``always`` or ``never``. Any other value is an error, never ignored.
"""

from __future__ import annotations

import os

from unbin.errors import UnbinError

__all__ = ["MODES", "mode", "wanted"]

MODES = ("auto", "always", "never")


def mode() -> str:
    """The path the environment asks for: ``auto``, ``always`` or ``never``."""
    value = os.environ.get("UNBIN_COMPILED", "auto").strip().lower() or "auto"
    if value not in MODES:
        raise UnbinError(
            f"UNBIN_COMPILED={value!r} is not a known setting: use one of "
            f"{', '.join(MODES)} (auto, the default, uses the compiled kernels from a "
            "size threshold on)."
        )
    return value


def wanted(rows: int, from_rows: int) -> bool:
    """Whether a kernel on ``rows`` rows should run compiled (threshold ``from_rows``)."""
    chosen = mode()
    if chosen == "always":
        return True
    if chosen == "never":
        return False
    return rows >= from_rows
