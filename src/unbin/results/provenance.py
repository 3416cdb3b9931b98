"""Provenance carried by every parquet file: versions, inputs (SHA-256, rows), spec digest, seed.
No timestamps: the same inputs give byte-identical results."""

from __future__ import annotations

from functools import cache
from importlib import metadata
from typing import Any

from .. import __version__

DEPENDENCIES = ("numpy", "pandas", "scipy", "statsmodels", "lifelines", "pyarrow", "snakemake")
METADATA_KEY = b"unbin"


def versions() -> dict[str, str]:
    return dict(_versions())


@cache
def _versions() -> tuple[tuple[str, str], ...]:
    """Looked up once per process (each lookup scans the installed packages' metadata)."""
    out = {"unbin": __version__}
    for dep in DEPENDENCIES:
        try:
            out[dep] = metadata.version(dep)
        except metadata.PackageNotFoundError:
            out[dep] = "not installed"
    return tuple(out.items())


def provenance(inputs: list[dict[str, Any]], spec_digest: str, seed: int, table: str,
               study: str) -> dict[str, Any]:
    return {
        "table": table,
        "study": study,
        "versions": versions(),
        "inputs": sorted(inputs, key=lambda d: (d.get("cohort", ""), d.get("path", ""))),
        "spec_digest": spec_digest,
        "seed": seed,
    }
