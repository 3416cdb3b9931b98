"""Type-I error of the information table's tests under their null hypotheses.

    python benchmarks/checks/nonlinearity.py                    # 2,000 replicates, JSON
    python benchmarks/checks/nonlinearity.py --replicates 400 --seed 7

Each replicate draws an invented sample of n = 300 (an exposure x ~ N(0, 1) with legacy cuts at
-0.43 and 0.43, about its tertiles), runs unbin's own path on it (``refit_analysis`` then
``information_table``) and records whether the test rejects at the 5% level:

- ``nonlinearity`` (test spline vs linear): the truth is linear in x, so the test should reject
  5% of replicates.
- ``added`` (test spline beyond the legacy groups): the truth is a step function at the legacy
  cuts — the groups explain everything — so the test should reject 5% of replicates.
- ``nonlinearity_aic_spline`` (for comparison, not a test unbin reports): the same likelihood
  ratio built on the spline whose knot count (3, 4 or 5) AIC chose on the same data. It rejects
  too often because the data chose the model.

Families: ``binary`` (logistic; logit P = -0.5 + 0.5 x, or steps 0.5 and 1.0 at the cuts) and
``continuous`` (linear; the same linear predictor plus N(0, 1) errors). Every rate comes with
its Monte-Carlo standard error sqrt(0.05 * 0.95 / replicates) under the nominal level and the
two-sided band 0.05 +- 3 SE; ``within_band`` says whether the rate lies inside it.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

try:
    import unbin  # noqa: F401
except ImportError:  # run from a checkout without installing
    sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "src"))

from unbin.data import analysis_sample  # noqa: E402
from unbin.questions.information import information_table  # noqa: E402
from unbin.refit.analysis import refit_analysis  # noqa: E402
from unbin.spec import Spec, parse_spec  # noqa: E402

ALPHA = 0.05
N = 300
CUTS = (-0.43, 0.43)
FAMILIES = ("binary", "continuous")
SCENARIOS = ("linear", "step")  # the null of the nonlinearity test, of the added test


def _spec(family: str) -> Spec:
    outcome = ({"type": "binary", "event": "y"} if family == "binary"
               else {"type": "continuous", "value": "y"})
    raw = {"study": "typeone", "cohorts": [{"name": "sim", "path": "unused.parquet"}],
           "groupings": {"x": {"cuts": list(CUTS)}},
           "analyses": [{"name": "a", "outcome": outcome, "exposure": "x"}],
           "continuous": {"forms": ["linear", "spline"], "spline_knots": [3, 4, 5], "test_knots": 4}}
    return parse_spec(raw, base=Path("."))


def draw(rng: np.random.Generator, family: str, truth: str, n: int = N) -> pd.DataFrame:
    """One invented sample: linear truth or a step function at the legacy cuts."""
    x = rng.normal(size=n)
    if truth == "linear":
        eta = -0.5 + 0.5 * x
    else:
        eta = -0.5 + 0.5 * (x >= CUTS[0]) + 0.5 * (x >= CUTS[1])
    if family == "binary":
        y = (rng.random(n) < 1.0 / (1.0 + np.exp(-eta))).astype(float)
    else:
        y = eta + rng.normal(size=n)
    return pd.DataFrame({"x": x, "y": y})


def p_values(frame: pd.DataFrame, spec: Spec) -> dict[str, float]:
    """The information table's p-values (legacy adjustment coding) for one sample, and the
    nonlinearity p-value the AIC-chosen spline would give."""
    from scipy import stats

    a = spec.analyses[0]
    r = refit_analysis(analysis_sample(frame, a, spec), a, spec, "sim")
    info = information_table(r)
    row = info[info["adjustment"] == "legacy"].iloc[0]
    lr_aic = max(float(row["lr_spline"] - row["lr_linear"]), 0.0)
    return {"nonlinearity": float(row["nonlinearity_p"]), "added": float(row["added_p"]),
            "nonlinearity_aic_spline": float(stats.chi2.sf(lr_aic, int(row["df_spline"]) - 1))}


def _rate(rejections: int, valid: int, replicates: int) -> dict[str, Any]:
    se = float(np.sqrt(ALPHA * (1 - ALPHA) / max(valid, 1)))
    rate = rejections / valid if valid else float("nan")
    return {"rejections": rejections, "valid": valid, "replicates": replicates,
            "type1_error": rate, "mc_se": se, "band": [ALPHA - 3 * se, ALPHA + 3 * se],
            "within_band": bool(valid and abs(rate - ALPHA) <= 3 * se)}


def run(replicates: int = 2000, seed: int = 20240, families: tuple[str, ...] = FAMILIES,
        ) -> dict[str, Any]:
    """Type-I error of the nonlinearity test (linear truth) and of the added test (step truth
    at the legacy cuts), per family, at the 5% level, with Monte-Carlo standard errors."""
    streams = np.random.SeedSequence(seed).spawn(len(families) * len(SCENARIOS))
    results: list[dict[str, Any]] = []
    for i, family in enumerate(families):
        spec = _spec(family)
        for j, truth in enumerate(SCENARIOS):
            rng = np.random.default_rng(streams[i * len(SCENARIOS) + j])
            tests = (("nonlinearity", "nonlinearity_aic_spline") if truth == "linear"
                     else ("added",))
            p = np.empty((replicates, len(tests)))
            for rep in range(replicates):
                found = p_values(draw(rng, family, truth), spec)
                p[rep] = [found[t] for t in tests]
            for k, test in enumerate(tests):
                ok = np.isfinite(p[:, k])
                results.append({"family": family, "test": test, "truth": truth,
                                **_rate(int((p[ok, k] < ALPHA).sum()), int(ok.sum()),
                                        replicates)})
    return {"check": "nonlinearity", "alpha": ALPHA, "n": N, "replicates": replicates,
            "seed": seed, "legacy_cuts": list(CUTS), "test_knots": 4,
            "aic_knot_candidates": [3, 4, 5], "results": results}


if __name__ == "__main__":
    from _command import command_line  # run as a script: this folder is on sys.path

    command_line(run, __doc__, replicates=2000, seed=20240)
