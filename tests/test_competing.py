"""Competing risks: Aalen–Johansen cumulative incidence and the Fine–Gray model."""

from __future__ import annotations

import numpy as np
import pytest
from lifelines import AalenJohansenFitter
from scipy import optimize, stats

from unbin.models.base import Outcome
from unbin.models.competing import aalen_johansen, fine_gray_data, fit_fine_gray, step_at


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


def _simulate(n: int, beta: float, rng: np.random.Generator, p: float = 0.3,
              delayed: bool = False) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    """Fine & Gray's (1999, sec. 5) design, as in Beyersmann et al. (2009): the cumulative
    incidence of cause 1 is F1(t|x) = 1 - [1 - p(1 - exp(-t))]^exp(beta x), a proportional
    subdistribution hazard with log ratio beta; cause 2 (probability 1 - F1(inf|x)) follows an
    exponential with rate exp(0.5 x). Censoring uniform on (0, 3); optionally delayed entry
    uniform on (0, 0.5) (people whose event or censoring falls before entry are never seen)."""
    rows: list[np.ndarray] = []
    while sum(r.shape[0] for r in rows) < n:
        x = rng.normal(size=n)
        f1_inf = 1 - (1 - p) ** np.exp(beta * x)
        is1 = rng.random(n) < f1_inf
        u = rng.random(n)
        t1 = -np.log(1 - (1 - (1 - u * f1_inf) ** np.exp(-beta * x)) / p)
        t2 = rng.exponential(1 / np.exp(0.5 * x))
        T = np.where(is1, t1, t2)
        C = rng.uniform(0, 3, n)
        L = rng.uniform(0, 0.5, n) if delayed else np.zeros(n)
        obs = np.minimum(T, C)
        cause = np.where(T <= C, np.where(is1, 1, 2), 0)
        seen = obs > L
        rows.append(np.column_stack([x, obs, cause, L])[seen])
    a = np.vstack(rows)[:n]
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
    # 200 seeded replicates of Fine & Gray's design (Beyersmann et al. 2009): the 95% Wald
    # interval from the cluster-robust covariance covers the true log SHR in 0.95 of them,
    # within two-sided binomial bounds (0.91, 0.98); at beta = 0 this is the type-I error.
    rng = np.random.default_rng(31 + int(10 * beta))
    z = stats.norm.ppf(0.975)
    hits = 0
    reps = 200
    for _ in range(reps):
        res = _fit(*_simulate(300, beta, rng))
        hits += abs(res.coef[0] - beta) <= z * res.se()[0]
    lo, hi = stats.binom.ppf([0.001, 0.999], reps, 0.95) / reps
    assert lo <= hits / reps <= hi
