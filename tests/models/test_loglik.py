"""The log-likelihood at given coefficients (unbin.models.loglik, what D3 re-evaluates) against
statsmodels' ``loglike`` at the same coefficients and a brute-force Cox partial likelihood."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from unbin.models import Outcome, fit
from unbin.models.loglik import loglik_at, supports

NAMES = ("(intercept)", "a", "b")


def _design(n: int, seed: int) -> tuple[np.ndarray, np.random.Generator]:
    rng = np.random.default_rng(seed)
    return np.column_stack([rng.standard_normal(n), rng.uniform(0, 2, n)]), rng


def test_logistic_matches_statsmodels_with_frequency_weights():
    # Reference: statsmodels GLM(Binomial, freq_weights).loglike at coefficients that are not
    # the estimate.
    X, rng = _design(300, 1)
    y = (rng.random(300) < 1 / (1 + np.exp(-(0.3 + X @ [0.8, -0.5])))).astype(float)
    f = rng.integers(1, 4, 300).astype(float)
    coef = np.array([0.1, 0.6, -0.2])
    ref = sm.GLM(y, sm.add_constant(X), family=sm.families.Binomial(), freq_weights=f)
    got = loglik_at(X, Outcome("binary", y, weights=f), NAMES, coef)
    assert got == pytest.approx(ref.loglike(coef), rel=1e-12)
    # at the estimate it is the fit's own log-likelihood
    res = fit("binary", X, Outcome("binary", y), NAMES[1:])
    assert loglik_at(X, Outcome("binary", y), res.names, res.coef) == pytest.approx(
        res.loglik, rel=1e-10)


def test_poisson_with_offset_matches_statsmodels():
    # Reference: statsmodels GLM(Poisson, offset).loglike (with the -log y! term).
    X, rng = _design(250, 2)
    pt = rng.uniform(0.5, 3, 250)
    y = rng.poisson(pt * np.exp(-0.5 + X @ [0.4, 0.3])).astype(float)
    coef = np.array([-0.3, 0.2, 0.5])
    ref = sm.GLM(y, sm.add_constant(X), family=sm.families.Poisson(), offset=np.log(pt))
    got = loglik_at(X, Outcome("count", y, offset=np.log(pt)), NAMES, coef)
    assert got == pytest.approx(ref.loglike(coef), rel=1e-12)


def test_linear_profiles_the_variance_like_statsmodels_ols():
    # Reference: statsmodels OLS.loglike(params), which concentrates the residual variance out
    # (sigma^2 = RSS / n) as the linear fit's maximum-likelihood log-likelihood does; frequency
    # weights as rows repeated.
    X, rng = _design(200, 3)
    y = 1 + X @ [0.5, -1.0] + rng.standard_normal(200)
    coef = np.array([0.8, 0.4, -0.7])
    ref = sm.OLS(y, sm.add_constant(X)).loglike(coef)
    assert loglik_at(X, Outcome("continuous", y), NAMES, coef) == pytest.approx(ref, rel=1e-12)
    f = rng.integers(1, 4, 200)
    rep = sm.OLS(np.repeat(y, f), sm.add_constant(np.repeat(X, f, axis=0))).loglike(coef)
    got = loglik_at(X, Outcome("continuous", y, weights=f.astype(float)), NAMES, coef)
    assert got == pytest.approx(rep, rel=1e-12)


def _efron_brute_force(X: np.ndarray, beta: np.ndarray, time: np.ndarray, event: np.ndarray,
                       entry: np.ndarray, strata: np.ndarray) -> float:
    """Efron's log partial likelihood by loops over strata and distinct event times (Efron
    1977; risk set at t: entry < t <= time, within the stratum)."""
    eta = X @ beta
    r = np.exp(eta)
    total = 0.0
    for s in np.unique(strata):
        ins = strata == s
        for t in np.unique(time[ins & (event == 1)]):
            dead = ins & (time == t) & (event == 1)
            at_risk = ins & (entry < t) & (time >= t)
            d = int(dead.sum())
            total += eta[dead].sum()
            for ell in range(d):
                total -= np.log(r[at_risk].sum() - ell / d * r[dead].sum())
    return float(total)


def test_cox_partial_likelihood_matches_brute_force_efron():
    # Brute force (Efron ties, strata, delayed entry) written in the test; the fixed
    # coefficients are not the estimate.
    X, rng = _design(80, 4)
    entry = rng.uniform(0, 1, 80).round(1)
    time = entry + rng.exponential(2, 80).round(1) + 0.1  # rounded: tied event times
    event = (rng.random(80) < 0.7).astype(float)
    strata = rng.integers(0, 2, 80)
    beta = np.array([0.4, -0.3])
    want = _efron_brute_force(X, beta, time, event, entry, strata)
    o = Outcome("survival", event, time=time, entry=entry, strata=strata)
    assert loglik_at(X, o, NAMES[1:], beta) == pytest.approx(want, rel=1e-10)
    res = fit("survival", X, o, NAMES[1:])
    assert loglik_at(X, o, res.names, res.coef) == pytest.approx(res.loglik, rel=1e-9)
    # no covariates: the null model's partial likelihood
    zero = _efron_brute_force(X[:, :0], np.zeros(0), time, event, entry, strata)
    assert loglik_at(X[:, :0], o, (), np.zeros(0)) == pytest.approx(zero, rel=1e-10)


def test_fits_without_a_plain_likelihood_are_not_supported():
    y = np.array([0.0, 1.0, 1.0, 0.0])
    assert not supports(Outcome("binary", y, penalty="firth"))
    assert not supports(Outcome("binary", y, strata=np.array([0, 0, 1, 1])))
    assert not supports(Outcome("count", y, dispersion="quasi-poisson"))
    assert not supports(Outcome("binary", y, weights=np.ones(4), weight_kind="sampling"))
    assert not supports(Outcome("binary", y, cluster=np.array([0, 0, 1, 1])))
    assert supports(Outcome("binary", y, weights=np.ones(4)))
    with pytest.raises(ValueError, match="no plain likelihood"):
        loglik_at(np.zeros((4, 1)), Outcome("binary", y, penalty="firth"), NAMES[:2],
                  np.zeros(2))
