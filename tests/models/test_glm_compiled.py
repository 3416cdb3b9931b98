"""The compiled per-cell pass of the large-sample GLM bootstrap refits
(``unbin.models.compiled.glm_cells`` in ``weighted._chord``) and the numpy shortcuts around it:

- refits with the kernel forced on equal those with it forced off (both paths of
  ``UNBIN_COMPILED``), with and without a scale on the draw counts;
- each replicate's refit equals statsmodels' GLM with ``freq_weights`` (Binomial; Poisson with
  a log person-time offset; Gaussian through WLS) with the kernel forced on;
- the kernel's cells equal their definition written out in numpy;
- ``expit_into`` agrees with ``scipy.special.expit``;
- ``compact_copies`` (the confounding bootstrap's standardised means over every replicate at
  once) holds each row's copies in the repeated rows of ``replicate_rows``.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import special

from unbin.models import weighted
from unbin.models.base import Outcome
from unbin.models.weighted import Replicates, WeightedGLM, expit_into, resample_counts

N = weighted._WHOLE_ROWS  # the large-sample path by size


def _sample(family: str, seed: int) -> tuple[np.ndarray, Outcome, sm.GLM]:
    rng = np.random.default_rng(seed)
    X = np.column_stack([rng.normal(size=N), rng.integers(0, 3, N) == 1,
                         np.round(rng.uniform(0, 4, N), 1)]).astype(float)
    eta = -1.2 + 0.5 * X[:, 0] - 0.4 * X[:, 1] + 0.15 * X[:, 2]
    design = sm.add_constant(X)
    if family == "binary":
        y = (rng.random(N) < special.expit(eta)).astype(float)
        return X, Outcome("binary", y), lambda w: sm.GLM(
            y, design, family=sm.families.Binomial(), freq_weights=w)
    if family == "count":
        t = rng.uniform(0.5, 3.0, N)
        y = rng.poisson(t * np.exp(eta)).astype(float)
        return X, Outcome("count", y, offset=np.log(t)), lambda w: sm.GLM(
            y, design, family=sm.families.Poisson(), offset=np.log(t), freq_weights=w)
    y = eta + rng.normal(size=N)
    return X, Outcome("continuous", y), lambda w: sm.WLS(y, design, weights=w)


@pytest.mark.parametrize("family", ["binary", "count", "continuous"])
def test_forced_kernel_refits_equal_statsmodels(family: str,
                                                monkeypatch: pytest.MonkeyPatch) -> None:
    """statsmodels GLM(freq_weights=drawn counts) (WLS for the linear model), replicate by
    replicate, with the compiled pass forced on; and the same refits with it forced off."""
    X, o, model = _sample(family, {"binary": 21, "count": 22, "continuous": 23}[family])
    start = np.asarray(model(np.ones(N)).fit().params)
    R = Replicates(resample_counts(np.random.default_rng(4), N, 3))
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    fast = WeightedGLM(family, X, o, start).coef(R)
    monkeypatch.setenv("UNBIN_COMPILED", "never")
    slow = WeightedGLM(family, X, o, start).coef(R)
    np.testing.assert_allclose(fast, slow, rtol=1e-12, atol=1e-13)
    for b in range(len(R)):
        fit = model(R.row(b))
        ref = fit.fit(tol=1e-13) if family != "continuous" else fit.fit()
        np.testing.assert_allclose(fast[b], np.asarray(ref.params), rtol=1e-8, atol=1e-10)


@pytest.mark.parametrize("family", ["binary", "count"])
def test_forced_kernel_with_scaled_counts(family: str,
                                          monkeypatch: pytest.MonkeyPatch) -> None:
    """Draw counts times the rows' sampling weights (``Replicates.scale``): both paths agree,
    and statsmodels' frequency-weighted fit on the products is the refit."""
    X, o, model = _sample(family, 31)
    scale = np.random.default_rng(2).uniform(0.5, 2.0, N)
    R = Replicates(resample_counts(np.random.default_rng(6), N, 2), scale)
    got = {}
    for path in ("always", "never"):
        monkeypatch.setenv("UNBIN_COMPILED", path)
        got[path] = WeightedGLM(family, X, o).coef(R)
    np.testing.assert_allclose(got["always"], got["never"], rtol=1e-12, atol=1e-13)
    for b in range(len(R)):
        ref = model(R.row(b)).fit(tol=1e-13)
        np.testing.assert_allclose(got["always"][b], np.asarray(ref.params), rtol=1e-8,
                                   atol=1e-10)


@pytest.mark.parametrize("logistic", [True, False])
def test_kernel_cells_equal_their_definition(logistic: bool) -> None:
    """The residuals w (y - mu) and weighted variances w v of a block, against numpy written
    from the definitions (common practice: the logistic and Poisson mean and variance)."""
    from unbin.models.compiled.glm_cells import glm_cells

    rng = np.random.default_rng(8)
    B, n, r0, nb = 5, 300, 40, 200
    counts = rng.poisson(1.0, size=(B, n)).astype(np.uint8)
    scale = rng.uniform(0.5, 2.0, n)
    act = np.array([4, 0, 2])
    eta = rng.normal(scale=3.0, size=(len(act), nb))
    y = (rng.random(n) < 0.3).astype(float)
    e = np.exp(-eta) if logistic else np.exp(np.minimum(eta, 700.0))
    r, wv = np.empty_like(e), np.empty_like(e)
    lo, hi = np.full(len(act), np.inf), np.full(len(act), -np.inf)
    glm_cells(e, y[r0:r0 + nb], counts, act, r0, scale, logistic, True, r, wv, lo, hi)
    w = counts[act, r0:r0 + nb] * scale[r0:r0 + nb]
    mu = 1 / (1 + np.exp(-eta)) if logistic else np.exp(eta)
    v = mu * (1 - mu) if logistic else mu
    np.testing.assert_allclose(r, w * (y[r0:r0 + nb] - mu), rtol=1e-13, atol=1e-15)
    np.testing.assert_allclose(wv, w * v, rtol=1e-13, atol=1e-300)
    np.testing.assert_array_equal(lo, e.min(axis=1))  # the range of e over the block's rows
    np.testing.assert_array_equal(hi, e.max(axis=1))
    glm_cells(e, y[r0:r0 + nb], counts, act, r0, np.zeros(0), logistic, False, r, wv[:0],
              np.zeros(0), np.zeros(0))
    np.testing.assert_allclose(r, counts[act, r0:r0 + nb] * (y[r0:r0 + nb] - mu), rtol=1e-13,
                               atol=1e-15)


