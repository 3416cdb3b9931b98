"""The Fine–Gray fit without the counting-process expansion (unbin.models.fine_gray) against
the expansion itself (Geskus 2011), refitted as a weighted Cox model by unbin's Cox engine and
by lifelines' CoxPHFitter."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from lifelines import CoxPHFitter

from helpers import assert_same_fields, lifelines_on_expansion, load_check
from unbin.models import fit
from unbin.models.base import Outcome
from unbin.models.competing import (
    EXPANSION_ROWS,
    censoring_survival_before,
    entry_distribution,
    fine_gray_bootstrap_cov,
    fine_gray_data,
    fine_gray_near,
    fine_gray_outcome,
    fit_fine_gray,
)
from unbin.models.cox import baseline_cumhaz
from unbin.models.robust import cox_scores, sandwich


def _sample(seed: int, n: int, *, delayed: bool, weighted: bool, strata: bool,
            cluster: bool = False) -> tuple[np.ndarray, Outcome, np.ndarray]:
    """Fine & Gray's design (benchmarks/checks/fine_gray.py) with times rounded up to 1/12 of
    a unit (many tied event times), an invented second covariate, optional case weights,
    strata and clusters."""
    rng = np.random.default_rng(seed)
    a = load_check("fine_gray").draw(n, 0.5, rng, delayed)
    x, t, c, entry = a[:, 0], np.ceil(a[:, 1] * 12) / 12, a[:, 2], a[:, 3]
    entry = np.floor(entry * 12) / 12 if delayed else None
    X = np.column_stack([x, rng.binomial(1, 0.4, n), rng.normal(size=n)])
    w = rng.uniform(0.5, 2.0, n) if weighted else None
    s = rng.integers(0, 3, n) if strata else None
    cl = rng.integers(0, n // 3, n) if cluster else None
    o = Outcome("survival", (c == 1).astype(float), time=t, entry=entry, weights=w,
                weight_kind="sampling" if weighted else "frequency", strata=s, cluster=cl,
                cause=c, event_of_interest=1)
    return X, o, c


def _expansion_fit(X: np.ndarray, o: Outcome, c: np.ndarray) -> tuple[Any, Any, Any]:
    expanded, data = fine_gray_outcome(o, c, 1)
    ref = fit("survival", data.take(X), expanded, ("x", "z", "u"))
    assert ref.ok
    return ref, expanded, data


def _weight_terms_by_differences(X: np.ndarray, o: Outcome, c: np.ndarray, coef: np.ndarray,
                                 h: float = 1e-5) -> np.ndarray:
    """Each person's weight times the central difference of the expansion's Efron score
    (summed Cox score residuals, unbin.models.robust.cox_scores) with respect to their weight
    in the censoring and entry distributions alone (the rows' weights recomputed)."""
    assert o.time is not None
    t, entry = o.time, o.entry
    w = np.ones(o.n) if o.weights is None else np.asarray(o.weights, dtype=float)
    data = fine_gray_data(t, c, 1, entry=entry, weights=w)
    n = o.n
    who, stop = data.person[n:], data.stop[n:]
    strata = None if o.strata is None else np.asarray(o.strata)[data.person]

    def score(v: np.ndarray) -> np.ndarray:
        ratio = (censoring_survival_before(t, c, entry, v, stop)
                 * entry_distribution(t, entry, v, stop)
                 / (censoring_survival_before(t, c, entry, v, t[who])
                    * entry_distribution(t, entry, v, t[who])))
        ex = Outcome("survival", data.event, time=data.stop, entry=data.start, strata=strata,
                     weights=np.concatenate([w, w[who] * ratio]))
        return cox_scores(data.take(X), ex, coef, ties="efron").sum(axis=0)

    out = np.zeros((n, X.shape[1]))
    for person in range(n):
        up, down = w.copy(), w.copy()
        up[person] += h
        down[person] -= h
        out[person] = w[person] * (score(up) - score(down)) / (2 * h)
    return out


CASES = {
    "ties, delayed entry, weights": dict(delayed=True, weighted=True, strata=False),
    "ties, delayed entry, weights, strata, clusters": dict(delayed=True, weighted=True,
                                                           strata=True, cluster=True),
    "ties, no entry, strata": dict(delayed=False, weighted=False, strata=True),
}


@pytest.mark.parametrize("case", list(CASES))
def test_fit_equals_the_expansion_refitted_by_the_cox_engine(case: str) -> None:
    """Coefficients and log partial likelihood (1e-8), model-based standard errors, the
    sandwich with the weights taken as known and the sandwich with their estimation terms
    (1e-7), and the baseline (1e-9 relative) against the weighted Cox fit of the expanded
    rows. The reference sandwich is built here from the expansion alone: each person's Cox
    score residuals summed over their expanded rows (clustered by person, or by the cluster
    column, as the expansion's own robust variance is), plus their weight-estimation term as a
    central finite difference of the expansion's Efron score (finite-difference error ~1e-9)."""
    X, o, c = _sample(7, 150, **CASES[case])
    res = fit_fine_gray(X, o, c, 1, ("x", "z", "u"))
    assert res.ok
    ref, expanded, data = _expansion_fit(X, o, c)
    assert np.bincount(np.unique(o.time[c == 1], return_inverse=True)[1]).max() >= 3
    np.testing.assert_allclose(res.coef, ref.coef, rtol=0, atol=1e-8)
    assert res.loglik == pytest.approx(ref.loglik, abs=1e-8)
    assert res.extra["loglik0"] == pytest.approx(ref.extra["loglik0"], abs=1e-8)
    se = np.sqrt(np.diag(np.asarray(res.extra["model_cov"])))
    np.testing.assert_allclose(se, np.sqrt(np.diag(ref.extra["model_cov"])), atol=1e-7)
    np.testing.assert_allclose(np.sqrt(np.diag(np.asarray(res.extra["cov_weights_known"]))),
                               np.sqrt(np.diag(ref.cov)), atol=1e-7)
    assert res.extra["variance"] == ref.extra["variance"]
    assert res.extra["expanded_rows"] == data.stop.size
    # the sandwich with the weights' estimation terms, from the expansion
    own = np.zeros_like(X)
    np.add.at(own, data.person, cox_scores(data.take(X), expanded, ref.coef, ties="efron"))
    scores = own + _weight_terms_by_differences(X, o, c, ref.coef)
    clusters = np.arange(o.n) if o.cluster is None else o.cluster
    V, _ = sandwich(ref.extra["model_cov"], scores, clusters)
    np.testing.assert_allclose(np.sqrt(np.diag(res.cov)), np.sqrt(np.diag(V)), atol=1e-7)
    # the Breslow baseline of the expanded rows (the Cox engine's, at covariates 0)
    lp = X @ ref.coef
    base = baseline_cumhaz((data.take(lp) - lp.mean())[:, None], expanded.time, expanded.y,
                           [1.0], entry=expanded.entry, strata=expanded.strata,
                           weights=expanded.weights)
    got = res.extra["baseline"]
    assert list(got["stratum"]) == list(base["stratum"])
    np.testing.assert_allclose(got["time"], base["time"], rtol=0, atol=0)
    np.testing.assert_allclose(got["cumhaz"], base["cumhaz"] * np.exp(-lp.mean()), rtol=1e-9)


@pytest.mark.parametrize("case", list(CASES))
def test_fit_equals_lifelines_on_the_expanded_rows(case: str) -> None:
    """lifelines' CoxPHFitter (Efron ties, weights, entry, strata) on the expanded rows:
    coefficients to 1e-7 and its log partial likelihood to 1e-9 relative, lifelines' Newton
    run to its tightest tolerances."""
    X, o, c = _sample(11, 200, **CASES[case])
    res = fit_fine_gray(X, o, c, 1, ("x", "z", "u"))
    cph = lifelines_on_expansion(X, o, c, ("x", "z", "u"))
    np.testing.assert_allclose(res.coef, cph.params_[["x", "z", "u"]].to_numpy(float),
                               atol=1e-7)
    assert res.loglik == pytest.approx(float(cph.log_likelihood_), rel=1e-9)


def test_bootstrap_and_replicate_refits_equal_the_expansion() -> None:
    """The bootstrap covariance (refits started at the full-sample estimate) against the same
    resamples refitted from zero on their own expansions by the Cox engine (1e-10), and a
    replicate's refit from a start (fine_gray_near) against the full fit of the expansion."""
    X, o, c = _sample(5, 120, delayed=True, weighted=False, strata=False)
    res = fit_fine_gray(X, o, c, 1, ("x", "z", "u"))
    cov, failed = fine_gray_bootstrap_cov(X, o, c, 1, ("x", "z", "u"), 6, 4, init=res.coef)
    draws = np.random.default_rng(4)
    coefs = []
    for _ in range(6):
        m = draws.choice(np.arange(o.n), size=o.n, replace=True)
        ref, _, _ = _expansion_fit(X[m], o.subset(m), c[m])
        coefs.append(ref.coef)
    assert failed == 0
    np.testing.assert_allclose(cov, np.cov(np.array(coefs), rowvar=False), atol=1e-10)
    m = np.random.default_rng(8).choice(np.arange(o.n), size=o.n, replace=True)
    coef, base = fine_gray_near(X[m], o.subset(m), res.coef)
    ref, _, _ = _expansion_fit(X[m], o.subset(m), c[m])
    assert coef is not None and base is not None
    np.testing.assert_allclose(coef, ref.coef, atol=1e-8)


def test_a_registry_sized_expansion_is_not_needed() -> None:
    """Times in days over three years and 60,000 rows: the expansion would need more rows
    than it may build (models.competing.EXPANSION_ROWS, which still guards building it), the
    fit needs none and recovers the known log subdistribution hazard ratio 0.5 of Fine & Gray's
    design (benchmarks/checks/fine_gray.py; 4.5 standard errors, about 0.02)."""
    rng = np.random.default_rng(3)
    a = load_check("fine_gray").draw(60_000, 0.5, rng, True)
    t = np.ceil(a[:, 1] * 365) / 365
    entry = np.floor(a[:, 3] * 365) / 365
    c = a[:, 2]
    o = Outcome("survival", (c == 1).astype(float), time=t, entry=entry, cause=c,
                event_of_interest=1)
    with pytest.raises(ValueError, match="counting-process expansion would add"):
        fine_gray_data(t, c, 1, entry=entry)
    res = fit_fine_gray(a[:, :1], o, c, 1, ("x",))
    assert res.ok
    assert int(res.extra["expanded_rows"]) > EXPANSION_ROWS  # type: ignore[call-overload]
    se = float(np.sqrt(res.cov[0, 0]))
    assert 0.005 < se < 0.03
    assert abs(res.coef[0] - 0.5) < 4.5 * se


def test_breslow_ties_equal_the_expansion() -> None:
    """With Breslow's handling of ties (the fits use Efron's): the Newton fit's coefficients,
    log partial likelihood and information, and each person's summed score residuals, against
    the Cox engine's Breslow fit of the expanded rows and unbin.models.robust.cox_scores on
    them (which tests/models/test_robust.py checks by brute force)."""
    from unbin.models import fine_gray
    from unbin.models.competing import fine_gray_layout
    from unbin.models.cox import fit_cox

    X, o, c = _sample(13, 150, delayed=True, weighted=True, strata=True)
    L = fine_gray_layout(o, c, 1)
    got = fine_gray.fit(L, X, ties="breslow")
    expanded, data = fine_gray_outcome(o, c, 1)
    ref = fit_cox(data.take(X), expanded.time, expanded.y, entry=expanded.entry,
                  strata=expanded.strata, weights=expanded.weights, ties="breslow")
    assert got.converged and ref.converged
    np.testing.assert_allclose(got.coef, ref.coef, atol=1e-8)
    assert got.loglik == pytest.approx(ref.loglik, abs=1e-8)
    np.testing.assert_allclose(np.sqrt(np.diag(got.cov)), np.sqrt(np.diag(ref.cov)), atol=1e-7)
    own = np.zeros_like(X)
    np.add.at(own, data.person, cox_scores(data.take(X), expanded, ref.coef, ties="breslow"))
    np.testing.assert_allclose(fine_gray.score_terms(L, X, ref.coef, ties="breslow"), own,
                               atol=1e-10)


@pytest.mark.parametrize("strata", [False, True])
def test_secant_refits_of_replicates_equal_newtons_fit_to_1e_13(strata: bool) -> None:
    """A bootstrap replicate as count weights on the drawn rows (tied times, delayed entry,
    optionally strata), refitted from the full-sample estimate by quasi-Newton steps
    (``fine_gray.fit_near``; through ``fine_gray_near`` with its baseline), against Newton's
    method of :func:`unbin.models.fine_gray.fit` iterated to tol 1e-13 from zero (the
    reference; that fit is checked against lifelines on the expanded rows above), to a tenth of
    the refit's stopping bound on the linear predictor (``10 * tol``: 1e-8 at tol 1e-9)."""
    from dataclasses import replace

    from unbin.models import fine_gray
    from unbin.models.competing import fine_gray_layout

    X, o, c = _sample(21, 1500, delayed=True, weighted=False, strata=strata)
    start = fit_fine_gray(X, o, c, 1, ("x", "z", "u")).coef
    for seed in range(3):
        counts = np.random.default_rng(seed).multinomial(o.n, np.full(o.n, 1.0 / o.n))
        m = np.flatnonzero(counts)
        rep = replace(o.subset(m), weights=counts[m].astype(float), cluster=None)
        L = fine_gray_layout(rep, c[m], 1)
        ref = fine_gray.fit(L, X[m], tol=1e-13)
        assert ref.converged
        got = fine_gray.fit_near(L, X[m], start)
        assert got is not None
        assert float(np.abs(X[m] @ (got - ref.coef)).max()) <= 1e-9
        coef, base = fine_gray_near(X[m], rep, start)
        assert coef is not None and base is not None
        np.testing.assert_array_equal(coef, got)
    # from far off, fit_near declines within few steps and fine_gray_near falls back to
    # Newton's method, which reaches the same maximum
    assert fine_gray.fit_near(L, X[m], start + 3.0, max_iter=3) is None
    far, _ = fine_gray_near(X[m], rep, start + 3.0)
    assert far is not None
    assert float(np.abs(X[m] @ (far - ref.coef)).max()) <= 1e-7


def _replicate(o: Outcome, c: np.ndarray, seed: int) -> tuple[np.ndarray, Outcome]:
    """A bootstrap replicate as count weights on the drawn rows (as the decision bootstrap
    draws them): the rows and their outcome."""
    from dataclasses import replace

    counts = np.random.default_rng(seed).multinomial(o.n, np.full(o.n, 1.0 / o.n))
    m = np.flatnonzero(counts)
    return m, replace(o.subset(m), weights=counts[m].astype(float), cluster=None)


@pytest.mark.parametrize("strata", [False, True])
def test_replicate_refits_from_the_full_information_equal_newtons_fit_to_1e_13(
        strata: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    """``fine_gray.fit_replicate`` (the full sample's centring, scaling and information at
    its estimate, prepared once by ``near_start``; tied times, delayed entry, count weights,
    optionally strata) against Newton's method of :func:`unbin.models.fine_gray.fit` iterated
    to tol 1e-13 (checked against lifelines on the expanded rows above): within 1e-9 on every
    row's linear predictor (the refit's bound is 5e-9; on the demo it ended within 4.2e-10),
    without evaluating any replicate's information; with a stop 1e5 times looser the same
    refits end farther than that from the maximum."""
    from unbin.models import fine_gray
    from unbin.models.competing import fine_gray_layout

    X, o, c = _sample(21, 1500, delayed=True, weighted=False, strata=strata)
    start = fit_fine_gray(X, o, c, 1, ("x", "z", "u")).coef
    near = fine_gray.near_start(fine_gray_layout(o, c, 1), X, start)
    assert near is not None
    cases = []
    for seed in range(3):
        m, rep = _replicate(o, c, seed)
        L = fine_gray_layout(rep, c[m], 1)
        ref = fine_gray.fit(L, X[m], tol=1e-13)
        assert ref.converged
        cases.append((m, L, ref.coef))

    def no_information(*args: Any, **kwargs: Any) -> Any:
        raise AssertionError("a replicate evaluated its own information")

    with monkeypatch.context() as mp:
        mp.setattr(fine_gray, "_evaluate", no_information)
        for m, L, ref in cases:
            got = fine_gray.fit_replicate(near, X, m, L)
            assert got is not None
            assert float(np.abs(X[m] @ (got - ref)).max()) <= 1e-9
    monkeypatch.setattr(fine_gray, "_REPLICATE_SETTLE", 1e5)
    loose = [fine_gray.fit_replicate(near, X, m, L) for m, L, _ in cases]
    assert max(float(np.abs(X[m] @ (g - ref)).max())
               for g, (m, _, ref) in zip(loose, cases, strict=True) if g is not None) > 1e-9


def test_replicate_refit_equals_lifelines_on_the_replicates_expanded_rows() -> None:
    """A replicate's refit from the full sample's start (``fine_gray_replicate``, as the
    decision bootstrap calls it: the drawn rows repeated as drawn, delayed entry, strata, tied
    times) against the
    weighted-Cox identity of Fine & Gray's model: lifelines' CoxPHFitter on the replicate's
    counting-process expansion with the censoring-and-entry weights re-estimated on the
    replicate (Efron ties, weights, entry, strata; tightest tolerances): coefficients to 1e-7;
    the baseline equals the Cox engine's Breslow baseline of that expansion (1e-9 relative)."""
    from unbin.models.competing import fine_gray_replicate

    X, o, c = _sample(31, 300, delayed=True, weighted=False, strata=True)
    start = fit_fine_gray(X, o, c, 1, ("x", "z", "u")).coef
    m = np.sort(np.random.default_rng(5).integers(0, o.n, o.n))
    rep = o.subset(m)
    coef, base = fine_gray_replicate(X, m, rep, o, start)
    assert coef is not None and base is not None
    d = fine_gray_data(rep.time, c[m], 1, entry=rep.entry, weights=rep.weights)
    Xm = X[m]
    frame = pd.DataFrame(d.take(Xm), columns=["x", "z", "u"]).assign(
        start=d.start, stop=d.stop, event=d.event, w=d.weight,
        s=np.asarray(rep.strata)[d.person])
    cph = CoxPHFitter().fit(frame, "stop", "event", weights_col="w", entry_col="start",
                            strata=["s"], robust=True,
                            fit_options={"precision": 1e-14, "r_precision": 1e-16})
    np.testing.assert_allclose(coef, cph.params_[["x", "z", "u"]].to_numpy(float), atol=1e-7)
    expanded, _ = fine_gray_outcome(rep, c[m], 1)
    lp = Xm @ coef
    ref = baseline_cumhaz((d.take(lp) - lp.mean())[:, None], expanded.time, expanded.y, [1.0],
                          entry=expanded.entry, strata=expanded.strata,
                          weights=expanded.weights)
    assert list(base["stratum"]) == list(ref["stratum"])
    np.testing.assert_allclose(base["cumhaz"], ref["cumhaz"] * np.exp(-lp.mean()), rtol=1e-9)


@pytest.mark.parametrize("case", list(CASES))
def test_a_replicates_layout_from_the_full_samples_times_is_its_own(case: str) -> None:
    """``replicate_layout`` (a replicate's Fine–Gray layout from the full sample's sorted times
    and each row's position in them) against ``fine_gray_layout`` of the replicate laid out
    from scratch, field by field and bit for bit (the rows repeated as drawn, and count
    weights): the censoring and entry weights re-estimated on the replicate are the same.
    A structural check; the layout's statistics are checked against the expansion above."""
    import dataclasses

    from unbin.models.competing import fine_gray_layout, replicate_layout

    X, o, c = _sample(17, 400, **CASES[case])
    for seed in range(2):
        m = np.sort(np.random.default_rng(seed).integers(0, o.n, o.n))
        for rows, rep in ((m, dataclasses.replace(o.subset(m), cluster=None)),
                          _replicate(o, c, seed)):
            got = replicate_layout(o, rows, rep)
            fresh = dataclasses.replace(rep, cache={})
            assert_same_fields(got, fine_gray_layout(fresh, c[rows], 1))
