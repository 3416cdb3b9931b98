"""The command line every check shares when run on its own (``python benchmarks/checks/<name>.py``):
``--replicates`` and ``--seed``, the result printed as JSON. ``benchmarks/validity.py`` runs the
same ``run(replicates, seed)`` of every check with its own seed."""

from __future__ import annotations

import argparse
import json
from collections.abc import Callable
from typing import Any


def command_line(run: Callable[[int, int], dict[str, Any]], doc: str | None, *, replicates: int,
                 seed: int) -> None:
    ap = argparse.ArgumentParser(description=(doc or "").split("\n\n")[0])
    ap.add_argument("--replicates", type=int, default=replicates)
    ap.add_argument("--seed", type=int, default=seed)
    args = ap.parse_args()
    print(json.dumps(run(args.replicates, args.seed), indent=2))
