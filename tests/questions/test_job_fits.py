"""Full-sample fits shared by a resampling job's tables (``unbin.questions.job_fits``): the
three resampling tables that fit designs, built one after another on one ``Refit`` as the job
builds them, give the same tables as each built on a fresh ``Refit`` (no fit shared), while a
design met again is fitted once; a kept fit equals statsmodels' fit of the design."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from helpers import bare_refit
from unbin.questions import job_fits
from unbin.questions.confounding import confounding_table
from unbin.questions.decision_resampling import decision_resampling_table
from unbin.questions.kept import information_bootstrap_table
from unbin.refit.analysis import design

TABLES = (confounding_table, information_bootstrap_table, decision_resampling_table)


def _raw(outcome: dict[str, Any]) -> dict[str, Any]:
    return {
        "study": "sim", "cohorts": [{"name": "sim", "path": "sim.parquet"}],
        "groupings": {"x": {"cuts": [-0.5, 0.5]}, "z": {"cuts": [0.0]}},
        "analyses": [{"name": "a", "outcome": outcome, "exposure": "x", "adjust": ["z"]}],
        "continuous": {"forms": ["linear", "spline"], "spline_knots": [3, 4]},
        "risk_thresholds": [0.2, 0.4],
        "resampling": {"bootstrap": 12, "permutations": 0}, "seed": 5,
    }


def _frame(n: int) -> pd.DataFrame:
    rng = np.random.default_rng(21)
    x = rng.normal(size=n)
    z = 0.5 * x + rng.normal(size=n)
    eta = -0.6 + 0.6 * x - 0.2 * x ** 2 + 0.5 * z
    return pd.DataFrame({"x": x, "z": z, "yb": rng.binomial(1, 1 / (1 + np.exp(-eta))),
                         "yn": rng.poisson(np.exp(0.5 * eta)), "pt": rng.uniform(0.5, 2.0, n),
                         "yc": eta + rng.normal(size=n)})


OUTCOMES = {"binary": {"type": "binary", "event": "yb"},
            "count": {"type": "count", "count": "yn", "persontime": "pt"},
            "continuous": {"type": "continuous", "value": "yc"}}


@pytest.mark.parametrize("family", list(OUTCOMES))
def test_shared_fits_leave_the_tables_as_they_were(family: str,
                                                   monkeypatch: pytest.MonkeyPatch) -> None:
    df, raw = _frame(600), _raw(OUTCOMES[family])
    fresh = [table(*bare_refit(df, raw)) for table in TABLES]
    calls: list[int] = []
    real = job_fits.fit

    def counted(*a: Any, **k: Any) -> Any:
        calls.append(1)
        return real(*a, **k)

    monkeypatch.setattr(job_fits, "fit", counted)
    r, spec = bare_refit(df, raw)
    shared = [table(r, spec) for table in TABLES]
    for a, b in zip(fresh, shared, strict=True):
        pd.testing.assert_frame_equal(a, b)
    kept = r.outcome.cache[job_fits._CACHE]
    assert len(calls) == len(kept)  # each design fitted once
    # the job met some designs in more than one table (legacy groups with legacy and with
    # continuous adjustment, linear with continuous adjustment)
    monkeypatch.setattr(job_fits, "fit", real)
    again = [table(*bare_refit(df, raw)) for table in TABLES]
    for a, b in zip(fresh, again, strict=True):
        pd.testing.assert_frame_equal(a, b)
    fits_per_table = []
    for table in TABLES:
        r1, spec1 = bare_refit(df, raw)
        table(r1, spec1)
        fits_per_table.append(len(r1.outcome.cache.get(job_fits._CACHE, {})))
    assert len(kept) < sum(fits_per_table)


def test_a_kept_fit_equals_statsmodels() -> None:
    # source: statsmodels' Binomial GLM of the design (intercept added)
    df = _frame(800)
    r, _ = bare_refit(df, _raw(OUTCOMES["binary"]))
    X, names = design(r.sample.frame, r.x, (r.legacy,), ())
    first = job_fits.job_fit(r, X, names, (r.legacy,), ())
    assert job_fits.job_fit(r, X, names, (r.legacy,), ()) is first
    assert first.linear_predictor is None
    ref = sm.GLM(r.outcome.y, sm.add_constant(X), family=sm.families.Binomial()).fit(tol=1e-12)
    np.testing.assert_allclose(first.coef, ref.params, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(first.loglik, ref.llf, rtol=1e-10)
