"""The sums the GLM resampling tables read from each replicate's coefficients, against
statsmodels:

- ``standardise.glm_means`` (row by row below ``BLOCKED_MEANS_FROM_ROWS``; from it row
  blocks with one exponential for every exposure value, weights dense or compact) equals the frequency-weighted mean of statsmodels' predictions with the
  exposure set to each value (logistic; Poisson with person-time; linear), including the
  direct form when exp(-shift) overflows;
- ``kept.glm_logliks`` (row blocks, dense or compact weights) of a logistic and a Poisson
  model equals statsmodels' log-likelihood with ``freq_weights``;
- ``decision_resampling.logistic_slope`` (sums over blocks of rows) equals statsmodels' Logit
  slope of the outcome on the linear predictor.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import special

from unbin.models.base import Outcome
from unbin.models.weighted import Replicates, resample_counts
from unbin.questions import decision_resampling
from unbin.questions.decision_resampling import logistic_slope
from unbin.questions.kept import glm_logliks
from unbin.refit import standardise
from unbin.refit.standardise import glm_means


def _data(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = np.column_stack([rng.normal(size=n), rng.normal(size=n) ** 2,
                         rng.integers(0, 2, n)]).astype(float)  # exposure: first 2 columns
    return X, rng.uniform(0.5, 2.0, n)


@pytest.mark.parametrize("family", ["binary", "count", "continuous"])
def test_glm_means_equal_statsmodels_predictions(family: str,
                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    n = 5000
    X, t = _data(n, 3)
    rng = np.random.default_rng(4)
    eta = -1.0 + 0.4 * X[:, 0] + 0.1 * X[:, 1] - 0.3 * X[:, 2]
    design = sm.add_constant(X)
    at = [np.array([-1.0, 1.0]), np.array([1.5, 2.25])]
    counts = resample_counts(rng, n, 3)
    coefs, refs = [], []
    for b in range(3):
        w = counts[b].astype(float)
        if family == "binary":
            y = (rng.random(n) < special.expit(eta)).astype(float)
            res = sm.GLM(y, design, family=sm.families.Binomial(), freq_weights=w).fit()
        elif family == "count":
            y = rng.poisson(t * np.exp(eta)).astype(float)
            res = sm.GLM(y, design, family=sm.families.Poisson(), offset=np.log(t),
                         freq_weights=w).fit()
        else:
            y = eta + rng.normal(size=n)
            res = sm.WLS(y, design, weights=w).fit()
        coefs.append(np.asarray(res.params))
        ref = []
        for a in at:
            Xa = design.copy()
            Xa[:, 1:3] = a
            if family == "count":  # events per unit of person-time, each row's own follow-up
                mu = np.asarray(res.predict(Xa, offset=np.log(t)))
                ref.append(float(w @ mu / (w @ t)))
            else:
                ref.append(float(np.average(np.asarray(res.predict(Xa)), weights=w)))
        refs.append(ref)
    coef = np.array(coefs)
    offset = np.log(t) if family == "count" else None
    rowwise = glm_means(family, X, 2, coef, at, counts.astype(float), offset)
    np.testing.assert_allclose(rowwise, np.array(refs), rtol=1e-12)
    monkeypatch.setattr(standardise, "BLOCKED_MEANS_FROM_ROWS", 0)  # the large samples' form
    dense = glm_means(family, X, 2, coef, at, counts.astype(float), offset)
    compact = glm_means(family, X, 2, coef, at, Replicates(counts), offset)
    np.testing.assert_allclose(dense, np.array(refs), rtol=1e-12)
    np.testing.assert_allclose(compact, np.array(refs), rtol=1e-12)
    if family != "continuous":  # (dense linear weights keep the row-by-row form)
        np.testing.assert_array_equal(compact, dense)


def test_glm_means_direct_form_when_the_factor_overflows(
        monkeypatch: pytest.MonkeyPatch) -> None:
    """A shift beyond exp's range (exp(-shift) = 0) takes expit(rest + shift) directly."""
    monkeypatch.setattr(standardise, "BLOCKED_MEANS_FROM_ROWS", 0)
    n = 400
    X, _ = _data(n, 5)
    coef = np.array([[-0.5, 900.0, 0.0, 0.2], [-0.5, 0.3, 0.1, 0.2], [np.nan] * 4])
    at = [np.array([1.0, 1.0]), np.array([-1.0, 1.0])]
    got = glm_means("binary", X, 2, coef, at, np.ones((3, n)))
    eta = coef[:, :1] + X[:, 2] * coef[:, 3:4]
    ref = np.array([[np.mean(special.expit(eta[c] + coef[c, 1:3] @ a)) for a in at]
                    for c in range(2)])
    np.testing.assert_allclose(got[:2], ref, rtol=1e-14)
    assert np.all(np.isnan(got[2]))


