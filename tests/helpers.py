"""Helpers shared by test modules (imported as ``helpers``; tests/ is on the import path)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from unbin.data import analysis_sample
from unbin.refit.analysis import Refit
from unbin.refit.analysis import bare_refit as _bare
from unbin.spec import Spec, parse_spec


def bare_refit(df: pd.DataFrame, raw: dict[str, Any], name: str = "a") -> tuple[Refit, Spec]:
    """A Refit of one analysis without any fits, for questions that fit their own models."""
    spec = parse_spec(raw, base=Path("."))
    a = spec.analysis(name)
    return _bare(analysis_sample(df, a, spec), a, spec, "sim"), spec


def keep_analyses(raw: dict[str, Any], *names: str) -> dict[str, Any]:
    """The demo spec cut down to the named analyses, with the published studies of the others
    left out too (a study must name an analysis of the spec)."""
    raw["analyses"] = [a for a in raw["analyses"] if a["name"] in names]
    published = raw.get("published")
    if published:
        studies = [s for s in published.get("studies", []) if s.get("analysis") in names]
        if studies:
            raw["published"] = {**published, "studies": studies}
        else:
            raw.pop("published")
    return raw


def level_without_reference_rows() -> tuple[pd.DataFrame, dict[str, Any]]:
    """x rises steeply with the modifier w: in the level w >= 50 no row lies in the legacy
    reference group x < 60, so that level has no reference value."""
    rng = np.random.default_rng(45)
    n = 1500
    w = rng.uniform(0, 100, n)
    x = 40 + 0.6 * w + rng.normal(0, 3, n)
    lp = -1 + 0.04 * (x - 50) + 0.5 * (w >= 50)
    frame = pd.DataFrame({"x": x, "w": w, "z": rng.normal(size=n),
                          "y": (rng.random(n) < 1 / (1 + np.exp(-lp))).astype(int)})
    assert not ((w >= 50) & (x < 60)).any()
    raw = {"study": "sim", "cohorts": [{"name": "sim", "path": "sim.parquet"}],
           "groupings": {"x": {"cuts": [60]}, "w": {"cuts": [50]}},
           "analyses": [{"name": "a", "outcome": {"type": "binary", "event": "y"},
                         "exposure": "x", "adjust": ["z"], "by": "w",
                         "continuous": {"forms": ["linear"], "grid_points": 10}}]}
    return frame, raw


def load_check(name: str) -> Any:
    """``benchmarks/checks/<name>.py``, imported from its path (the folder is not a package), so
    that a test runs the same simulation as the check script."""
    import importlib.util

    path = Path(__file__).resolve().parents[1] / "benchmarks" / "checks" / f"{name}.py"
    spec = importlib.util.spec_from_file_location(f"unbin_check_{name}", path)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def brute_pair_c(t: np.ndarray, s: np.ndarray, e: np.ndarray, c: np.ndarray | None = None,
                 entry: np.ndarray | None = None, strata: np.ndarray | None = None) -> float:
    """Harrell's C by counting every pair by hand (independent of the engine): i an event, j in
    i's stratum with entry_j < t_i that outlived i (t_j > t_i, or t_j = t_i censored); the pair
    counts c_i c_j (all 1 without ``c``), a higher score of i 1, a tied score 1/2. A row's
    copies never pair (two events at one time, or no event)."""
    e = np.asarray(e, dtype=bool)
    c = np.ones(t.size) if c is None else np.asarray(c)
    entry = np.full(t.size, -np.inf) if entry is None else entry
    strata = np.zeros(t.size) if strata is None else strata
    num = den = 0.0
    for i in np.flatnonzero(e & (c > 0)):
        ok = (strata == strata[i]) & ((t > t[i]) | ((t == t[i]) & ~e)) & (entry < t[i])
        den += c[i] * c[ok].sum()
        num += c[i] * (c[ok] * ((s[ok] < s[i]) + 0.5 * (s[ok] == s[i]))).sum()
    return num / den if den else float("nan")


def tied_survival_design(rng: np.random.Generator, n: int, n_times: int, n_scores: int,
                         n_strata: int) -> tuple[np.ndarray, ...]:
    """Times, scores, events, entries and strata with ties everywhere: whole times
    1..n_times, scores 0..n_scores-1, half the rows entering late (some exactly at an event
    time: entry_j = t_i, j not yet at risk; -1 = from the start)."""
    t = rng.integers(1, n_times + 1, n).astype(float)
    e = rng.random(n) < rng.uniform(0.2, 0.9)
    s = rng.integers(0, n_scores, n).astype(float)
    strata = rng.integers(0, n_strata, n)
    entry = np.where(rng.random(n) < 0.5, t - rng.integers(1, n_times + 1, n), -1.0)
    return t, s, e, entry, strata


# An invented clinic's sodium, its square, age, sex and two of three sites (the GLM engine's
# registry-size tests); SODIUM_TRUTH: intercept, then the columns' coefficients.
SODIUM_NAMES = ("sodium", "sodium_sq", "age", "female", "site_b", "site_c")
SODIUM_TRUTH = np.array([-2.0, -0.05, 0.02, 0.015, -0.2, 0.1, -0.15])


def sodium_design(seed: int, n: int) -> np.ndarray:
    """n rows of the columns SODIUM_NAMES, seeded."""
    rng = np.random.default_rng(seed)
    age = 60 + 12 * rng.normal(size=n)
    sodium = 139 + 3.5 * rng.normal(size=n)
    female = (rng.random(n) < 0.5).astype(float)
    site = rng.integers(0, 3, n)
    return np.column_stack([sodium, (sodium - 139) ** 2, age, female,
                            (site == 1).astype(float), (site == 2).astype(float)])


def lifelines_on_expansion(X: np.ndarray, o: Any, cause: np.ndarray,
                           names: tuple[str, ...]) -> Any:
    """lifelines' CoxPHFitter (Efron ties, case weights, delayed entry, strata; its tightest
    tolerances) on the Fine–Gray counting-process expansion of the outcome ``o`` (Geskus 2011,
    ``unbin.models.competing.fine_gray_data``): the outside reference of the Fine–Gray fits.
    robust=True only changes lifelines' variance (its warning about non-integer weights is
    about the variance), not the coefficients or the likelihood."""
    from lifelines import CoxPHFitter

    from unbin.models.competing import fine_gray_data

    d = fine_gray_data(o.time, cause, 1, entry=o.entry, weights=o.weights)
    frame = pd.DataFrame(d.take(X), columns=list(names)).assign(
        start=d.start, stop=d.stop, event=d.event, w=d.weight)
    strata = None
    if o.strata is not None:
        frame["s"] = np.asarray(o.strata)[d.person]
        strata = ["s"]
    return CoxPHFitter().fit(frame, "stop", "event", weights_col="w", entry_col="start",
                             strata=strata, robust=True,
                             fit_options={"precision": 1e-14, "r_precision": 1e-16})


def assert_same_fields(got: Any, want: Any) -> None:
    """Two dataclass instances field by field, arrays bit for bit and of the same dtype."""
    import dataclasses

    for f in dataclasses.fields(want):
        a, b = getattr(got, f.name), getattr(want, f.name)
        if isinstance(b, np.ndarray):
            assert a.dtype == b.dtype and np.array_equal(a, b), f.name
        else:
            assert a == b, f.name
