"""Bootstrap refits by the analysis' own fitter (unbin.models.drawn_refits): a negative binomial
(NB2) replicate is the NB2 fit of the drawn rows, checked against statsmodels' NegativeBinomial
on those rows repeated as often as drawn; and the confounding table of an NB2 analysis
resamples NB2 estimates."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from helpers import bare_refit
from unbin.models.base import Outcome
from unbin.models.drawn_refits import coefficients, drawn_fits, needs_own_fitter
from unbin.models.weighted import design_resample_replicates, resample_weights
from unbin.questions.confounding import confounding_table


def _counts(seed: int, n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 2))
    t = rng.uniform(0.5, 2.0, n)
    y = rng.poisson(np.exp(0.2 + 0.5 * x[:, 0] - 0.3 * x[:, 1]) * t * rng.gamma(2.0, 0.5, n))
    return x, y.astype(float), np.log(t)


def test_a_negative_binomial_replicate_is_the_nb2_fit_of_its_drawn_rows() -> None:
    # Reference library: statsmodels NegativeBinomial (NB2, log person-time offset) on the
    # drawn rows themselves, each repeated as often as it was drawn.
    X, y, off = _counts(1, 500)
    outcome = Outcome("count", y, offset=off, dispersion="negative-binomial")
    assert needs_own_fitter(outcome)
    assert not needs_own_fitter(Outcome("count", y, offset=off))
    W = resample_weights(np.random.default_rng(3), len(y), 3)
    fits = drawn_fits([X, X[:, :1]], outcome, W)
    coef = coefficients([f[0] for f in fits], 2)
    for b in range(3):
        m = np.repeat(np.arange(len(y)), W[b].astype(int))
        ref = sm.NegativeBinomial(y[m], sm.add_constant(X[m]), loglike_method="nb2",
                                  offset=off[m]).fit(disp=0, method="newton", maxiter=200,
                                                     tol=1e-12)
        np.testing.assert_allclose(coef[b], ref.params[:-1], rtol=1e-6, atol=1e-9)
        assert fits[b][0].extra["nb_alpha"] == pytest.approx(ref.params[-1], rel=1e-5)
        assert fits[b][0].loglik == pytest.approx(ref.llf, rel=1e-9)
        assert fits[b][1].coef.shape == (2,)


def test_frequency_weighted_individuals_are_drawn_as_their_counts() -> None:
    # With frequency weights and no cluster the replicate draws the N individuals the rows
    # stand for; the refit on (rows drawn, drawn counts as weights) equals statsmodels on the
    # individuals written out one per line.
    X, y, off = _counts(2, 200)
    w = np.random.default_rng(4).integers(1, 4, len(y)).astype(float)
    outcome = Outcome("count", y, offset=off, weights=w, dispersion="negative-binomial")
    R = design_resample_replicates(np.random.default_rng(5), outcome, 2)
    fits = drawn_fits([X], outcome, R)
    for b in range(2):
        counts = R.row(b).astype(int)
        m = np.repeat(np.arange(len(y)), counts)
        ref = sm.NegativeBinomial(y[m], sm.add_constant(X[m]), loglike_method="nb2",
                                  offset=off[m]).fit(disp=0, method="newton", maxiter=200,
                                                     tol=1e-12)
        np.testing.assert_allclose(fits[b][0].coef, ref.params[:-1], rtol=1e-6, atol=1e-9)


def test_the_confounding_table_of_a_negative_binomial_analysis_resamples_nb2(
        monkeypatch: pytest.MonkeyPatch) -> None:
    # The table's bootstrap limits come from NB2 refits (the refits above, on all 60
    # replicates): every row ok, each estimate inside its percentile limits (common practice
    # for a smooth statistic with 60 replicates).
    import unbin.questions.confounding as confounding

    seen: list[int] = []

    def spy(X: list[np.ndarray], outcome: Outcome, W: object) -> object:
        seen.append(len(W))  # type: ignore[arg-type]
        return drawn_fits(X, outcome, W)  # type: ignore[arg-type]

    monkeypatch.setattr(confounding, "drawn_fits", spy)
    rng = np.random.default_rng(9)
    n = 800
    z = rng.normal(size=n)
    x = 0.6 * z + rng.normal(size=n)
    t = rng.uniform(0.5, 2.0, n)
    y = rng.poisson(np.exp(-0.2 + 0.3 * x + 0.5 * z) * t * rng.gamma(2.0, 0.5, n))
    raw = {"study": "sim", "cohorts": [{"name": "c", "path": "unused.csv"}],
           "groupings": {"x": {"quantiles": 2}, "z": {"quantiles": 3}},
           "analyses": [{"name": "a", "exposure": "x", "adjust": ["z"],
                         "outcome": {"type": "count", "count": "y", "persontime": "t",
                                     "count_model": "negative-binomial"}}],
           "resampling": {"bootstrap": 60}, "seed": 4}
    r, spec = bare_refit(pd.DataFrame({"x": x, "z": z, "y": y, "t": t}), raw)
    tab = confounding_table(r, spec)
    assert (tab["status"] == "ok").all(), tab[["status", "message"]]
    assert seen == [60]
    rows = tab[tab["confounding_lower"].notna()]
    assert len(rows) > 0
    assert (rows["confounding_lower"] <= rows["confounding"]).all()
    assert (rows["confounding"] <= rows["confounding_upper"]).all()
