"""The interpolated sum over rows of the product-limit cumulative incidence
(``unbin.refit.incidence_sum``) against the row-by-row sum written out here in numpy, and the
standardised incidence through it against lifelines' Aalen–Johansen estimate."""

from __future__ import annotations

import numpy as np
import pytest

from unbin.refit import incidence_sum as isum
from unbin.refit import standardise as std


def _direct(u: np.ndarray, w: np.ndarray, shift: np.ndarray, D: np.ndarray) -> float:
    """sum_i w_i sum_t r_i1 dL_1(t) prod_{s<t} (1 - sum_c r_ic dL_c(s)), time by time (the
    g-formula's product-limit incidence; Cheng, Fine & Wei 1998, Biometrics 54:219), with
    ``r_ic = exp(u_ic + shift_c)``; a factor below 0 set to 0."""
    r = np.exp(u + shift)
    surv = np.ones(u.shape[0])
    cif = np.zeros(u.shape[0])
    for t in range(D.shape[1]):
        cif += surv * r[:, 0] * D[0, t]
        surv *= np.maximum(1.0 - r @ D[:, t], 0.0)
    return float(w @ cif)


def _case(rng: np.random.Generator, n: int, K: int, causes: int, spread: float,
          tied: bool) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rows' log relative hazards (correlated across causes; ``tied``: on a coarse grid, as a
    few categorical adjusters give) and Breslow-like increments: about one event per time,
    over a risk set shrinking from n."""
    z = rng.normal(size=(n, 2))
    u = np.column_stack([spread * z[:, 0], 0.6 * spread * (0.5 * z[:, 0] + z[:, 1]),
                         0.4 * spread * z[:, 1]])[:, :causes]
    if tied:
        u = np.round(u * 4) / 4
    at_risk = n * np.linspace(1.0, 0.5, K)
    share = rng.dirichlet(np.ones(causes), K).T
    D = share * (rng.poisson(1.0, K) + 1) / at_risk  # (causes, K)
    return u, D, np.array([[0.3, -0.2, 0.1][:causes], [-0.25, 0.1, 0.0][:causes]])


@pytest.mark.parametrize(("n", "K", "causes", "spread", "tied"), [
    (3000, 400, 2, 0.5, False),
    (3000, 400, 2, 1.0, True),
    (20000, 1500, 2, 0.8, False),
    (20000, 1500, 2, 1.2, False),
    (8000, 600, 3, 0.7, False),
    (8000, 600, 3, 0.7, True),
])
def test_interpolated_sum_equals_the_row_by_row_sum(n: int, K: int, causes: int, spread: float,
                                                    tied: bool) -> None:
    """Seeded rows at several sizes, two and three causes, spread and tied relative hazards,
    bootstrap-like integer weights: the interpolated standardised incidence equals the
    row-by-row sum (written in this test) to 1e-10 (on an incidence between 0 and 1)."""
    rng = np.random.default_rng(n + K + causes + int(10 * spread) + tied)
    u, D, shifts = _case(rng, n, K, causes, spread, tied)
    w = rng.poisson(1.0, n).astype(float)
    got = isum.interpolated_sums(u, w, shifts, D)
    assert got is not None
    for s, shift in enumerate(shifts):
        ref = _direct(u, w, shift, D)
        assert 0.01 < ref / w.sum() < 1.0
        assert got[s] / w.sum() == pytest.approx(ref / w.sum(), abs=1e-10)


def test_interpolation_declines_what_it_cannot_certify() -> None:
    """Relative hazards so large that a factor 1 - sum_c r_c dL_c would fall below 0 (where the
    incidence is no longer smooth), non-finite ones, or a node budget too small to settle: no
    interpolated value (the caller sums row by row). Common practice: refuse rather than
    approximate outside the method's conditions."""
    rng = np.random.default_rng(3)
    u, D, shifts = _case(rng, 2000, 200, 2, 0.5, False)
    w = np.ones(u.shape[0])
    big = u.copy()
    big[0, 0] = np.log(1.0 / D[0].max())  # one row's factor reaches 0
    assert isum.interpolated_sums(big, w, shifts, D) is None
    bad = u.copy()
    bad[1, 1] = np.inf
    assert isum.interpolated_sums(bad, w, shifts, D) is None
    assert isum._box_sums(np.exp(u), w, shifts, D, 10) is None


