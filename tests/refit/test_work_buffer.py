"""The refit's fits write each design (``refit.analysis.design(..., work=)``) and the GLM
engine its standardised copy (``outcome.cache[models._glm.WORK]``) into reused buffers
(``WorkBuffer``): the same values as fresh arrays, so the same fits; and no fit result keeps a
view of a buffer (a later fit would overwrite it). Checked against fresh arrays (definition)
and statsmodels' GLM of the same designs."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import statsmodels.api as sm

from unbin.data import analysis_sample
from unbin.models import Outcome, fit
from unbin.models._glm import WORK, WorkBuffer
from unbin.refit.analysis import design, refit_analysis
from unbin.spec import parse_spec
from unbin.terms import LinearTerm, SplineTerm


def _data(n: int = 4000) -> pd.DataFrame:
    rng = np.random.default_rng(31)
    x = rng.normal(50, 10, n)
    age = rng.normal(60, 8, n)
    eta = -1 + 0.04 * (x - 50) + 0.0015 * (x - 50) ** 2 + 0.03 * (age - 60)
    y = (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(float)
    return pd.DataFrame({"x": x, "age": age, "y": y})


def test_buffered_designs_and_copies_give_the_fits_of_fresh_arrays() -> None:
    df = _data()
    x = df["x"].to_numpy()
    adjust = (SplineTerm.at_quantiles("age", df["age"].to_numpy(), 4),)
    forms = [(LinearTerm("x"),), (SplineTerm.at_quantiles("x", x, 5),), (LinearTerm("x"),)]
    out_fresh = Outcome("binary", df["y"].to_numpy(float))
    out_work = Outcome("binary", df["y"].to_numpy(float))
    out_work.cache[WORK] = WorkBuffer()
    work = WorkBuffer()
    results = []
    widest = 0
    for exposure in forms:
        X0, names = design(df, x, exposure, adjust)
        X1, names1 = design(df, x, exposure, adjust, {}, work)
        np.testing.assert_array_equal(X0, X1)
        assert names == names1
        widest = max(widest, X0.shape[1])
        a, b = fit("binary", X0, out_fresh, names), fit("binary", X1, out_work, names)
        np.testing.assert_array_equal(a.coef, b.coef)
        np.testing.assert_array_equal(a.cov, b.cov)
        assert a.loglik == b.loglik
        # reference library: statsmodels' logistic fit of the same design
        ref = sm.GLM(df["y"].to_numpy(), sm.add_constant(X0), family=sm.families.Binomial()
                     ).fit(tol=1e-12)
        np.testing.assert_allclose(b.coef, ref.params, rtol=1e-7, atol=1e-9)
        results.append((b, X0 @ b.coef[1:]))
    # the buffers were reused (the third design is smaller than the second) and no result
    # shares memory with them: every kept predictor is still its own design's
    for res, lp in results:
        assert res.linear_predictor is not None
        np.testing.assert_array_equal(res.linear_predictor, lp)
        assert not np.shares_memory(res.linear_predictor, work.take(len(x), widest))


def test_the_refit_drops_its_buffers_and_matches_statsmodels() -> None:
    df = _data()
    raw = {"study": "sim", "cohorts": [{"name": "c", "path": "unused.csv"}],
           "groupings": {"x": {"cuts": [45.0, 55.0]}, "age": {"cuts": [60.0]}},
           "analyses": [{"name": "a", "outcome": {"type": "binary", "event": "y"},
                         "exposure": "x", "adjust": ["age"]}]}
    spec = parse_spec(raw, base=Path("."))
    a = spec.analyses[0]
    r = refit_analysis(analysis_sample(df, a, spec), a, spec, "sim")
    assert WORK not in r.outcome.cache
    lin = r.get("linear", "legacy")
    assert lin is not None and lin.result.ok
    X = sm.add_constant(np.column_stack([df["x"], (df["age"] >= 60).astype(float)]))
    ref = sm.GLM(df["y"].to_numpy(), X, family=sm.families.Binomial()).fit(tol=1e-12)
    np.testing.assert_allclose(lin.result.coef, ref.params, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(lin.result.se(), ref.bse, rtol=1e-6)
