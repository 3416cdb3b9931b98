"""Type-I error of unbin's interaction test (exposure spline x level of ``by``) under its null.

Each replicate simulates n rows with a main step of the modifier w at its legacy cut and NO
interaction (logit P(y) = -1 + 0.04 (x - 50) + 1.2 [w >= 50] + 0.3 z; x rises with w), then runs
the workflow's own functions: the analysis sample, the continuous adjustment terms (w enters as
the factor of its groups), the fixed-knot interaction spline and ``fit_level_model`` (the spline
with and without its level interactions, both with the level main effects). The rejection rate
at ``alpha`` estimates the type-I error; its Monte-Carlo SE is sqrt(rate (1 - rate) / R).

    python benchmarks/checks/interaction.py --replicates 2000 --seed 2026
"""

from __future__ import annotations

import math
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import special

from unbin.data import analysis_sample
from unbin.refit.analysis import adjustment_terms, bare_refit
from unbin.refit.interaction import fit_level_model, interaction_spline
from unbin.refit.modifier import levels_from_terms
from unbin.spec import parse_spec

ROWS = 1000
ALPHA = 0.05


def spec_dict() -> dict[str, Any]:
    return {
        "study": "interaction-null",
        "cohorts": [{"name": "sim", "path": "sim.parquet"}],
        "groupings": {"x": {"cuts": [60]}, "w": {"cuts": [50]}},
        "analyses": [{"name": "a", "outcome": {"type": "binary", "event": "y"}, "exposure": "x",
                      "adjust": ["z"], "by": "w", "continuous": {"forms": ["spline"]}}],
    }


def simulate(rng: np.random.Generator, n: int = ROWS) -> pd.DataFrame:
    w = rng.uniform(0, 100, n)
    x = 50 + 0.15 * (w - 50) + rng.normal(0, 10, n)
    z = rng.normal(0, 1, n)
    lp = -1 + 0.04 * (x - 50) + 1.2 * (w >= 50) + 0.3 * z
    y = (rng.random(n) < special.expit(lp)).astype(int)
    return pd.DataFrame({"x": x, "w": w, "z": z, "y": y})


def run(replicates: int, seed: int, n: int = ROWS, alpha: float = ALPHA) -> dict[str, Any]:
    """Rejection rate of the interaction test at ``alpha`` over ``replicates`` seeded null
    replicates of ``n`` rows (module docstring)."""
    with tempfile.TemporaryDirectory() as tmp:
        spec = parse_spec(spec_dict(), base=Path(tmp))
    a = spec.analyses[0]
    rejected = failed = 0
    lrs = []
    for child in np.random.SeedSequence(seed).spawn(replicates):
        frame = simulate(np.random.default_rng(child), n)
        sample = analysis_sample(frame, a, spec)
        r = bare_refit(sample, a, spec, "sim")
        adjust = adjustment_terms(sample.frame, a, spec, "continuous")
        levels = levels_from_terms(a.by, adjust, sample.frame, len(r.x))
        m = fit_level_model(r, interaction_spline(r), adjust, "continuous", levels)
        if not m.ok:
            failed += 1
            continue
        lrs.append(m.lr)
        rejected += m.p < alpha
    done = replicates - failed
    rate = rejected / done if done else float("nan")
    return {"check": "interaction test type-I error (spline x level, level main effects in both "
                     "models)", "replicates": replicates, "seed": seed, "n": n, "alpha": alpha,
            "df": 3, "type1_error": rate,
            "mc_se": math.sqrt(rate * (1 - rate) / done) if done else float("nan"),
            "mean_lr": float(np.mean(lrs)) if lrs else float("nan"), "failed": failed}


if __name__ == "__main__":
    from _command import command_line  # run as a script: this folder is on sys.path

    command_line(run, __doc__, replicates=2000, seed=2026)