def test_cif_risks_interpolated_equals_row_by_row(monkeypatch: pytest.MonkeyPatch) -> None:
    """``cif_risks`` on seeded competing-risk data (strata, delayed entry, tied times, a
    continuous and a three-level adjuster): forced onto the interpolation it equals its
    row-by-row sum to 1e-10, and numbering the rows' adjustment patterns (``groups``) changes
    nothing beyond rounding."""
    rng = np.random.default_rng(17)
    n = 3000
    X = np.column_stack([rng.normal(size=n), rng.normal(size=n), rng.integers(0, 3, n)])
    lin1, lin2 = 0.4 * X[:, 0] + 0.5 * X[:, 1], -0.3 * X[:, 0] + 0.3 * X[:, 2]
    t1, t2 = rng.exponential(np.exp(-lin1)), rng.exponential(2 * np.exp(-lin2))
    cens = rng.uniform(0.5, 3.0, n)
    t = np.round(np.minimum(np.minimum(t1, t2), cens), 3) + 0.001
    c = np.where(cens < np.minimum(t1, t2), 0, np.where(t1 < t2, 1, 2))
    e = np.where(rng.random(n) < 0.3, rng.uniform(0.0, 0.0005, n), 0.0)
    s = rng.integers(0, 2, n)
    coefs = [np.array([0.4, 0.5, 0.0]), np.array([-0.3, 0.0, 0.3])]
    at = [np.array([1.0]), np.array([-0.5])]
    direct, _ = std.cif_risks(X, 1, coefs, at, t, c, [1, 2], 1.5, entry=e, strata=s)
    _, inverse = np.unique(X[:, 1:], axis=0, return_inverse=True)
    grouped, _ = std.cif_risks(X, 1, coefs, at, t, c, [1, 2], 1.5, entry=e, strata=s,
                               groups=inverse.ravel())
    np.testing.assert_allclose(grouped, direct, rtol=0, atol=1e-14)
    monkeypatch.setattr(std, "INTERPOLATE_ROWS", 0)
    monkeypatch.setattr(std, "DIRECT_CELLS", 0)
    interpolated, _ = std.cif_risks(X, 1, coefs, at, t, c, [1, 2], 1.5, entry=e, strata=s)
    np.testing.assert_allclose(interpolated, direct, rtol=0, atol=1e-10)
    assert np.all((direct > 0.05) & (direct < 0.9))