def test_logistic_final_check_from_the_last_evaluation(monkeypatch: pytest.MonkeyPatch) -> None:
    """The logistic refits' final check (a replicate whose drawn rows include one with
    |eta| > 20 fails) read from the last evaluation's range of the predictor
    (``weighted._settled_eta``, compiled path) fails the same replicates as the pass over
    the rows (numpy path), and the others' coefficients are equal. Rows with eta beyond 20
    at the fitted coefficients are planted so that some replicates draw one and some none."""
    X, o, model = _sample("binary", 41)
    X = X.copy()
    far = np.array([5])  # a row with |eta| above 20 at the full-sample estimate
    X[far, 0] = -40.0
    start = np.asarray(model(np.ones(N)).fit().params)
    assert np.all(np.abs(start[0] + X[far] @ start[1:]) > 20)
    counts = resample_counts(np.random.default_rng(9), N, 10)
    drew = (counts[:, far] > 0).any(axis=1)
    assert drew.any() and not drew.all()
    got = {}
    for path in ("always", "never"):
        monkeypatch.setenv("UNBIN_COMPILED", path)
        got[path] = WeightedGLM("binary", X, o, start).coef(Replicates(counts))
    np.testing.assert_array_equal(np.isnan(got["always"][:, 0]), drew)
    np.testing.assert_array_equal(np.isnan(got["never"][:, 0]), drew)
    np.testing.assert_allclose(got["always"][~drew], got["never"][~drew], rtol=1e-12,
                               atol=1e-13)


def test_settled_eta_is_a_bound() -> None:
    """``_settled_eta`` settles a replicate only when every drawn row's predictor at the final
    coefficients (the evaluated point plus the step) lies within [-20, 20]: random points,
    steps and ranges near the edge, checked against the predictor computed directly; a
    replicate never evaluated, or with NaN in its range, is not settled."""
    rng = np.random.default_rng(3)
    n, q = 400, 4
    Z = np.column_stack([np.ones(n), rng.normal(scale=3.0, size=(n, q - 1))])
    settled_any = unsettled_any = False
    for _ in range(300):
        T = rng.normal(scale=2.0, size=q)
        step = rng.normal(scale=10.0 ** rng.uniform(-9, -1), size=q)
        drawn = rng.random(n) < 0.6
        eta = Z[drawn] @ T
        e = np.exp(-eta)
        ok = weighted._settled_eta(Z, np.array([e.min()]), np.array([e.max()]),
                                   np.array([np.abs(step).sum()]), np.array([True]))[0]
        final = Z[drawn] @ (T + step)
        if ok:
            assert np.all(np.abs(final) <= 20)
            settled_any = True
        else:
            unsettled_any = True
    assert settled_any and unsettled_any
    one = np.array([1.0])
    assert not weighted._settled_eta(Z, one, one, np.zeros(1), np.array([False]))[0]
    assert not weighted._settled_eta(Z, one, np.array([np.inf]), np.zeros(1),
                                     np.array([True]))[0]


def test_expit_into_agrees_with_scipy() -> None:
    """``expit_into`` against scipy.special.expit, far into both tails."""
    x = np.concatenate([np.linspace(-800, 800, 20001), [0.0, -0.0, 1e-300]])
    got = expit_into(x, np.empty_like(x))
    ref = special.expit(x)
    np.testing.assert_allclose(got, ref, rtol=1e-15, atol=0)
    assert got[0] == 0.0 and got[20000] == 1.0


@pytest.mark.parametrize("design", ["rows", "sampling", "frequency", "cluster"])
def test_compact_copies_are_the_drawn_rows_copies(design: str) -> None:
    """``compact_copies`` holds how often each row is in the drawn data set, as the repeated
    rows show it (``replicate_rows``: a row drawn k times repeated k times; frequency weights
    without a cluster: each individual row once, its count the weight)."""
    rng = np.random.default_rng(12)
    n = 200
    w = rng.uniform(0.5, 3.0, n) if design == "sampling" else (
        rng.integers(1, 5, n).astype(float) if design == "frequency" else None)
    o = Outcome("binary", (rng.random(n) < 0.3).astype(float), weights=w,
                weight_kind="frequency" if design == "frequency" else "sampling",
                cluster=rng.integers(0, 40, n) if design == "cluster" else None)
    R = weighted.design_resample_replicates(np.random.default_rng(3), o, 4)
    copies = weighted.compact_copies(o, R)
    assert copies is not None
    for b in range(len(R)):
        m, _ = weighted.replicate_rows(o, R.row(b))
        np.testing.assert_array_equal(copies.row(b), np.bincount(m, minlength=n))
