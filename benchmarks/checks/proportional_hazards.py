"""Type-I error and power of the proportional-hazards checks: the Grambsch-Therneau global test
(scaled Schoenfeld residuals, km time transform; unbin.models.cox.residuals) and the follow-up
window change test (episodes split at t = 1, one exposure block per window;
unbin.refit.windows).

Each replicate simulates n rows: x ~ N(0, 1), z binary, hazard 0.5 exp(b x + 0.4 z) with b = 0.5
up to t = 1 and b = ``late`` after (0.5: proportional hazards, the null; -0.5: the effect
reverses), delayed entry for a third of the rows (entry uniform on (0, 1)), censoring uniform on
(entry + 0.5, entry + 3). The rejection rates at ``alpha`` estimate the type-I error (null) and
the power (reversal); their Monte-Carlo SE is sqrt(rate (1 - rate) / R).

    python benchmarks/checks/proportional_hazards.py --replicates 2000 --seed 2026
"""

from __future__ import annotations

from typing import Any

import numpy as np

from unbin.models.cox import fit_cox, prepare_layout
from unbin.models.cox.residuals import ph_tests, schoenfeld, time_transform
from unbin.refit.windows import fit_windows

ROWS = 300
ALPHA = 0.05


def simulate(rng: np.random.Generator, n: int, late: float) -> dict[str, np.ndarray]:
    x = rng.normal(size=n)
    z = rng.integers(0, 2, n).astype(float)
    h1, h2 = 0.5 * np.exp(0.5 * x + 0.4 * z), 0.5 * np.exp(late * x + 0.4 * z)
    entry = np.where(rng.random(n) < 1 / 3, rng.uniform(0.0, 1.0, n), 0.0)
    H = np.where(entry < 1.0, h1 * entry, h1 + h2 * (entry - 1.0)) + rng.exponential(size=n)
    t = np.where(H < h1, H / h1, 1.0 + (H - h1) / h2)
    c = entry + rng.uniform(0.5, 3.0, n)
    return {"X": np.column_stack([x, z]), "time": np.minimum(t, c),
            "event": (t <= c).astype(float), "entry": entry}


def rates(replicates: int, seed: int, late: float, n: int, alpha: float) -> dict[str, Any]:
    hits = np.zeros(2)
    failed = 0
    for child in np.random.SeedSequence(seed).spawn(replicates):
        s = simulate(np.random.default_rng(child), n, late)
        L = prepare_layout(s["time"], s["event"], entry=s["entry"])
        fit = fit_cox(s["X"], None, None, layout=L)
        wf = fit_windows(s["X"][:, :1], s["X"][:, 1:], s["time"], s["event"], s["entry"], None,
                         None, [1.0])
        if not fit.converged or wf.message:
            failed += 1
            continue
        res = schoenfeld(s["X"], fit.coef, layout=L)
        _, glob = ph_tests(res, fit.cov, time_transform("km", res, s["time"], s["event"],
                                                           entry=s["entry"]))
        hits += [glob.p < alpha, wf.p < alpha]
    done = replicates - failed
    r = hits / done if done else np.full(2, np.nan)
    se = np.sqrt(r * (1 - r) / done) if done else np.full(2, np.nan)
    return {"global_ph_test": float(r[0]), "global_ph_test_mc_se": float(se[0]),
            "window_change_test": float(r[1]), "window_change_test_mc_se": float(se[1]),
            "failed": failed}


def run(replicates: int, seed: int, n: int = ROWS, alpha: float = ALPHA) -> dict[str, Any]:
    """Rejection rates under proportional hazards (type-I error) and under a reversing effect
    (power), ``replicates`` seeded replicates of ``n`` rows each (module docstring)."""
    power_reps = max(1, replicates // 4)
    return {"check": "proportional-hazards tests (Grambsch-Therneau global, km; follow-up "
                     "window change test, windows 0-1 and 1+)",
            "replicates": replicates, "seed": seed, "n": n, "alpha": alpha,
            "type1_error": rates(replicates, seed, 0.5, n, alpha),
            "power_replicates": power_reps,
            "power": rates(power_reps, seed + 1, -0.5, n, alpha)}


if __name__ == "__main__":
    from _command import command_line  # run as a script: this folder is on sys.path

    command_line(run, __doc__, replicates=2000, seed=2026)
