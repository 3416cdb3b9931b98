"""The confounding bootstrap's warm-started refits of the competing causes' Cox models equal the
full Newton fits they replace (within 1e-9 on every number of the table), on a seeded
competing-risk sample with tied times (the design of ``benchmarks/checks/
competing_confounding.py``)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from helpers import load_check
from unbin.data import analysis_sample
from unbin.models.cox import fit_cox, prepare_layout, refit_near
from unbin.questions import confounding
from unbin.refit.analysis import bare_refit
from unbin.spec import parse_spec

CHECK = load_check("competing_confounding")


def _table(frame: pd.DataFrame, bootstrap: int) -> pd.DataFrame:
    raw = {"study": "s", "cohorts": [{"name": "c", "path": "unused.csv"}],
           "groupings": {"x": {"quantiles": 3}, "z": {"quantiles": 3}},
           "analyses": [{"name": "a", "exposure": "x", "adjust": ["z"],
                         "outcome": {"type": "survival", "time": "T", "event": "E",
                                     "horizon": CHECK.HORIZON, "event_of_interest": 1,
                                     "competing": [2]}}],
           "resampling": {"bootstrap": bootstrap}, "seed": 5}
    spec = parse_spec(raw, base=Path("."))
    an = spec.analysis("a")
    return confounding.confounding_table(
        bare_refit(analysis_sample(frame, an, spec), an, spec, "c"), spec)


def test_warm_refits_of_the_competing_cause_give_the_full_fits_table(
        monkeypatch: pytest.MonkeyPatch) -> None:
    frame = CHECK.draw(300, np.random.default_rng(8))
    frame["T"] = np.ceil(frame["T"] * 20) / 20  # twentieths: tied event times
    used: list[bool] = []

    def counted(*args: Any, **kwargs: Any) -> Any:
        out = refit_near(*args, **kwargs)
        used.append(out is not None)
        return out

    monkeypatch.setattr(confounding, "refit_near", counted)
    warm = _table(frame, 20)
    assert sum(used) >= 0.8 * len(used) > 0, (sum(used), len(used))  # mostly the warm path
    monkeypatch.setattr(confounding, "refit_near", lambda *a, **k: None)  # full fits only
    full = _table(frame, 20)
    assert warm.shape == full.shape and list(warm.columns) == list(full.columns)
    for col in warm.columns:
        a, b = warm[col], full[col]
        if pd.api.types.is_float_dtype(a):
            np.testing.assert_allclose(a.to_numpy(float), b.to_numpy(float), rtol=0,
                                       atol=1e-9, err_msg=col)
        else:
            assert a.equals(b), col
    assert warm["bootstrap_ok"].min() >= 18


def test_a_warm_refit_is_the_maximum_a_tight_newton_fit_finds() -> None:
    """One bootstrap replicate's competing-cause model: chord steps from the full-sample
    estimate at the tolerance the bootstrap uses against ``fit_cox`` from zero iterated to
    1e-13 (strata, delayed entry and ties)."""
    rng = np.random.default_rng(21)
    n = 500
    x = rng.normal(size=(n, 2))
    time = np.ceil(rng.exponential(1 / np.exp(x @ [0.5, -0.3])) * 8)
    entry = np.where(rng.uniform(size=n) < 0.3, np.floor(time * rng.uniform(size=n)), 0.0)
    event = rng.binomial(1, 0.6, n).astype(float)
    strata = rng.integers(0, 2, n)
    full = fit_cox(x, time, event, entry=entry, strata=strata)
    m = np.sort(rng.integers(0, n, n))
    lay = prepare_layout(time[m], event[m], entry=entry[m], strata=strata[m])
    warm = refit_near(x[m], lay, full.coef, tol=1e-11)
    cold = fit_cox(x[m], time[m], event[m], entry=entry[m], strata=strata[m], tol=1e-13)
    assert warm is not None and cold.converged
    np.testing.assert_allclose(warm, cold.coef, rtol=0, atol=1e-10)