@pytest.mark.parametrize("mode", ["never", "always"])
@pytest.mark.parametrize("family", ["binary", "count"])
def test_logliks_equal_statsmodels(family: str, mode: str,
                                   monkeypatch: pytest.MonkeyPatch) -> None:
    """Each replicate's frequency-weighted log-likelihood, blocks of rows summed, against
    statsmodels' GLM llf with ``freq_weights`` (Poisson: its log y! constant added back), on
    dense and on compact weights; numpy's terms and the compiled pass
    (``compiled.glm_loglik``) both forced."""
    monkeypatch.setenv("UNBIN_COMPILED", mode)
    n = 3000
    X, t = _data(n, 6)
    rng = np.random.default_rng(7)
    eta = -0.5 + X[:, 0]
    design = sm.add_constant(X)
    counts = resample_counts(rng, n, 2)
    if family == "binary":
        y = (rng.random(n) < special.expit(eta)).astype(float)
        o = Outcome("binary", y)
    else:
        y = rng.poisson(t * np.exp(eta)).astype(float)
        o = Outcome("count", y, offset=np.log(t))
    coef, ref = [], []
    for w in counts.astype(float):
        res = (sm.GLM(y, design, family=sm.families.Binomial(), freq_weights=w).fit()
               if family == "binary" else
               sm.GLM(y, design, family=sm.families.Poisson(), offset=np.log(t),
                      freq_weights=w).fit())
        coef.append(np.asarray(res.params))
        ref.append(res.llf + (w @ special.gammaln(y + 1) if family == "count" else 0.0))
    got = glm_logliks(family, X, np.array(coef), o, counts.astype(float))
    np.testing.assert_allclose(got, ref, rtol=1e-12)
    np.testing.assert_array_equal(glm_logliks(family, X, np.array(coef), o, Replicates(counts)),
                                  got)


@pytest.mark.parametrize("mode", ["never", "always"])
@pytest.mark.parametrize("n", [1000, 3 * decision_resampling._SLOPE_ROWS + 17])
def test_logistic_slope_equals_statsmodels(n: int, mode: str,
                                           monkeypatch: pytest.MonkeyPatch) -> None:
    # source: statsmodels' Logit of y on [1, z]; both paths forced (the block sums by numpy
    # and by unbin.models.compiled.slope_sums)
    monkeypatch.setenv("UNBIN_COMPILED", mode)
    rng = np.random.default_rng(9)
    z = rng.normal(size=n) - 1.0
    y = (rng.random(n) < special.expit(0.2 + 0.8 * z)).astype(float)
    ref = sm.Logit(y, sm.add_constant(z)).fit(disp=0, tol=1e-12).params[1]
    assert logistic_slope(y, z) == pytest.approx(ref, rel=1e-10)


@pytest.mark.parametrize("family", ["binary", "count"])
def test_compiled_logliks_equal_numpy_sums(family: str,
                                           monkeypatch: pytest.MonkeyPatch) -> None:
    """The compiled log-likelihood pass (``compiled.glm_loglik``: rows a replicate did not draw
    skipped, sums in row order) against numpy's terms summed by ``einsum`` over several row
    blocks, with and without sampling weights scaling the draw counts; a replicate with NaN
    coefficients stays NaN."""
    n = 9000
    X, t = _data(n, 16)
    rng = np.random.default_rng(17)
    eta = -0.5 + X[:, 0]
    if family == "binary":
        o = Outcome("binary", (rng.random(n) < special.expit(eta)).astype(float))
    else:
        o = Outcome("count", rng.poisson(t * np.exp(eta)).astype(float), offset=np.log(t))
    coef = np.column_stack([np.full(4, -0.5), 1.0 + 0.1 * rng.normal(size=(4, 3))])
    coef[2] = np.nan
    counts = resample_counts(rng, n, 4)
    for scale in (None, rng.uniform(0.5, 2.0, n)):
        R = Replicates(counts, scale)
        got = {}
        for mode in ("never", "always"):
            monkeypatch.setenv("UNBIN_COMPILED", mode)
            got[mode] = glm_logliks(family, X, coef, o, R)
        assert np.isnan(got["always"][2]) and np.isnan(got["never"][2])
        np.testing.assert_allclose(got["always"], got["never"], rtol=1e-13)


@pytest.mark.parametrize("logistic", [True, False])
def test_compiled_loglik_terms_are_numpys(logistic: bool) -> None:
    """Each term of the compiled pass, one cell at a time, equals numpy's term bit for bit
    (``y eta - (log1p(exp(-|eta|)) + max(eta, 0))``, Poisson ``y eta - exp(min(eta, 700))``),
    far into both tails; a cell of weight 0 adds nothing."""
    from unbin.models.compiled.glm_loglik import loglik_sums
    from unbin.questions.kept import _log1p_exp

    eta = np.concatenate([np.linspace(-750, 750, 3001), [0.0, -0.0, 1e-300, 36.7, -36.7]])
    y = (np.arange(eta.size) % 3 == 0).astype(float)
    ref = y * eta - (_log1p_exp(eta) if logistic else np.exp(np.minimum(eta, 700.0)))
    got = np.empty_like(eta)
    ones = np.ones((1, 1), dtype=np.uint8)
    for i in range(eta.size):
        out = np.zeros(1)
        loglik_sums(eta[i:i + 1][None, :], y[i:i + 1], ones, 0, np.zeros(0), logistic, out)
        got[i] = out[0]
    np.testing.assert_array_equal(got, ref)
    out = np.zeros(1)
    loglik_sums(np.array([[3.0]]), np.ones(1), np.zeros((1, 1), dtype=np.uint8), 0,
                np.zeros(0), logistic, out)
    assert out[0] == 0.0
