"""Competing risks: Aalen–Johansen cumulative incidence and the Fine–Gray model."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from lifelines import AalenJohansenFitter, CoxPHFitter
from scipy import optimize, stats

from helpers import load_check
from unbin.data import analysis_sample
from unbin.data.checks import data_problems
from unbin.errors import SpecError
from unbin.models import fine_gray
from unbin.models.base import Outcome
from unbin.models.competing import aalen_johansen, fine_gray_data, fit_fine_gray, step_at
from unbin.questions.net_benefit import net_benefit_table
from unbin.questions.subdistribution import COLUMNS as SUB_COLUMNS
from unbin.questions.subdistribution import subdistribution_table
from unbin.refit.analysis import Refit, refit_analysis
from unbin.refit.risk import fine_gray_fit, from_result, risk_fit, risk_scale
from unbin.spec import Spec, parse_spec


def _lifelines_cif(t: np.ndarray, c: np.ndarray, entry: np.ndarray | None = None
                   ) -> tuple[np.ndarray, np.ndarray]:
    f = AalenJohansenFitter(calculate_variance=False).fit(t, c, event_of_interest=1, entry=entry)
    ref = f.cumulative_density_.iloc[:, 0]
    return ref.index.to_numpy(float), ref.to_numpy(float)


@pytest.mark.parametrize("delayed", [False, True])
def test_aalen_johansen_matches_lifelines(delayed: bool) -> None:
    # reference: lifelines' AalenJohansenFitter (continuous times: it jitters tied ones)
    rng = np.random.default_rng(11)
    n = 400
    t = rng.exponential(1.0, n) + (0.3 if delayed else 0.0)
    c = rng.choice([0, 1, 2], n, p=[0.3, 0.4, 0.3])
    entry = rng.uniform(0.0, 0.3, n) if delayed else None
    ours = aalen_johansen(t, c, 1, entry=entry)
    times, cif = _lifelines_cif(t, c, entry)
    got = step_at(ours["time"].to_numpy(), ours["cif"].to_numpy(), times)
    np.testing.assert_allclose(got, cif, atol=1e-12)


def test_aalen_johansen_without_competing_is_one_minus_kaplan_meier() -> None:
    # no competing event: the cumulative incidence is 1 - Kaplan–Meier (Kaplan & Meier 1958)
    t = np.array([1.0, 2.0, 2.0, 3.0, 4.0, 5.0, 6.0])
    c = np.array([1, 1, 0, 0, 1, 0, 1])
    aj = aalen_johansen(t, c, 1)
    # by hand: at risk 7, 6, 3, 1 at the event times 1, 2, 4, 6; S = 6/7, 5/7, 10/21, 0
    expected = [1 / 7, 2 / 7, 11 / 21, 1.0]
    np.testing.assert_allclose(aj["cif"].to_numpy(), expected, atol=1e-12)


def _brute_G_before(t: np.ndarray, c: np.ndarray, s: float) -> float:
    """Kaplan–Meier of censoring just before s, by a plain loop (events before censorings at
    a tie)."""
    g = 1.0
    for u in np.unique(t[c == 0]):
        if u >= s:
            break
        at_risk = np.sum(t >= u)
        g *= 1 - np.sum((t == u) & (c == 0)) / at_risk
    return g


def _brute_fine_gray(x: np.ndarray, t: np.ndarray, c: np.ndarray) -> float:
    """Solve Fine & Gray's (1999, eq. 2) weighted score equation directly: at each event time
    s of cause 1 the risk set is everyone with T_j >= s, plus those with a competing event
    before s weighted by G(s-)/G(T_j-). One covariate; no tied event times."""
    def score(b: float) -> float:
        u = 0.0
        for i in np.flatnonzero(c == 1):
            s = t[i]
            w = np.array([1.0 if t[j] >= s else
                          (_brute_G_before(t, c, s) / _brute_G_before(t, c, t[j])
                           if c[j] == 2 else 0.0) for j in range(t.size)])
            r = w * np.exp(b * x)
            u += x[i] - np.sum(r * x) / np.sum(r)
        return u

    return float(optimize.brentq(score, -5, 5, xtol=1e-12))


def test_fine_gray_solves_the_weighted_score_equation_on_a_small_example() -> None:
    # Twelve people, no tied times: the weighted Cox fit on the expansion (Geskus 2011) equals
    # the root of Fine & Gray's estimating equation computed by brute force.
    t = np.array([0.5, 0.9, 1.2, 1.5, 1.8, 2.1, 2.6, 3.0, 3.3, 3.9, 4.4, 5.0])
    c = np.array([1, 2, 0, 1, 2, 1, 0, 2, 1, 0, 1, 0])
    x = np.array([1.2, -0.3, 0.4, 0.8, -1.0, 0.1, 0.5, -0.6, 1.5, -0.2, 0.3, -1.1])
    # the weights by hand: censorings at 1.2, 2.6, 3.9 (at risk 10, 6, 3): G = 0.9, 0.75, 0.5.
    # Person 2 (competing at 0.9, G(0.9-) = 1) at the events 1.5, 2.1, 3.3, 4.4: 0.9, 0.9,
    # 0.75, 0.5
    d = fine_gray_data(t, c, 1)
    np.testing.assert_allclose(d.weight[d.person == 1][1:], [0.9, 0.9, 0.75, 0.5], atol=1e-12)
    o = Outcome("survival", (c == 1).astype(float), time=t)
    res = fit_fine_gray(x[:, None], o, c, 1, ("x",))
    assert res.ok
    assert res.coef[0] == pytest.approx(_brute_fine_gray(x, t, c), abs=1e-6)


def test_delayed_entry_fit_with_given_weights_solves_the_weighted_score_equation() -> None:
    """Heavy delayed entry (the check's design, n = 150, continuous times): with the design's
    true G(t-) H(t) as the weights (``benchmarks/checks/fine_gray.py``'s ``true_weight``), the
    fit without the expansion is the root of the weighted score equation written out from its
    definition (Fine & Gray 1999, eq. 2, with Geskus's 2011 entry weights): at each event time
    s of cause 1 the risk set is everyone with entry < s <= T_j, plus those with a competing
    event before s weighted Q(s) / Q(T_j), Q = G(t-) H(t). The simulation's mean error under
    this entry (test_fine_gray_bootstrap_coverage_with_heavy_delayed_entry) is the same with
    these weights, so it is not the weights' estimation."""
    check = load_check("fine_gray")
    a = check.draw(150, 0.5, np.random.default_rng(23), True)
    x, t, c, entry = a[:, 0], a[:, 1], a[:, 2], a[:, 3]
    Q = check.true_weight

    def score(b: float) -> float:
        u = 0.0
        for i in np.flatnonzero(c == 1):
            s = t[i]
            w = ((entry < s) & (s <= t)).astype(float)
            comp = (c == 2) & (t < s)
            w[comp] = Q(s) / Q(t[comp])
            r = w * np.exp(b * x)
            u += x[i] - np.sum(r * x) / np.sum(r)
        return u

    assert (entry > 0).all() and np.sum(c == 2) > 20
    layout = fine_gray.prepare(t, c, 1, entry=entry, weights=None, strata=None, Q_at=Q)
    got = fine_gray.fit(layout, x[:, None]).coef[0]
    assert got == pytest.approx(optimize.brentq(score, -5, 5, xtol=1e-13), abs=1e-8)


def _simulate(n: int, beta: float, rng: np.random.Generator, p: float = 0.3,
              delayed: bool = False) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    """Fine & Gray's (1999, sec. 5) design as the check script draws it
    (``benchmarks/checks/fine_gray.py``, Beyersmann et al. 2009): a proportional subdistribution
    hazard with log ratio beta; without the entry-time weights H the mean estimate under delayed
    entry is about 0.62, far outside the bound."""
    a = load_check("fine_gray").draw(n, beta, rng, delayed, p)
    return a[:, 0], a[:, 1], a[:, 2], (a[:, 3] if delayed else None)


def _fit(x: np.ndarray, t: np.ndarray, c: np.ndarray, entry: np.ndarray | None):  # type: ignore[no-untyped-def]
    o = Outcome("survival", (c == 1).astype(float), time=t, entry=entry)
    return fit_fine_gray(x[:, None], o, c, 1, ("x",))


@pytest.mark.parametrize("delayed", [False, True])
def test_fine_gray_recovers_a_known_subdistribution_hazard_ratio(delayed: bool) -> None:
    # seeded simulation (Fine & Gray 1999; Beyersmann et al. 2009), true log SHR 0.5: the mean
    # over 30 replicates lies within 4 Monte-Carlo standard errors; the cause-specific Cox
    # model's coefficient is a different quantity and is not what the Fine–Gray fit returns.
    rng = np.random.default_rng(20260402 + delayed)
    est = np.array([_fit(*_simulate(400, 0.5, rng, delayed=delayed)).coef[0]
                    for _ in range(30)])
    mc_se = est.std(ddof=1) / np.sqrt(est.size)
    assert abs(est.mean() - 0.5) < 4 * mc_se + 0.01


def test_fine_gray_baseline_gives_the_cumulative_incidence() -> None:
    # Fine & Gray's design, one large seeded sample: the predicted CIF at t = 1 for x = 0 is
    # 1 - [1 - p (1 - exp(-1))], within 0.02 (about 3 standard errors at n = 3000)
    rng = np.random.default_rng(7)
    x, t, c, _ = _simulate(3000, 0.5, rng)
    res = _fit(x, t, c, None)
    base = res.extra["baseline"]
    h0 = step_at(base["time"].to_numpy(), base["cumhaz"].to_numpy(), 1.0)
    assert float(-np.expm1(-h0)) == pytest.approx(0.3 * (1 - np.exp(-1.0)), abs=0.02)
    # and with no covariate effect the prediction agrees with Aalen–Johansen (Geskus 2011)
    o = Outcome("survival", (c == 1).astype(float), time=t)
    null = fit_fine_gray(np.zeros((t.size, 0)), o, c, 1, ())
    nb = null.extra["baseline"]
    aj = aalen_johansen(t, c, 1)
    for h in (0.5, 1.0, 2.0):
        fg = float(-np.expm1(-step_at(nb["time"].to_numpy(), nb["cumhaz"].to_numpy(), h)))
        ajh = float(step_at(aj["time"].to_numpy(), aj["cif"].to_numpy(), h))
        assert fg == pytest.approx(ajh, abs=0.005)


@pytest.mark.slow
@pytest.mark.parametrize("beta", [0.0, 0.5])
def test_fine_gray_interval_coverage(beta: float) -> None:
    # 600 seeded replicates of Fine & Gray's design (Beyersmann et al. 2009): the 95% Wald
    # interval from the cluster-robust covariance covers the true log SHR in 0.95 of them,
    # within two-sided binomial bounds (0.001 and 0.999 quantiles: about 0.93 to 0.97); at
    # beta = 0 this is one minus the type-I error.
    rng = np.random.default_rng(31 + int(10 * beta))
    z = stats.norm.ppf(0.975)
    hits = 0
    reps = 600
    for _ in range(reps):
        res = _fit(*_simulate(300, beta, rng))
        hits += abs(res.coef[0] - beta) <= z * res.se()[0]
    lo, hi = stats.binom.ppf([0.001, 0.999], reps, 0.95) / reps
    assert lo <= hits / reps <= hi


@pytest.mark.parametrize("delayed", [False, True])
def test_weight_estimation_scores_are_the_derivative_of_the_score(delayed: bool) -> None:
    """Each person's weight-estimation term is their weight times the derivative of the
    Fine–Gray score (at the fitted coefficients) with respect to that weight in the censoring
    and entry distributions only (as the Cox score residuals are, robust.py): against
    central finite differences (step 1e-5) of the score summed
    from the Cox score residuals (Breslow form) of an expansion whose weights G(t_k-) H(t_k)
    / (G(T_j-) H(T_j)) are recomputed with the perturbed weights. Case weights not all 1;
    tolerance 1e-6 absolute (finite-difference error ~1e-9)."""
    from unbin.models.competing import (
        censoring_survival_before,
        entry_distribution,
        weight_estimation_scores,
    )
    from unbin.models.robust import cox_scores

    rng = np.random.default_rng(53)
    x, t, c, entry = _simulate(90, 0.5, rng, delayed=delayed)
    X = np.column_stack([x, rng.normal(size=t.size)])
    w = rng.uniform(0.5, 2.0, t.size)
    o = Outcome("survival", (c == 1).astype(float), time=t, entry=entry, weights=w,
                weight_kind="sampling")
    res = fit_fine_gray(X, o, c, 1, ("x", "z"))
    data = fine_gray_data(t, c, 1, entry=entry, weights=w)
    got = weight_estimation_scores(X, o, c, 1, res.coef)
    n = t.size
    who, stop = data.person[n:], data.stop[n:]

    def score(v: np.ndarray) -> np.ndarray:
        ratio = (censoring_survival_before(t, c, entry, v, stop)
                 * entry_distribution(t, entry, v, stop)
                 / (censoring_survival_before(t, c, entry, v, t[who])
                    * entry_distribution(t, entry, v, t[who])))
        ex = Outcome("survival", data.event, time=data.stop, entry=data.start,
                     weights=np.concatenate([w, w[who] * ratio]))
        return cox_scores(data.take(X), ex, res.coef, ties="breslow").sum(axis=0)

    h = 1e-5
    for person in range(0, n, 7):
        up, down = w.copy(), w.copy()
        up[person] += h
        down[person] -= h
        np.testing.assert_allclose(got[person], w[person] * (score(up) - score(down)) / (2 * h),
                                   atol=1e-6)
    assert np.abs(got).max() > 1e-3  # the terms are not all zero


@pytest.mark.parametrize("delayed", [False, True])
def test_weight_estimation_scores_under_efron_ties(delayed: bool) -> None:
    """Heavily tied times (rounded up to 0.1, so every event time holds several events): the
    Efron-form terms (the fit's default ties) against central finite differences (step 1e-5)
    of the Efron score summed from ``cox_scores(ties="efron")`` (itself checked against a
    brute-force weighted Efron score, Efron 1977, in tests/models/test_robust.py), over an
    expansion whose censoring and entry
    weights are recomputed with the perturbed weights; case weights not all 1; tolerance 1e-6
    absolute. The Breslow-form terms miss the same derivative by more (the check can fail)."""
    from unbin.models.competing import (
        censoring_survival_before,
        entry_distribution,
        weight_estimation_scores,
    )
    from unbin.models.robust import cox_scores

    rng = np.random.default_rng(59)
    x, t, c, entry = _simulate(120, 0.5, rng, delayed=delayed)
    t = np.ceil(t * 10) / 10  # still after entry
    X = np.column_stack([x, rng.normal(size=t.size)])
    w = rng.uniform(0.5, 2.0, t.size)
    o = Outcome("survival", (c == 1).astype(float), time=t, entry=entry, weights=w,
                weight_kind="sampling")
    res = fit_fine_gray(X, o, c, 1, ("x", "z"))
    data = fine_gray_data(t, c, 1, entry=entry, weights=w)
    assert np.bincount(np.unique(t[c == 1], return_inverse=True)[1]).max() >= 3
    got = weight_estimation_scores(X, o, c, 1, res.coef, ties="efron")
    breslow = weight_estimation_scores(X, o, c, 1, res.coef, ties="breslow")
    n = t.size
    who, stop = data.person[n:], data.stop[n:]

    def score(v: np.ndarray) -> np.ndarray:
        ratio = (censoring_survival_before(t, c, entry, v, stop)
                 * entry_distribution(t, entry, v, stop)
                 / (censoring_survival_before(t, c, entry, v, t[who])
                    * entry_distribution(t, entry, v, t[who])))
        ex = Outcome("survival", data.event, time=data.stop, entry=data.start,
                     weights=np.concatenate([w, w[who] * ratio]))
        return cox_scores(data.take(X), ex, res.coef, ties="efron").sum(axis=0)

    h = 1e-5
    miss = 0.0
    for person in range(0, n, 5):
        up, down = w.copy(), w.copy()
        up[person] += h
        down[person] -= h
        fd = w[person] * (score(up) - score(down)) / (2 * h)
        np.testing.assert_allclose(got[person], fd, atol=1e-6)
        miss = max(miss, float(np.abs(breslow[person] - fd).max()))
    assert miss > 1e-4  # 100 times the tolerance
    assert np.abs(got).max() > 1e-3  # the terms are not all zero


def test_fine_gray_bootstrap_covariance_equals_refits_by_hand() -> None:
    """The bootstrap covariance (``bootstrap=B``) against B resamples drawn here with the same
    generator calls, each expanded afresh (its own censoring and entry weights) and refitted
    with lifelines' CoxPHFitter (weights, entry, Efron ties) on the expanded rows; numpy's
    covariance of those coefficients. Tolerance 1e-4 relative (both fitters stop near 1e-7
    in the coefficients). The sandwich stays in extra["robust_cov"]."""
    rng = np.random.default_rng(41)
    x, t, c, entry = _simulate(150, 0.5, rng, delayed=True)
    X = np.column_stack([x, rng.normal(size=x.size)])
    o = Outcome("survival", (c == 1).astype(float), time=t, entry=entry)
    B = 8
    res = fit_fine_gray(X, o, c, 1, ("x", "z"), bootstrap=B, seed=3)
    plain = fit_fine_gray(X, Outcome("survival", (c == 1).astype(float), time=t, entry=entry),
                          c, 1, ("x", "z"))
    np.testing.assert_allclose(res.coef, plain.coef, rtol=1e-12)
    np.testing.assert_allclose(res.extra["robust_cov"], plain.cov, rtol=1e-12)
    draws = np.random.default_rng(3)
    coefs = []
    for _ in range(B):
        m = draws.choice(np.arange(t.size), size=t.size, replace=True)
        d = fine_gray_data(t[m], c[m], 1, entry=entry[m])
        frame = pd.DataFrame(d.take(X[m]), columns=["x", "z"]).assign(
            start=d.start, stop=d.stop, event=d.event, w=d.weight)
        # robust=True only changes lifelines' variance (its warning about non-integer weights
        # is about the variance), not the coefficients compared here
        cph = CoxPHFitter().fit(frame, "stop", "event", weights_col="w", entry_col="start",
                                robust=True)
        coefs.append(cph.params_[["x", "z"]].to_numpy(float))
    np.testing.assert_allclose(res.cov, np.cov(np.array(coefs), rowvar=False), rtol=1e-4)
    assert res.extra["bootstrap"] == B and res.extra["bootstrap_failed"] == 0


def test_fine_gray_bootstrap_resamples_whole_clusters() -> None:
    """With a cluster column the units drawn are the clusters, all rows of a drawn cluster
    together (Efron & Tibshirani 1993, ch. 6): against resamples of clusters drawn here with
    the same generator calls, expanded afresh and refitted with lifelines' CoxPHFitter
    (tolerance 1e-4 relative, as above)."""
    rng = np.random.default_rng(43)
    x, t, c, _ = _simulate(120, 0.5, rng)
    cluster = np.sort(rng.integers(0, 50, t.size))  # 50 clusters of unequal size
    o = Outcome("survival", (c == 1).astype(float), time=t, cluster=cluster)
    res = fit_fine_gray(x[:, None], o, c, 1, ("x",), bootstrap=6, seed=9)
    codes = np.unique(cluster)
    draws = np.random.default_rng(9)
    coefs = []
    for _ in range(6):
        pick = draws.choice(np.arange(codes.size), size=codes.size, replace=True)
        m = np.concatenate([np.flatnonzero(cluster == codes[u]) for u in pick])
        d = fine_gray_data(t[m], c[m], 1)
        frame = pd.DataFrame({"x": x[m][d.person], "start": d.start, "stop": d.stop,
                              "event": d.event, "w": d.weight})
        cph = CoxPHFitter().fit(frame, "stop", "event", weights_col="w", entry_col="start",
                                robust=True)
        coefs.append(float(cph.params_["x"]))
    assert res.cov[0, 0] == pytest.approx(float(np.var(coefs, ddof=1)), rel=1e-4)


@pytest.mark.long
@pytest.mark.parametrize("beta", [0.0, 0.5])
def test_fine_gray_bootstrap_coverage_with_heavy_delayed_entry(beta: float) -> None:
    """400 seeded replicates of Fine & Gray's design with heavy delayed entry (entry uniform on
    0-1.5; Beyersmann et al. 2009), n = 300, 100 bootstrap resamples each: the Wald interval
    with the bootstrap covariance covers the true log SHR in 0.95 of them within two-sided
    binomial bounds (0.001 and 0.999 quantiles: 0.9125 to 0.98), where the sandwich's falls
    short (benchmarks/checks/fine_gray.py, README's checks table). Measured: beta 0, 379/400
    = 0.948 (MC SE 0.011); beta 0.5, 369/400 = 0.923 (0.013), near the lower bound, with mean
    estimate - beta +0.025 and +0.020 (MC SE 0.009 each) and mean SE / empirical SD 0.96 and
    0.94; 260 s and 223 s under pytest on two shared cores.

    The estimate running high is the estimator's finite-sample behaviour under this entry
    (Geskus 2011: the weights are consistent under independent left truncation), not an
    error of the fit or of the weights' estimation:

    - on these 400 + 400 replicates (refitted once without the bootstrap) the fit without the
      expansion equals the Cox engine's fit of the counting-process expansion (largest
      difference 3e-14); with the design's true weights G(t-) H(t) = (1 - t/3) min(t/1.5, 1)
      in place of the estimated ones the mean error is the same, +0.029 and +0.022 (MC SE
      0.008, 0.009);
    - with given weights the fit is the root of the score equation written out from its
      definition (test_delayed_entry_fit_with_given_weights_solves_the_weighted_score_equation);
    - the mean error shrinks with n, the same with estimated and with true weights: at log SHR
      0.5 +0.022, +0.008, +0.003, +0.000 (MC SE 0.003, 0.002, 0.001, 0.0005; true weights
      +0.022, +0.009, +0.004, +0.000) at n = 300, 1,200, 4,800, 19,200; at 0 +0.011, +0.004,
      +0.000, -0.000 (0.003, 0.001, 0.001, 0.0004); 4,000 replicates each, ``python
      benchmarks/checks/fine_gray.py --mean-error-by-n 300 1200 4800 19200 --replicates 4000
      --seed 1`` (about 10 min of CPU). Without delayed entry the mean estimates are -0.004
      and 0.494 (README's checks table).

    A bias of 0.1 empirical SD (0.02 / 0.19) costs a 95% Wald interval about 0.1 point of
    coverage (0.949, normal theory), so the shortfall at 0.5 (0.923) is the SE (0.94 of the
    SD), which this band judges; the band stays as it is, and no mean-error bound is asserted
    at this n."""
    rng = np.random.default_rng(71 + int(10 * beta))
    z = stats.norm.ppf(0.975)
    hits = 0
    reps = 400
    for i in range(reps):
        x, t, c, entry = _simulate(300, beta, rng, delayed=True)
        o = Outcome("survival", (c == 1).astype(float), time=t, entry=entry)
        res = fit_fine_gray(x[:, None], o, c, 1, ("x",), bootstrap=100, seed=i)
        hits += abs(res.coef[0] - beta) <= z * res.se()[0]
    lo, hi = stats.binom.ppf([0.001, 0.999], reps, 0.95) / reps
    assert lo <= hits / reps <= hi


# --------------------------------------------------------------------------- in an analysis


def _cr_frame(n: int = 1500, seed: int = 5, beta: float = 0.5) -> pd.DataFrame:
    """Fine & Gray's design with the exposure x (per 10 units above 50) and an adjuster z."""
    rng = np.random.default_rng(seed)
    s = rng.normal(size=n)
    z = rng.normal(size=n)
    lin = beta * s + 0.3 * z
    f1_inf = 1 - 0.7 ** np.exp(lin)
    is1 = rng.random(n) < f1_inf
    u = rng.random(n)
    t1 = -np.log(1 - (1 - (1 - u * f1_inf) ** np.exp(-lin)) / 0.3)
    t2 = rng.exponential(1 / np.exp(0.5 * s))
    T = np.where(is1, t1, t2)
    C = rng.uniform(0, 3, n)
    return pd.DataFrame({"x": 50 + 10 * s, "z": z, "t": np.minimum(T, C),
                         "ev": np.where(T <= C, np.where(is1, 1, 2), 0)})


def _cr_raw(outcome: dict[str, Any], forms: tuple[str, ...] = ("linear",)) -> dict[str, Any]:
    return {"study": "sim", "cohorts": [{"name": "sim", "path": "sim.parquet"}],
            "groupings": {"x": {"cuts": [50]}}, "risk_thresholds": [0.1, 0.2],
            "analyses": [{"name": "a", "outcome": outcome, "exposure": "x", "adjust": ["z"],
                          "continuous": {"forms": list(forms)}}]}


def _cr_refit(df: pd.DataFrame, outcome: dict[str, Any]) -> tuple[Spec, Refit]:
    spec = parse_spec(_cr_raw(outcome), base=Path("."))
    a = spec.analyses[0]
    return spec, refit_analysis(analysis_sample(df, a, spec), a, spec, "sim")


COMPETING = {"type": "survival", "event": "ev", "time": "t", "horizon": 1.0,
             "event_of_interest": 1, "competing": [2]}


def test_cause_specific_fits_treat_competing_events_as_censored() -> None:
    # the cause-specific Cox model: lifelines' CoxPHFitter with competing events censored
    df = _cr_frame()
    _, r = _cr_refit(df, COMPETING)
    f = r.get("linear", "continuous")
    assert f is not None and f.result.ok
    cs = df.assign(d=(df["ev"] == 1).astype(int))
    lin = r.get("linear", "legacy")
    assert lin is not None
    ref = CoxPHFitter().fit(cs[["t", "d", "x", "z"]], "t", "d")
    np.testing.assert_allclose(lin.result.coef, ref.params_[["x", "z"]].to_numpy(), rtol=1e-5)


def test_risk_at_the_horizon_is_the_cumulative_incidence() -> None:
    # Fine & Gray's design, true CIF at t = 1: 1 - [1 - 0.3 (1 - e^-1)]^exp(0.5 s + 0.3 z).
    df = _cr_frame(n=3000)
    spec, r = _cr_refit(df, COMPETING)
    f = r.get("linear", "continuous")
    assert f is not None
    rf = risk_fit(r, f, risk_scale(r.analysis, spec))
    assert "Fine–Gray" in rf.note and "cumulative incidence" in rf.scale.label
    s = (df["x"].to_numpy() - 50) / 10
    truth = 1 - (1 - 0.3 * (1 - np.exp(-1.0))) ** np.exp(0.5 * s + 0.3 * df["z"].to_numpy())
    # individual predictions: mean absolute error below 0.015 (common practice; n = 3000)
    assert np.mean(np.abs(rf.risk - truth)) < 0.015
    # the exposure's curve has the Fine–Gray slope (log SHR 0.05 per unit), within 3 SE
    assert abs(float(rf.curve(np.array([60.0]), 0)[0] - rf.curve(np.array([50.0]), 0)[0])
               - 0.5) < 3 * 10 * fine_gray_fit(r, f).se()[0]
    # one minus the cause-specific model's survival (competing events censored) would
    # overstate it: on average by more than 0.02 here
    b = f.exposure_coef()[0]
    rows = f.exposure_basis(r.x) @ b
    naive = from_result(r, f.result, rf.scale, lambda x, level=0: f.exposure_basis(x) @ b, rows,
                        "linear", "continuous", "")
    assert naive.risk.mean() > truth.mean() + 0.02
    assert abs(rf.risk.mean() - truth.mean()) < 0.01


def test_net_benefit_of_treating_all_uses_aalen_johansen() -> None:
    # treat all: NB = F(h) - (1 - F(h)) p/(1 - p), F from lifelines' AalenJohansenFitter
    df = _cr_frame()
    spec, r = _cr_refit(df, COMPETING)
    nb = net_benefit_table(r, spec)
    every = nb[nb["rule"] == "treat all"]
    assert set(every["method"]) == {"Aalen-Johansen at 1"}
    times, cif = _lifelines_cif(df["t"].to_numpy(), df["ev"].to_numpy())
    F = float(cif[np.searchsorted(times, 1.0, side="right") - 1])
    p = every["threshold"].to_numpy()
    np.testing.assert_allclose(every["net_benefit"].to_numpy(), F - (1 - F) * p / (1 - p),
                               atol=1e-10)


# --------------------------------------------------------------------------- spec and data


def test_spec_rejects_the_event_of_interest_among_the_competing_codes() -> None:
    raw = _cr_raw({**COMPETING, "competing": [1, 2]})
    with pytest.raises(SpecError, match=r"outcome\.competing: \[1, 2\] lists the event of "):
        parse_spec(raw, base=Path("."))


def test_spec_reads_the_competing_codes() -> None:
    spec = parse_spec(_cr_raw({**COMPETING, "event_of_interest": 2, "competing": [1]}),
                      base=Path("."))
    o = spec.analyses[0].outcome
    assert (o.event_of_interest, o.competing, o.has_competing) == (2, (1,), True)
    plain = parse_spec(_cr_raw({"type": "survival", "event": "ev", "time": "t"}), base=Path("."))
    assert not plain.analyses[0].outcome.has_competing


def test_event_codes_outside_the_declared_ones_are_named(tmp_path: Path) -> None:
    df = _cr_frame(n=200)
    df.loc[:4, "ev"] = 3
    df.to_parquet(tmp_path / "sim.parquet")
    spec = parse_spec(_cr_raw(COMPETING), base=tmp_path)
    problems = data_problems(spec)
    assert any("'ev' (outcome.event) holds codes 3" in p and "outcome.competing" in p
               for p in problems), problems
    ok = parse_spec(_cr_raw({**COMPETING, "competing": [2, 3]}), base=tmp_path)
    assert not [p for p in data_problems(ok) if "outcome.event" in p]


def test_subdistribution_table_recovers_the_simulated_ratio() -> None:
    # Fine & Gray's design (log SHR 0.05 per unit of x): the linear form's group contrast is
    # within 3 SE of 0.05 (x_value - x_reference); its cause-specific ratio is lifelines'
    # CoxPHFitter coefficient (competing events censored) times the same distance
    df = _cr_frame(n=2000, seed=9)
    spec, r = _cr_refit(df, COMPETING)
    tab = subdistribution_table(r, spec)
    assert list(tab.columns) == list(SUB_COLUMNS)
    row = tab[(tab["form"] == "linear") & (tab["adjustment"] == "legacy")].iloc[0]
    dx = row["x_value"] - row["x_reference"]
    assert abs(row["estimate"] - 0.05 * dx) < 3 * row["se"]
    cs = df.assign(d=(df["ev"] == 1).astype(int))
    ref = CoxPHFitter().fit(cs[["t", "d", "x", "z"]], "t", "d")
    assert np.log(row["cs_effect"]) == pytest.approx(ref.params_["x"] * dx, rel=1e-5)
    assert row["events"] == int((df["ev"] == 1).sum())
    assert set(tab["status"]) == {"ok"}
    # an analysis without competing events gives an empty table with its columns
    _, plain = _cr_refit(df.assign(ev=(df["ev"] == 1).astype(int)),
                         {"type": "survival", "event": "ev", "time": "t", "horizon": 1.0})
    assert subdistribution_table(plain, spec).empty


# --------------------------------------------------------------------------- the demo


@pytest.mark.workflow
def test_demo_survival_analysis_has_competing_deaths_and_a_fading_effect(demo_out: Path) -> None:
    """The demo's death_egfr (unbin.demo: other-cause deaths compete; the eGFR effect fades
    after EGFR_FADE_AFTER years): the windows test sees the change, the decisions read the
    cumulative incidence, and the subdistribution table has every form."""
    from unbin.results.tables import read_table

    def rows(table: str) -> pd.DataFrame:
        t = read_table(demo_out / "tables" / f"{table}.parquet")
        return t[(t["analysis"] == "death_egfr") & (t["cohort"] == "lindenfeld")]

    w = rows("windows")
    test = w[(w["row_type"] == "test") & (w["form"] == "legacy") & (w["adjustment"] == "legacy")]
    assert float(test["p"].iloc[0]) < 0.05
    nb = rows("net_benefit")
    assert set(nb.loc[nb["status"] == "ok", "method"]) == {"Aalen-Johansen at 5"}
    th = rows("thresholds")
    assert th["risk_scale"].str.startswith("cumulative incidence of death_cause = 1").all()
    sub = rows("subdistribution")
    assert set(sub["form"]) == {"legacy", "linear", "spline", "fp"}
    assert (sub["status"] == "ok").all() and (sub["competing_events"] > 0).all()


def test_a_fine_gray_model_that_fails_is_recorded_not_raised(
        monkeypatch: pytest.MonkeyPatch) -> None:
    # error path: every Fine–Gray fit fails; the decision tables name it per model and go on
    import unbin.models.competing as competing
    from unbin.models.base import failed_fit

    def failing(X: np.ndarray, outcome: Outcome, cause: np.ndarray, interest: int,
                names: tuple[str, ...]):  # type: ignore[no-untyped-def]
        return failed_fit("survival", names, outcome.n, 0, "singular information (simulated)")

    monkeypatch.setattr(competing, "fit_fine_gray", failing)
    df = _cr_frame(n=400)
    spec, r = _cr_refit(df, COMPETING)
    nb = net_benefit_table(r, spec)
    bad = nb[nb["status"] == "failed"]
    assert set(bad["model"]) == {"legacy", "linear"}
    assert bad["reason"].str.contains("singular information").all()
    assert (nb.loc[nb["rule"] == "treat all", "status"] == "ok").all()