@pytest.mark.parametrize("interpolate", [True, False])
def test_interpolated_incidence_without_covariates_is_aalen_johansen(
        interpolate: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    """No covariates, the interpolation forced (a box of one point per axis) or the row-by-row
    sum (one pattern): the standardised cumulative incidence is lifelines'
    AalenJohansenFitter's estimate at the horizon (delayed entry, three causes), tolerance
    1e-12."""
    from lifelines import AalenJohansenFitter

    if interpolate:
        monkeypatch.setattr(std, "INTERPOLATE_ROWS", 0)
        monkeypatch.setattr(std, "DIRECT_CELLS", 0)
    rng = np.random.default_rng(23)
    n = 4000
    t = rng.exponential(1.0, n) + 0.2
    c = rng.choice([0, 1, 2, 3], n, p=[0.25, 0.35, 0.25, 0.15])
    e = rng.uniform(0.0, 0.2, n)
    got, _ = std.cif_risks(np.zeros((n, 0)), 0, [np.zeros(0)] * 3, [np.zeros(0)], t, c,
                           [1, 2, 3], 1.0, entry=e)
    aj = AalenJohansenFitter(calculate_variance=False).fit(t, c, event_of_interest=1, entry=e)
    assert got[0] == pytest.approx(float(aj.cumulative_density_.loc[:1.0].iloc[-1, 0]),
                                   abs=1e-12)


@pytest.mark.parametrize("causes", [2, 3])
def test_shifted_sums_equal_the_row_by_row_sum(causes: int) -> None:
    """Every exposure value's sum in one pass (``shifted_sums``) against the time-by-time sum
    written in this test, per exposure value, to 1e-13 (incidences between 0 and 1)."""
    rng = np.random.default_rng(41 + causes)
    u, D, shifts = _case(rng, 700, 300, causes, 0.8, True)
    w = rng.poisson(1.0, 700)
    got = isum.shifted_sums(u, w, shifts, D)
    for s, shift in enumerate(shifts):
        assert got[s] / w.sum() == pytest.approx(_direct(u, w, shift, D) / w.sum(), abs=1e-13)


def _g_formula_by_hand(X: np.ndarray, k: int, coefs: list[np.ndarray], at: list[np.ndarray],
                       t: np.ndarray, c: np.ndarray, entry: np.ndarray, s: np.ndarray,
                       horizon: float) -> np.ndarray:
    """The standardised product-limit cumulative incidence of cause 1 written out from its
    definition (Cheng, Fine & Wei 1998; refit/standardise's docstring), with loops: per cause
    and stratum the Breslow increments at the centred predictor, ``d_k / sum_{entry < t_k <=
    time} exp(eta - mean eta)``, then per row and exposure value the sum over the stratum's
    event times (any cause) up to the horizon of ``S(t-) r_1 dL_1(t)``."""
    etas = [X @ b for b in coefs]
    out = np.zeros(len(at))
    for stratum in np.unique(s):
        inc = []
        times = np.unique(t[(s == stratum) & (c > 0) & (t <= horizon)])
        for j, eta in enumerate(etas):
            r = np.exp(eta - eta.mean())
            d = np.zeros(times.size)
            for q, u in enumerate(times):
                events = np.sum((s == stratum) & (t == u) & (c == j + 1))
                risk = r[(s == stratum) & (entry < u) & (t >= u)].sum()
                d[q] = events / risk if events else 0.0
            inc.append(d)
        for i in np.flatnonzero(s == stratum):
            for v, a in enumerate(at):
                rel = [np.exp(eta[i] - eta.mean() - X[i, :k] @ b[:k] + a @ b[:k])
                       for eta, b in zip(etas, coefs, strict=True)]
                surv, cif = 1.0, 0.0
                for q in range(times.size):
                    cif += surv * rel[0] * inc[0][q]
                    surv *= max(1.0 - sum(rr * d[q] for rr, d in zip(rel, inc, strict=True)),
                                0.0)
                out[v] += cif
    return out / X.shape[0]


def test_cif_risks_equals_the_g_formula_written_out() -> None:
    """``cif_risks`` with three strata, delayed entry, tied times and a patterned adjustment
    (age in whole years, sex: ``groups`` numbering the patterns), with the event of interest's
    baseline passed in (``cause_baseline``, as the confounding bootstrap shares it with the
    standardised survival) and without: the incidence written out in this test from its
    definition, to 1e-13."""
    rng = np.random.default_rng(5)
    n = 400
    age = rng.integers(50, 60, n).astype(float)
    X = np.column_stack([rng.normal(size=n), (age - 55) / 5, rng.integers(0, 2, n)])
    t = np.ceil(rng.exponential(2.0, n) * 8) / 8
    c = rng.choice([0, 1, 2], n, p=[0.3, 0.4, 0.3])
    e = np.where(rng.random(n) < 0.3, 0.1, 0.0)
    s = rng.integers(0, 3, n)
    coefs = [np.array([0.4, 0.5, -0.2]), np.array([-0.3, 0.2, 0.3])]
    at = [np.array([1.0]), np.array([-0.5])]
    want = _g_formula_by_hand(X, 1, coefs, at, t, c, e, s, 2.0)
    _, groups = np.unique(X[:, 1:], axis=0, return_inverse=True)
    plain, _ = std.cif_risks(X, 1, coefs, at, t, c, [1, 2], 2.0, entry=e, strata=s)
    base = std.cause_baseline(X, coefs[0], t, (c == 1).astype(float), entry=e, strata=s)
    shared, note = std.cif_risks(X, 1, coefs, at, t, c, [1, 2], 2.0, entry=e, strata=s,
                                 groups=groups.ravel(), baseline=base, with_note=False)
    assert note == ""
    assert np.all((want > 0.1) & (want < 0.9))
    np.testing.assert_allclose(plain, want, rtol=0, atol=1e-13)
    np.testing.assert_allclose(shared, want, rtol=0, atol=1e-13)


@pytest.mark.parametrize("causes", [2, 3])
def test_compiled_row_incidence_equals_numpy_and_the_time_by_time_sum(
        causes: int, monkeypatch: pytest.MonkeyPatch) -> None:
    """``row_incidence`` compiled (``compiled/row_incidence.py``) and numpy's blocks, both
    forced, against each other and against the time-by-time incidence written in this test
    (Cheng, Fine & Wei 1998's product-limit form), row by row to 1e-14 (incidences between 0
    and 1); a factor that would go below 0 is set to 0 on both paths, and a NaN stays NaN."""
    rng = np.random.default_rng(61 + causes)
    u, D, _ = _case(rng, 500, 700, causes, 1.0, False)
    u[3] = 6.0  # a row whose factors go below 0 (set to 0)
    u[5, 0] = np.nan
    got = {}
    for mode in ("never", "always"):
        monkeypatch.setenv("UNBIN_COMPILED", mode)
        got[mode] = isum.row_incidence(u, D)
    ones = np.ones(1)
    by_hand = np.array([_direct(u[i:i + 1], ones, np.zeros(causes), D) for i in range(500)])
    assert np.isnan(got["never"][5]) and np.isnan(got["always"][5])
    assert np.isnan(by_hand[5])
    fine = np.arange(500) != 5
    assert np.any(1.0 - np.exp(u[3]) @ D < 0)
    np.testing.assert_allclose(got["always"][fine], got["never"][fine], rtol=0, atol=1e-14)
    np.testing.assert_allclose(got["always"][fine], by_hand[fine], rtol=0, atol=1e-14)
