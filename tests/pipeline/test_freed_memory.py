"""Jobs keep freed arrays in the C library's heap, so a large temporary allocated again is not
mapped fresh from the kernel (glibc; read in a child process from glibc's own accounting,
``mallinfo2``, never from time)."""

from __future__ import annotations

import json
import os
import platform
import subprocess
import sys

import pytest

CHILD = r"""
import ctypes, json, sys
import numpy as np
from unbin.pipeline.memory import keep_freed_memory

class Info(ctypes.Structure):  # glibc's struct mallinfo2 (malloc.h), ten size_t fields
    _fields_ = [(n, ctypes.c_size_t) for n in ("arena", "ordblks", "smblks", "hblks", "hblkhd",
                "usmblks", "fsmblks", "uordblks", "fordblks", "keepcost")]

libc = ctypes.CDLL("libc.so.6")
libc.mallinfo2.restype = Info
applied = keep_freed_memory() if sys.argv[1] == "keep" else False
a = np.ones(10_000_000)          # 80 MB, above glibc's largest adaptive mmap threshold (32 MB)
b = a * 2.0                      # a temporary of the same size
mapped = libc.mallinfo2().hblkhd  # bytes in blocks mapped from the kernel one by one
del b
kept_free = libc.mallinfo2().fordblks  # freed bytes the heap keeps for reuse
print(json.dumps({"applied": applied, "mapped": mapped, "kept_free": kept_free}))
"""

glibc = pytest.mark.skipif(platform.system() != "Linux" or platform.libc_ver()[0] != "glibc",
                           reason="mallopt thresholds are glibc's")


def _child(mode: str, **env: str) -> dict[str, int]:
    clean = {k: v for k, v in os.environ.items() if not k.startswith("MALLOC_")}
    proc = subprocess.run([sys.executable, "-c", CHILD, mode], capture_output=True, text=True,
                          env={**clean, **env}, check=True, timeout=120)
    return json.loads(proc.stdout)


@glibc
def test_freed_arrays_stay_in_the_heap_for_reuse() -> None:
    plain, kept = _child("plain"), _child("keep")
    assert kept["applied"] and not plain["applied"]
    # glibc's default: both 80 MB arrays mapped one by one, the freed one unmapped at once
    assert plain["mapped"] >= 2 * 80_000_000
    assert plain["kept_free"] < 80_000_000
    # kept: served from the heap, and the freed temporary stays there for the next one
    assert kept["mapped"] < 80_000_000
    assert kept["kept_free"] >= 80_000_000


@glibc
def test_the_users_own_malloc_settings_win() -> None:
    out = _child("keep", MALLOC_MMAP_THRESHOLD_="131072")
    assert not out["applied"]
