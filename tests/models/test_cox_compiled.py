"""The Cox engine's compiled evaluation and standardised copy (``models/compiled/cox_*.py``)
against the numpy path (both forced with ``UNBIN_COMPILED``) and against outside references.

References: statsmodels ``PHReg(ties="efron"/"breslow")`` (its ``loglike``, ``score`` and
``hessian`` at given coefficients, strata and delayed entry; statsmodels keeps a row entering
exactly at an event time in that risk set, so entries are moved off the event times for it),
and lifelines ``CoxPHFitter`` (strata, entry, case weights, Efron ties) for whole fits.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from lifelines import CoxPHFitter

from unbin.models.cox import fit_cox, prepare_layout
from unbin.models.cox import likelihood as lk
from unbin.models.cox.fit import _replicate_design
from unbin.models.cox.layout import Layout

TIGHT = {"precision": 1e-14, "r_precision": 1e-16}


def _tied_cohort(seed: int = 31) -> dict[str, np.ndarray]:
    """Two strata sharing their tied event times: at time 5 each stratum has 30 events, at
    time 7 two, at time 9 one (an untied event time), plus random rows on 1..14; delayed entry
    at the tied times 5 and 7 (a row entering at t is at risk after t), and case weights."""
    rng = np.random.default_rng(seed)
    parts_t, parts_e, parts_s = [], [], []
    for s in (0, 1):
        fixed_t = np.r_[np.full(30, 5.0), np.full(2, 7.0), [9.0]]
        rand_t = rng.integers(1, 15, 250).astype(float)
        rand_t[np.isin(rand_t, (5.0, 7.0, 9.0))] += 0.5  # keep the counts at 5, 7, 9 exact
        parts_t += [fixed_t, rand_t]
        parts_e += [np.ones(fixed_t.size), (rng.uniform(size=rand_t.size) < 0.4) * 1.0]
        parts_s.append(np.full(fixed_t.size + rand_t.size, s))
    time = np.concatenate(parts_t)
    event = np.concatenate(parts_e)
    strata = np.concatenate(parts_s)
    n = time.size
    entry = np.zeros(n)
    late = (rng.uniform(size=n) < 0.25) & (time > 7.0)
    entry[late] = np.where(rng.uniform(size=late.sum()) < 0.5, 5.0, 7.0)
    X = np.column_stack([rng.normal(size=n), rng.binomial(1, 0.4, n), rng.uniform(40, 80, n),
                         rng.normal(size=n)])
    weights = rng.uniform(0.5, 2.5, n)
    return {"X": X, "time": time, "event": event, "strata": strata, "entry": entry,
            "weights": weights}


@pytest.fixture(scope="module")
def cohort() -> dict[str, np.ndarray]:
    return _tied_cohort()


def test_cohort_has_the_tie_patterns(cohort: dict[str, np.ndarray]) -> None:
    # (the data the checks below rely on: tied groups of 30 and 2 events, an untied one, in
    # both strata; entries at tied event times)
    L = prepare_layout(cohort["time"], cohort["event"], entry=cohort["entry"],
                       strata=cohort["strata"])
    d = np.bincount(L.b_idx[L.ev] - 1, minlength=L.k_time.size)
    for s in (0, 1):
        at = {t: d[k] for k, t in enumerate(L.k_time) if L.k_stratum[k] == s}
        assert at[5.0] >= 30 and at[7.0] >= 2 and at[9.0] == 1
    assert L.late_entry


def _evaluate(
    monkeypatch: pytest.MonkeyPatch, mode: str, L: Layout, X: np.ndarray, beta: np.ndarray,
    efron: bool, order: int = 2,
) -> tuple[float, np.ndarray, np.ndarray, np.ndarray]:
    """The evaluation at ``beta`` (on X's scale) by the path ``mode``; score and information
    mapped back to X's scale (the standardised coefficients are beta * scale)."""
    monkeypatch.setenv("UNBIN_COMPILED", mode)
    D, scale, _ = lk._standardised(X, L)
    assert D.compiled is (mode == "always")
    ll, score, info = lk._evaluate(L, D, beta * scale, efron, order)
    return ll, score * scale, info * np.outer(scale, scale), scale


@pytest.mark.parametrize("efron", [True, False], ids=["efron", "breslow"])
@pytest.mark.parametrize("design", ["plain", "strata", "entry", "weights", "all"])
def test_kernel_matches_numpy_path(
    monkeypatch: pytest.MonkeyPatch, cohort: dict[str, np.ndarray], efron: bool, design: str
) -> None:
    # source: the numpy path (models/cox/likelihood.py), itself checked against lifelines and
    # statsmodels in test_cox.py; the two differ only in summation order
    kw = {
        "plain": {}, "strata": {"strata": cohort["strata"]}, "entry": {"entry": cohort["entry"]},
        "weights": {"weights": cohort["weights"]},
        "all": {"strata": cohort["strata"], "entry": cohort["entry"],
                "weights": cohort["weights"]},
    }[design]
    L = prepare_layout(cohort["time"], cohort["event"], **kw)
    X = cohort["X"]
    for beta in (np.zeros(4), np.array([0.4, -0.6, 0.02, 0.3])):
        for order in (0, 1, 2):
            ref = _evaluate(monkeypatch, "never", L, X, beta, efron, order)
            got = _evaluate(monkeypatch, "always", L, X, beta, efron, order)
            assert got[0] == pytest.approx(ref[0], rel=1e-13, abs=1e-12)
            np.testing.assert_allclose(got[1], ref[1], rtol=1e-10, atol=1e-9)
            np.testing.assert_allclose(got[2], ref[2], rtol=1e-10, atol=1e-9)
            np.testing.assert_allclose(got[3], ref[3], rtol=1e-13)


def test_split_evaluation_matches_whole(
    monkeypatch: pytest.MonkeyPatch, cohort: dict[str, np.ndarray]
) -> None:
    # the fit's split path (log-likelihood, then score, then the information added at the
    # same point) gives the one-call evaluation's numbers (the kernel's own consistency)
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    L = prepare_layout(cohort["time"], cohort["event"], entry=cohort["entry"],
                       strata=cohort["strata"], weights=cohort["weights"])
    D, scale, _ = lk._standardised(cohort["X"], L)
    beta = np.array([0.3, 0.2, -0.01, 0.1]) * scale
    pt = lk._point(L, D, beta, True, False)
    score = lk._score(L, D, pt)
    score2, info = lk._information(L, D, pt)
    ll, score3, info3 = lk._evaluate(L, D, beta, True)
    assert pt.loglik == ll
    np.testing.assert_allclose(score, score3, rtol=1e-12, atol=1e-10)
    np.testing.assert_allclose(score2, score3, rtol=1e-12, atol=1e-10)
    # (the split path's information reuses the sums of r x its score formed, the whole
    # evaluation forms them beside the Gram product: the same sums in another order)
    np.testing.assert_allclose(info, info3, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("ties", ["efron", "breslow"])
def test_kernel_matches_statsmodels(
    monkeypatch: pytest.MonkeyPatch, cohort: dict[str, np.ndarray], ties: str
) -> None:
    # source: statsmodels PHReg(ties=..., strata=, entry=): loglike, score, hessian at beta
    # (entries moved off the event times: statsmodels counts entry <= t as at risk at t)
    entry = np.where(cohort["entry"] > 0, cohort["entry"] + 0.25, 0.0)
    L = prepare_layout(cohort["time"], cohort["event"], entry=entry, strata=cohort["strata"])
    ref = sm.PHReg(cohort["time"], cohort["X"], status=cohort["event"],
                   strata=cohort["strata"], entry=entry, ties=ties)
    for beta in (np.zeros(4), np.array([0.4, -0.6, 0.02, 0.3])):
        ll, score, info, _ = _evaluate(monkeypatch, "always", L, cohort["X"], beta,
                                       ties == "efron")
        assert ll == pytest.approx(ref.loglike(beta), rel=1e-12)
        np.testing.assert_allclose(score, ref.score(beta), rtol=1e-9, atol=1e-9)
        np.testing.assert_allclose(info, -ref.hessian(beta), rtol=1e-9, atol=1e-9)


def test_compiled_fit_matches_lifelines_with_strata_entry_weights(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # source: lifelines CoxPHFitter(weights_col=, strata=, entry_col=) (Efron ties,
    # model-based variance); integer weights, as lifelines warns on others
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    c = _tied_cohort(seed=47)
    w = np.random.default_rng(5).integers(1, 4, c["time"].size)
    fit = fit_cox(c["X"], c["time"], c["event"], entry=c["entry"], strata=c["strata"], weights=w)
    frame = pd.DataFrame(c["X"], columns=["a", "b", "c", "d"]).assign(
        T=c["time"], E=c["event"], S=c["strata"], en=c["entry"], W=w)
    cph = CoxPHFitter().fit(frame, "T", "E", weights_col="W", entry_col="en", strata=["S"],
                            fit_options=TIGHT)
    assert fit.converged, fit.message
    np.testing.assert_allclose(fit.coef, cph.params_.to_numpy(), rtol=1e-6)
    np.testing.assert_allclose(np.sqrt(np.diag(fit.cov)), cph.standard_errors_.to_numpy(),
                               rtol=1e-6)
    assert fit.loglik == pytest.approx(cph.log_likelihood_, abs=1e-8)


def test_compiled_fit_with_subsample_start_matches_numpy_fit(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # source: the numpy path's fit (itself checked against lifelines in test_cox.py). Enough
    # events for the subsample start (its designs inherit the compiled choice), heavy ties
    fits = {}
    rng = np.random.default_rng(2)
    n = 60_000
    X = np.column_stack([rng.normal(size=n), rng.binomial(1, 0.3, n), rng.normal(size=n)])
    latent = rng.exponential(1 / np.exp(X @ np.array([0.5, -0.3, 0.2]) - 0.5))
    follow = rng.uniform(0.5, 3.0, n)
    time = np.ceil(np.minimum(latent, follow) * 50)
    event = (latent <= follow) * 1.0
    strata = rng.integers(0, 3, n)
    assert event.sum() > 10_000  # (fit_cox's subsample start needs that many)
    for mode in ("never", "always"):
        monkeypatch.setenv("UNBIN_COMPILED", mode)
        fits[mode] = fit_cox(X, time, event, strata=strata)
    a, b = fits["never"], fits["always"]
    assert a.converged and b.converged
    np.testing.assert_allclose(b.coef, a.coef, rtol=0, atol=1e-9)
    np.testing.assert_allclose(b.cov, a.cov, rtol=1e-7)
    assert b.loglik == pytest.approx(a.loglik, rel=1e-13)


@pytest.mark.parametrize("layout", ["C", "F"])
def test_standardised_copy_matches_numpy_path(
    monkeypatch: pytest.MonkeyPatch, cohort: dict[str, np.ndarray], layout: str
) -> None:
    # source: the numpy path's gather (rows in time order, centred and scaled); here with rows
    # dropped by the layout (a row entering after its stratum's last event time is at risk at
    # no event time) and X in C or Fortran order
    entry = cohort["entry"].copy()
    entry[:5] = 100.0
    time = cohort["time"].copy()
    time[:5] = 101.0
    event = cohort["event"].copy()
    event[:5] = 0.0
    L = prepare_layout(time, event, entry=entry, strata=cohort["strata"])
    assert L.order.size < time.size
    X = np.asfortranarray(cohort["X"]) if layout == "F" else np.ascontiguousarray(cohort["X"])
    got = {}
    for mode in ("never", "always"):
        monkeypatch.setenv("UNBIN_COMPILED", mode)
        got[mode] = lk._standardised(X, L)
    (Dn, sn, sdn), (Dc, sc, sdc) = got["never"], got["always"]
    np.testing.assert_allclose(Dc.X1, Dn.X1, rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(sc, sn, rtol=1e-13)
    np.testing.assert_allclose(sdc, sdn, rtol=1e-13)
    np.testing.assert_allclose(Dc.xwe, Dn.xwe, rtol=1e-12, atol=1e-11)
    np.testing.assert_allclose(Dc.reach, Dn.reach, rtol=1e-12)
    # and the by-hand standardisation of the kept rows (numpy's own mean and std)
    kept = cohort["X"][L.order]
    np.testing.assert_allclose(Dc.X1[:, 1:], (kept - kept.mean(0)) / kept.std(0), atol=1e-12)


def test_replicate_design_matches_numpy_path(
    monkeypatch: pytest.MonkeyPatch, cohort: dict[str, np.ndarray]
) -> None:
    # source: the numpy path's gather of a replicate's drawn rows (each row repeated as often
    # as drawn, side by side), centred and scaled by the full sample's statistics
    rng = np.random.default_rng(8)
    n = cohort["time"].size
    rows = np.repeat(np.arange(n), rng.multinomial(n, np.full(n, 1.0 / n)))
    L = prepare_layout(cohort["time"][rows], cohort["event"][rows],
                       entry=cohort["entry"][rows], strata=cohort["strata"][rows])
    X = np.ascontiguousarray(cohort["X"])
    mean, inv = X.mean(0), 1.0 / X.std(0)
    got = {}
    for mode in ("never", "always"):
        monkeypatch.setenv("UNBIN_COMPILED", mode)
        got[mode] = _replicate_design(X, rows, L, mean, inv)
    (Dn, bn), (Dc, bc) = got["never"], got["always"]
    np.testing.assert_array_equal(Dc.X1, Dn.X1)  # the same arithmetic per value
    np.testing.assert_array_equal(bc, bn)
    np.testing.assert_allclose(Dc.xwe, Dn.xwe, rtol=1e-12, atol=1e-11)
    np.testing.assert_array_equal(Dc.X1[:, 1:], (X[rows[L.order]] - mean) * inv)


@pytest.mark.parametrize("p", [1, 8, 11, 17])
def test_replicate_design_gathers_every_width(
    monkeypatch: pytest.MonkeyPatch, cohort: dict[str, np.ndarray], p: int
) -> None:
    # source: numpy's own gather and arithmetic, (X[rows[order]] - mean) * inv, its column
    # extremes and the events' summed w x (np.dot); designs narrower and wider than a cache
    # line's 8 values (the kernel loads one value per line ahead), more rows than a block, a
    # derived replicate layout (draw_layout) and the full sample's (rows None), with weights
    from unbin.models.cox.inputs import _stratum_codes
    from unbin.models.cox.layout import draw_layout

    rng = np.random.default_rng(p)
    n = cohort["time"].size
    X = rng.normal(size=(n, p)) * rng.uniform(0.5, 40.0, p)
    mean, inv = X.mean(0), 1.0 / X.std(0)
    w = cohort["weights"]
    full = prepare_layout(cohort["time"], cohort["event"], entry=cohort["entry"],
                          strata=cohort["strata"], weights=w)
    copies = rng.multinomial(n, np.full(n, 1.0 / n))
    rows = np.repeat(np.arange(n), copies)
    drawn = draw_layout(full, copies, w, _stratum_codes(cohort["strata"], n)[0])
    assert drawn is not None
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    for L, r in ((drawn, rows), (full, None)):
        idx = L.order if r is None else r[L.order]
        assert idx.size > 128
        D, bounds = _replicate_design(X, r, L, mean, inv)
        ref = (X[idx] - mean) * inv
        np.testing.assert_array_equal(D.X1[:, 1:], ref)
        np.testing.assert_array_equal(D.X1[:, 0], 1.0)
        np.testing.assert_array_equal(bounds, np.stack([ref.max(0), ref.min(0)]))
        np.testing.assert_allclose(D.xwe, L.we @ ref, rtol=1e-12, atol=1e-11)


def _drawn_replicate(c: dict[str, np.ndarray], w: np.ndarray | None, seed: int
                     ) -> tuple[Layout, np.ndarray, Layout]:
    """The full sample's layout, a replicate's drawn rows (each row repeated as drawn, side by
    side) and the replicate's layout derived from the full one."""
    from unbin.models.cox.inputs import _stratum_codes
    from unbin.models.cox.layout import draw_layout

    n = c["time"].size
    full = prepare_layout(c["time"], c["event"], entry=c["entry"], strata=c["strata"],
                          weights=w)
    copies = np.random.default_rng(seed).multinomial(n, np.full(n, 1.0 / n))
    drawn = draw_layout(full, copies, w, _stratum_codes(c["strata"], n)[0])
    assert drawn is not None
    return full, np.repeat(np.arange(n), copies), drawn


@pytest.mark.parametrize("ties", ["efron", "breslow"])
def test_replicate_refit_copies_the_sorted_full_design(
    monkeypatch: pytest.MonkeyPatch, ties: str
) -> None:
    # source: lifelines CoxPHFitter (Efron ties; strata, entry_col, integer weights_col) and
    # statsmodels PHReg (Breslow ties; strata, entry moved off the event times, as statsmodels
    # counts entry <= t at risk at t; no case weights there) fitted on the replicate's repeated
    # rows; the gather from X (the path the copy replaces) for the design, bit for bit. The
    # compiled path copies a replicate's design from the full sample's standardised design in
    # its layout order (kept by near_start) into a scratch reused from refit to refit
    from unbin.models.cox import near_start, refit_replicate
    from unbin.models.cox.fit import _sorted_replicate_design

    monkeypatch.setenv("UNBIN_COMPILED", "always")
    c = _tied_cohort(seed=61)
    if ties == "breslow":
        c["entry"] = np.where(c["entry"] > 0, c["entry"] + 0.25, 0.0)
    w = np.random.default_rng(9).integers(1, 4, c["time"].size) if ties == "efron" else None
    X = np.ascontiguousarray(c["X"])
    full_fit = fit_cox(X, c["time"], c["event"], entry=c["entry"], strata=c["strata"],
                       weights=w, ties=ties)
    for seed in (3, 4):  # the second refit reuses the first one's scratch
        full, rows, drawn = _drawn_replicate(c, w, seed)
        start = near_start(X, full_fit.coef, full, ties=ties)
        assert start is not None and start.sorted_X1 is not None
        got = _sorted_replicate_design(start, rows, drawn)
        assert got is not None
        want = _replicate_design(X, rows, drawn, start.mean, 1.0 / start.scale)
        np.testing.assert_array_equal(got[0].X1, want[0].X1)
        np.testing.assert_array_equal(got[0].xwe, want[0].xwe)
        np.testing.assert_array_equal(got[1], want[1])
        refit = refit_replicate(start, X, rows, drawn, with_loglik=True)
        assert refit is not None
        if ties == "efron":
            assert w is not None
            frame = pd.DataFrame(X[rows], columns=["a", "b", "c", "d"]).assign(
                T=c["time"][rows], E=c["event"][rows], S=c["strata"][rows],
                en=c["entry"][rows], W=w[rows])
            cph = CoxPHFitter().fit(frame, "T", "E", weights_col="W", entry_col="en",
                                    strata=["S"], fit_options=TIGHT)
            want_coef, want_ll = cph.params_.to_numpy(), cph.log_likelihood_
        else:
            ph = sm.PHReg(c["time"][rows], X[rows], status=c["event"][rows],
                          strata=c["strata"][rows], entry=c["entry"][rows], ties="breslow")
            res = ph.fit(method="newton", tol=1e-12)
            want_coef, want_ll = res.params, ph.loglike(res.params)
        np.testing.assert_allclose(refit[0], want_coef, rtol=1e-6, atol=1e-8)
        assert refit[1] == pytest.approx(want_ll, abs=1e-7)
        # the numpy path (no sorted copy kept) reaches the same refit
        monkeypatch.setenv("UNBIN_COMPILED", "never")
        plain = near_start(X, full_fit.coef, full, ties=ties)
        assert plain is not None and plain.sorted_X1 is None
        numpy_refit = refit_replicate(plain, X, rows, drawn, with_loglik=True)
        monkeypatch.setenv("UNBIN_COMPILED", "always")
        assert numpy_refit is not None
        np.testing.assert_allclose(refit[0], numpy_refit[0], rtol=1e-8, atol=1e-10)
        assert refit[1] == pytest.approx(numpy_refit[1], abs=1e-8)


def test_sorted_designs_held_within_the_budget(monkeypatch: pytest.MonkeyPatch) -> None:
    # source: the gather from X (the path a start without a sorted design keeps), bit for
    # bit. A sample's starts hold sorted designs up to fit.SORTED_BUDGET bytes; a start
    # beyond it has none and its replicates gather; a start's bytes are released with it
    import gc

    from unbin.models.cox import fit as cox_fit
    from unbin.models.cox import near_start, refit_replicate

    monkeypatch.setenv("UNBIN_COMPILED", "always")
    c = _tied_cohort(seed=67)
    X = np.ascontiguousarray(c["X"])
    full, rows, drawn = _drawn_replicate(c, None, 5)
    coef = fit_cox(X, c["time"], c["event"], entry=c["entry"], strata=c["strata"]).coef
    one = full.order.size * (1 + X.shape[1]) * 8
    monkeypatch.setattr(cox_fit, "SORTED_BUDGET", int(1.5 * one))
    first = near_start(X, coef, full)
    second = near_start(X, coef, full)
    assert first is not None and second is not None
    assert first.sorted_X1 is not None and second.sorted_X1 is None
    assert full.kernel["replicate_scratch"]["held"] == one
    a = refit_replicate(first, X, rows, drawn, with_loglik=True)
    b = refit_replicate(second, X, rows, drawn, with_loglik=True)
    assert a is not None and b is not None
    np.testing.assert_array_equal(a[0], b[0])
    assert a[1] == b[1]
    del first
    gc.collect()
    assert full.kernel["replicate_scratch"]["held"] == 0
    third = near_start(X, coef, full)
    assert third is not None and third.sorted_X1 is not None


def test_compiled_fit_never_builds_the_sparse_operators(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # source: lifelines CoxPHFitter (Efron ties, strata, delayed entry, integer weights). The
    # layout's sparse operators are made on first use: a compiled fit leaves them unbuilt,
    # a numpy fit on the same layout builds them and both agree with lifelines
    c = _tied_cohort(seed=53)
    w = np.random.default_rng(7).integers(1, 4, c["time"].size)
    L = prepare_layout(c["time"], c["event"], entry=c["entry"], strata=c["strata"], weights=w)
    frame = pd.DataFrame(c["X"], columns=["a", "b", "c", "d"]).assign(
        T=c["time"], E=c["event"], S=c["strata"], en=c["entry"], W=w)
    cph = CoxPHFitter().fit(frame, "T", "E", weights_col="W", entry_col="en", strata=["S"],
                            fit_options=TIGHT)
    for mode, built in (("always", set()), ("never", {"risk", "tie"})):
        monkeypatch.setenv("UNBIN_COMPILED", mode)
        fit = fit_cox(c["X"], c["time"], c["event"], entry=c["entry"], strata=c["strata"],
                      weights=w, layout=L)
        assert set(L.operators) == built, mode
        assert fit.converged, fit.message
        np.testing.assert_allclose(fit.coef, cph.params_.to_numpy(), rtol=1e-6)
        assert fit.loglik == pytest.approx(cph.log_likelihood_, abs=1e-8)


def test_kernel_exp_matches_numpy_exp() -> None:
    # source: numpy's exp (the C library's), to 1 ulp on normal results; outside the
    # polynomial's range and for non-finite input the kernel takes the library's exp itself
    from unbin.models.compiled import cox_evaluation

    rng = np.random.default_rng(8)
    x = np.concatenate([rng.uniform(-708.0, 709.0, 200_000), rng.normal(0.0, 3.0, 200_000),
                        np.linspace(-1.0, 1.0, 20_001), [-708.0, 709.0, 0.0, -0.0, 1e-300]])
    got = np.empty_like(x)
    cox_evaluation.exp_values(x, got)
    np.testing.assert_allclose(got, np.exp(x), rtol=2.3e-16, atol=0)
    assert got[-3] == 1.0 and got[-2] == 1.0
    edge = np.array([np.nan, -np.inf, np.inf, -745.2, -720.0, 709.5, 710.0, -1e6])
    got = np.empty_like(edge)
    cox_evaluation.exp_values(edge, got)
    with np.errstate(over="ignore"):
        np.testing.assert_array_equal(got, np.exp(edge))


@pytest.mark.parametrize("efron", [True, False], ids=["efron", "breslow"])
def test_kernel_rescales_when_the_linear_predictor_climbs(
    monkeypatch: pytest.MonkeyPatch, efron: bool
) -> None:
    # source: statsmodels PHReg's loglike, score and hessian; the numpy path. The compiled
    # point shifts each stratum's linear predictor by its first block's largest value and
    # rescales its sums when a later block's exceeds that by more than 30: here x rises with
    # time, so in each stratum (1,500 rows, several blocks) eta climbs by about 90
    rng = np.random.default_rng(12)
    n = 3_000
    strata = np.repeat([0, 1], n // 2)
    time = np.concatenate([np.sort(rng.integers(1, 400, n // 2)).astype(float)] * 2)
    event = (rng.uniform(size=n) < 0.5) * 1.0
    X = np.column_stack([time / 40.0 + rng.normal(0, 0.1, n), rng.normal(size=n)])
    beta = np.array([9.0, 0.3])  # eta climbs from about 0 to 90 along each stratum's rows
    L = prepare_layout(time, event, strata=strata)
    assert L.ties
    ref = sm.PHReg(time, X, status=event, strata=strata, ties="efron" if efron else "breslow")
    got = _evaluate(monkeypatch, "always", L, X, beta, efron)
    numpy_path = _evaluate(monkeypatch, "never", L, X, beta, efron)
    assert got[0] == pytest.approx(ref.loglike(beta), rel=1e-11)
    np.testing.assert_allclose(got[1], ref.score(beta), rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(got[2], -ref.hessian(beta), rtol=1e-8, atol=1e-8)
    assert got[0] == pytest.approx(numpy_path[0], rel=1e-13)
    np.testing.assert_allclose(got[1], numpy_path[1], rtol=1e-10, atol=1e-9)
    np.testing.assert_allclose(got[2], numpy_path[2], rtol=1e-10, atol=1e-9)
    # (in each stratum a later block's eta exceeds the first block's by more than 30: the
    # sums were rescaled)
    D, scale, _ = lk._standardised(X, L)
    eta = D.X1[:, 1:] @ (beta * scale)
    bounds = np.r_[L.row_starts, eta.size]
    for lo, hi in zip(bounds[:-1], bounds[1:], strict=True):
        assert eta[lo:hi].max() > eta[lo : lo + 256].max() + 60


def test_compiled_stopping_test_matches_numpy(
    monkeypatch: pytest.MonkeyPatch, cohort: dict[str, np.ndarray]
) -> None:
    # source: the numpy stopping test (max over rows of |x_i' step| against the limit, as a
    # product of the whole design); the kernel stops at the first row beyond the limit
    from unbin.models.cox.fit import _settled

    L = prepare_layout(cohort["time"], cohort["event"], strata=cohort["strata"])
    rng = np.random.default_rng(4)
    designs = {}
    for mode in ("never", "always"):
        monkeypatch.setenv("UNBIN_COMPILED", mode)
        designs[mode] = lk._standardised(cohort["X"], L)[0]
    exact = designs["never"].X1[:, 1:]
    decided = set()
    for _ in range(300):
        step = rng.normal(size=4) * 10.0 ** rng.uniform(-9, -5)
        limit = float(np.abs(exact @ step).max()) * rng.choice([0.5, 0.999, 1.001, 2.0])
        a = _settled(designs["never"], step, 1e-9, limit)
        b = _settled(designs["always"], step, 1e-9, limit)
        assert a == b
        decided.add(a)
    assert decided == {True, False}
    nan_step = np.array([np.nan, 0.0, 0.0, 0.0])
    from unbin.models.compiled import cox_settle
    assert not cox_settle.within(designs["always"].X1, nan_step, 1.0)


@pytest.mark.parametrize("efron", [True, False], ids=["efron", "breslow"])
def test_an_underflowed_risk_set_gives_a_non_finite_point_not_an_error(
    monkeypatch: pytest.MonkeyPatch, efron: bool
) -> None:
    # common practice (numpy's floating-point semantics, which the fits' step control relies
    # on: a trial point whose log-likelihood is not finite is halved back). A trial step so
    # large that the last risk sets' exp(eta) underflow to 0 (eta falls by 2,000 along the
    # rows, tied in threes) made the compiled point raise ZeroDivisionError (numba's default error model);
    # both paths must now give the same log-likelihood there (numpy's: finite or not), and a
    # fit from that data converges on either path to the same estimate
    rng = np.random.default_rng(5)
    n = 600
    time = np.repeat(np.arange(1.0, n // 3 + 1.0), 3)  # three rows at each time (ties)
    event = np.ones(n)
    event[rng.random(n) < 0.3] = 0.0
    X = np.column_stack([time / n, rng.normal(size=n)])
    L = prepare_layout(time, event)
    beta = np.array([-2000.0, 0.0])
    fits = {}
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):  # numpy's warnings
        lls = [_evaluate(monkeypatch, mode, L, X, beta, efron, 0)[0]
               for mode in ("never", "always")]
        if np.isfinite(lls[0]):
            assert lls[1] == pytest.approx(lls[0], rel=1e-12)
        else:
            assert not np.isfinite(lls[1])
        for mode in ("never", "always"):
            monkeypatch.setenv("UNBIN_COMPILED", mode)
            fits[mode] = fit_cox(X, time, event, ties="efron" if efron else "breslow")
    np.testing.assert_allclose(fits["always"].coef, fits["never"].coef, rtol=1e-9)
