"""Schoenfeld residuals and the Grambsch-Therneau proportional-hazards tests
(unbin.models.cox.residuals), and the hazards table (unbin.questions.hazards).

References: Grambsch & Therneau (1994) Biometrika 81:515-526 (the scaled residuals and the
tests); lifelines 0.30 (CoxPHFitter's Schoenfeld residuals, ``proportional_hazard_test`` per
column, KaplanMeierFitter with entry and weights) on the Rossi recidivism data it ships;
statsmodels PHReg (fit and Schoenfeld residuals) for the table; a brute-force loop over event
times for strata, delayed entry, weights and both tie methods; seeded simulations for the level
and power of the tests."""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from reference.tablerefs import MARKER_GROUPING, OUTCOMES, clinic_frame, selected_row, term_columns
from unbin.models.cox import fit_cox, prepare_layout
from unbin.models.cox.residuals import ph_tests, schoenfeld, time_transform
from unbin.questions.fits import fits_table
from unbin.questions.hazards import COLUMNS, hazards_table


def _rossi() -> tuple[pd.DataFrame, list[str]]:
    from lifelines.datasets import load_rossi

    df = load_rossi()
    return df, [c for c in df.columns if c not in ("week", "arrest")]


def _gt_by_hand(resid: np.ndarray, V: np.ndarray, g: np.ndarray, cols: list[int]) -> float:
    """Grambsch & Therneau (1994), written out: the slopes of the scaled residuals
    D V r_k on g - mean(g) and their covariance D V / sum (g - mean g)^2; the Wald statistic of
    the columns ``cols``."""
    D = resid.shape[0]
    gc = g - g.mean()
    S = float(gc @ gc)
    scaled = D * resid @ V
    slope = gc @ scaled / S
    cov = D * V / S
    idx = np.asarray(cols)
    return float(slope[idx] @ np.linalg.solve(cov[np.ix_(idx, idx)], slope[idx]))


@pytest.mark.parametrize("strata", [None, "wexp"])
@pytest.mark.parametrize("transform", ["km", "identity", "log"])
def test_rossi_per_column_tests_equal_lifelines(transform: str, strata: str | None) -> None:
    # lifelines.statistics.proportional_hazard_test on lifelines.datasets.load_rossi (Efron
    # ties; 114 arrests in 52 weeks, many tied), without and with strata (work experience):
    # the whole route (our fit, residuals, transform, statistic) to 1e-6, and at lifelines' own
    # estimates to 1e-9.
    from lifelines import CoxPHFitter
    from lifelines.statistics import proportional_hazard_test

    df, cols = _rossi()
    cols = [c for c in cols if c != strata]
    cph = CoxPHFitter().fit(df, "week", "arrest", strata=[strata] if strata else None)
    ref = proportional_hazard_test(cph, df, time_transform=transform)
    ref_stat = ref.summary.loc[cols, "test_statistic"].to_numpy()
    ref_p = ref.summary.loc[cols, "p"].to_numpy()
    X = df[cols].to_numpy(float)
    L = prepare_layout(df["week"].to_numpy(float), df["arrest"].to_numpy(),
                       strata=df[strata].to_numpy() if strata else None)
    fit = fit_cox(X, None, None, layout=L)
    res = schoenfeld(X, fit.coef, layout=L)
    T, E = df["week"].to_numpy(float), df["arrest"].to_numpy()
    per, _ = ph_tests(res, fit.cov, time_transform(transform, res, T, E))
    np.testing.assert_allclose([per[str(j)].statistic for j in range(len(cols))], ref_stat,
                               rtol=1e-6)
    np.testing.assert_allclose([per[str(j)].p for j in range(len(cols))], ref_p, rtol=1e-6)
    assert all(per[str(j)].df == 1 for j in range(len(cols)))
    at_ref = schoenfeld(X, cph.params_[cols].to_numpy(), layout=L)
    V = cph.variance_matrix_.loc[cols, cols].to_numpy()
    per_ref, _ = ph_tests(at_ref, V, time_transform(transform, at_ref, T, E))
    np.testing.assert_allclose([per_ref[str(j)].statistic for j in range(len(cols))], ref_stat,
                               rtol=1e-9)


def test_rossi_residuals_equal_lifelines_and_joint_tests_equal_the_formula() -> None:
    # Residuals: lifelines' compute_residuals(kind="schoenfeld") (Efron means over tied
    # events) at lifelines' estimates, matched by row. lifelines has no joint or global test:
    # those are checked against the Grambsch-Therneau formula written out on lifelines' own
    # residuals and variance matrix.
    from lifelines import CoxPHFitter

    df, cols = _rossi()
    cph = CoxPHFitter().fit(df, "week", "arrest")
    theirs = cph.compute_residuals(df, kind="schoenfeld")[cols]
    X = df[cols].to_numpy(float)
    L = prepare_layout(df["week"].to_numpy(float), df["arrest"].to_numpy())
    res = schoenfeld(X, cph.params_[cols].to_numpy(), layout=L)
    mine = pd.DataFrame(res.resid, index=df.index[res.row], columns=cols).loc[theirs.index]
    np.testing.assert_allclose(mine.to_numpy(), theirs.to_numpy(), rtol=1e-9, atol=1e-11)
    np.testing.assert_allclose(res.time, df["week"].to_numpy()[res.row])
    V = cph.variance_matrix_.loc[cols, cols].to_numpy()
    g = time_transform("km", res, df["week"], df["arrest"])
    groups = {"fin+age": [0, 1], "race..mar": [2, 3, 4], "prio": [6]}
    per, glob = ph_tests(res, V, g, groups)
    r_theirs = theirs.to_numpy()
    g_theirs = pd.Series(g, index=df.index[res.row]).loc[theirs.index].to_numpy()
    for name, idx in groups.items():
        assert per[name].df == len(idx)
        assert per[name].statistic == pytest.approx(_gt_by_hand(r_theirs, V, g_theirs, idx),
                                                    rel=1e-9)
        assert per[name].p == pytest.approx(stats.chi2.sf(per[name].statistic, len(idx)))
    assert glob.df == len(cols)
    assert glob.statistic == pytest.approx(
        _gt_by_hand(r_theirs, V, g_theirs, list(range(len(cols)))), rel=1e-9)
    # the global statistic's other published form, D U' V U / sum (g - gbar)^2 (GT 1994)
    gc = g_theirs - g_theirs.mean()
    U = gc @ r_theirs
    assert glob.statistic == pytest.approx(len(gc) * U @ V @ U / (gc @ gc), rel=1e-9)
    # the scaled residuals estimate beta(t): beta + D V r
    np.testing.assert_allclose(res.scaled(cph.params_[cols], V),
                               len(gc) * res.resid @ V + cph.params_[cols].to_numpy())


def test_rank_transform_equals_lifelines_without_tied_event_times() -> None:
    # lifelines numbers tied events consecutively; we give them their mid-rank. With the Rossi
    # weeks made distinct (a deterministic offset below one day) the two definitions coincide.
    from lifelines import CoxPHFitter
    from lifelines.statistics import proportional_hazard_test

    df, cols = _rossi()
    df = df.assign(week=df["week"] + (np.arange(len(df)) * 37 % len(df)) / 1000.0)
    assert not df["week"].duplicated().any()
    cph = CoxPHFitter().fit(df, "week", "arrest")
    ref = proportional_hazard_test(cph, df, time_transform="rank")
    X = df[cols].to_numpy(float)
    L = prepare_layout(df["week"].to_numpy(float), df["arrest"].to_numpy())
    res = schoenfeld(X, cph.params_[cols].to_numpy(), layout=L)
    per, _ = ph_tests(res, cph.variance_matrix_.loc[cols, cols].to_numpy(),
                      time_transform("rank", res, df["week"], df["arrest"]))
    np.testing.assert_allclose([per[str(j)].statistic for j in range(len(cols))],
                               ref.summary.loc[cols, "test_statistic"].to_numpy(), rtol=1e-9)
    # tied events share their mid-rank (common practice for ranks)
    small = prepare_layout(np.array([1.0, 2.0, 2.0, 2.0, 3.0]), np.array([1, 1, 1, 0, 1]))
    ranks = time_transform("rank", schoenfeld(np.zeros((5, 1)), [0.0], layout=small), [], [])
    np.testing.assert_allclose(ranks, [1.0, 2.5, 2.5, 4.0])


def _messy_sample(seed: int) -> dict[str, np.ndarray]:
    """Strata, delayed entry, integer case weights and times rounded to produce ties."""
    rng = np.random.default_rng(seed)
    n = 120
    X = np.column_stack([rng.normal(size=n), rng.integers(0, 2, n), rng.uniform(-1, 1, n)])
    t = np.round(rng.exponential(1.0 / np.exp(0.4 * X[:, 0] - 0.3 * X[:, 1])) * 4 + 0.25) / 4
    entry = np.where(rng.random(n) < 0.3, np.maximum(t - rng.uniform(0.1, 1.5, n), 0.0), 0.0)
    entry = np.minimum(entry, t - 0.1)
    return {"X": X, "time": t, "event": (rng.random(n) < 0.7).astype(float), "entry": entry,
            "strata": rng.integers(0, 3, n), "weights": rng.integers(1, 4, n).astype(float)}


def _brute_force_residuals(s: dict[str, np.ndarray], beta: np.ndarray, efron: bool
                           ) -> dict[int, np.ndarray]:
    """Each event row's x minus the risk-set mean, one event time at a time (row at risk at
    t when entry < t <= time, in its own stratum; Efron: the mean over k = 0..d-1 of the
    weighted means with k/d of the tied events' weight taken out)."""
    X, t, e, en, st, w = (s[k] for k in ("X", "time", "event", "entry", "strata", "weights"))
    risk = w * np.exp(X @ beta)
    out = {}
    for stratum in np.unique(st):
        for u in np.unique(t[(e == 1) & (st == stratum)]):
            at_risk = (st == stratum) & (en < u) & (t >= u)
            dead = np.flatnonzero((st == stratum) & (t == u) & (e == 1))
            s0, s1 = risk[at_risk].sum(), risk[at_risk] @ X[at_risk]
            if efron and dead.size > 1:
                d = dead.size
                t0, t1 = risk[dead].sum(), risk[dead] @ X[dead]
                mean = sum((s1 - k / d * t1) / (s0 - k / d * t0) for k in range(d)) / d
            else:
                mean = s1 / s0
            for i in dead:
                out[int(i)] = X[i] - mean
    return out


@pytest.mark.parametrize("ties", ["efron", "breslow"])
def test_residuals_with_strata_entry_weights_equal_brute_force(ties: str) -> None:
    # Brute force (a loop over event times, written from the definitions), and at the fitted
    # coefficients the weighted residuals sum to the score, zero (Schoenfeld 1982).
    s = _messy_sample(3)
    assert len(np.unique(s["time"][s["event"] == 1])) < int(s["event"].sum())  # ties exist
    kw = {k: s[k] for k in ("entry", "strata", "weights")}
    fit = fit_cox(s["X"], s["time"], s["event"], ties=ties, tol=1e-12, **kw)
    assert fit.converged
    res = schoenfeld(s["X"], fit.coef, s["time"], s["event"], ties=ties, **kw)
    brute = _brute_force_residuals(s, fit.coef, ties == "efron")
    assert sorted(brute) == sorted(res.row.tolist())
    np.testing.assert_allclose(res.resid, np.array([brute[int(i)] for i in res.row]),
                               rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(res.weight, s["weights"][res.row])
    np.testing.assert_allclose(res.weight @ res.resid, 0.0, atol=1e-7)
    # also at an arbitrary coefficient vector (the residuals do not need a fit)
    beta = np.array([0.3, -0.5, 0.2])
    res_b = schoenfeld(s["X"], beta, s["time"], s["event"], ties=ties, **kw)
    brute_b = _brute_force_residuals(s, beta, ties == "efron")
    np.testing.assert_allclose(res_b.resid, np.array([brute_b[int(i)] for i in res_b.row]),
                               rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("transform", ["km", "rank", "identity"])
def test_case_weights_act_as_replicated_rows(transform: str) -> None:
    # Brute force: integer case weights with Breslow ties give the fit, the residuals, the time
    # transform and the tests of the sample with each row repeated that many times (frequency
    # weights), with strata, delayed entry and tied times.
    s = _messy_sample(4)
    rep = np.repeat(np.arange(s["X"].shape[0]), s["weights"].astype(int))
    kw = {"entry": s["entry"], "strata": s["strata"]}
    L_w = prepare_layout(s["time"], s["event"], weights=s["weights"], **kw)
    L_r = prepare_layout(s["time"][rep], s["event"][rep], **{k: v[rep] for k, v in kw.items()})
    out = []
    for X, L, rows, w in ((s["X"], L_w, slice(None), s["weights"]),
                          (s["X"][rep], L_r, rep, None)):
        fit = fit_cox(X, None, None, layout=L, ties="breslow", tol=1e-12)
        res = schoenfeld(X, fit.coef, layout=L, ties="breslow")
        g = time_transform(transform, res, s["time"][rows], s["event"][rows],
                           entry=s["entry"][rows], weights=w)
        per, glob = ph_tests(res, fit.cov, g,
                             {"x": [0], "z": [1, 2]})
        out.append([per["x"].statistic, per["z"].statistic, glob.statistic, res.events])
    np.testing.assert_allclose(out[0], out[1], rtol=1e-8)


def test_km_transform_with_entry_and_weights_equals_lifelines() -> None:
    # lifelines KaplanMeierFitter with entry= (left truncation) and weights=, right-continuous.
    from lifelines import KaplanMeierFitter

    # Pooled over strata and over every row: a last row in a stratum of its own without
    # events is left out of the layout's risk sets but is at risk in the pooled estimate.
    s = _messy_sample(5)
    s = {k: np.r_[v, v[:1]] for k, v in s.items()}
    s["strata"][-1], s["event"][-1], s["entry"][-1], s["time"][-1] = 9, 0.0, 0.0, 10.0
    L = prepare_layout(s["time"], s["event"], entry=s["entry"], weights=s["weights"],
                       strata=s["strata"])
    assert s["time"].size - 1 not in L.order
    res = schoenfeld(s["X"], np.zeros(3), layout=L)
    km = KaplanMeierFitter().fit(s["time"], s["event"], entry=s["entry"], weights=s["weights"])
    ref = 1.0 - km.survival_function_at_times(res.time).to_numpy()
    g = time_transform("km", res, s["time"], s["event"], entry=s["entry"], weights=s["weights"])
    np.testing.assert_allclose(g, ref, rtol=1e-12, atol=1e-14)


def test_bad_input_is_named() -> None:
    s = _messy_sample(1)
    L = prepare_layout(s["time"], s["event"])
    with pytest.raises(ValueError, match="coef has 2 values but X has 3 columns"):
        schoenfeld(s["X"], [0.0, 0.0], layout=L)
    with pytest.raises(ValueError, match="ties must be"):
        schoenfeld(s["X"], np.zeros(3), layout=L, ties="exact")
    res = schoenfeld(s["X"], np.zeros(3), layout=L)
    with pytest.raises(ValueError, match="time transform must be one of"):
        time_transform("square", res, s["time"], s["event"])
    with pytest.raises(ValueError, match="cov must be"):
        ph_tests(res, np.eye(2), time_transform("km", res, s["time"], s["event"]))


def _simulate(rng: np.random.Generator, n: int, late_effect: float) -> dict[str, np.ndarray]:
    """x ~ N(0, 1), z binary; hazard 0.5 exp(0.5 x + 0.4 z) up to t = 1, then x's log hazard
    ratio is ``late_effect`` (0.5: proportional hazards); censoring uniform on (0, 3); times
    rounded to 0.01 (some ties)."""
    x = rng.normal(size=n)
    z = rng.integers(0, 2, n).astype(float)
    h1 = 0.5 * np.exp(0.5 * x + 0.4 * z)
    h2 = 0.5 * np.exp(late_effect * x + 0.4 * z)
    e = rng.exponential(size=n)  # cumulative hazard at the event: piecewise inversion
    t = np.where(e < h1, e / h1, 1.0 + (e - h1) / h2)
    c = rng.uniform(0.0, 3.0, n)
    time = np.maximum(np.round(np.minimum(t, c), 2), 0.01)
    return {"X": np.column_stack([x, x**2, z]), "time": time, "event": (t <= c).astype(float)}


def _rejections(reps: int, n: int, late_effect: float, seed: int) -> np.ndarray:
    """Per replicate, rejections at 5% of: the global test, the joint test of the 2-column term
    (x, x^2), and z's test (km transform)."""
    rng = np.random.default_rng(seed)
    out = np.zeros((reps, 3), dtype=bool)
    for b in range(reps):
        s = _simulate(rng, n, late_effect)
        L = prepare_layout(s["time"], s["event"])
        fit = fit_cox(s["X"], None, None, layout=L)
        assert fit.converged, fit.message
        res = schoenfeld(s["X"], fit.coef, layout=L)
        per, glob = ph_tests(res, fit.cov, time_transform("km", res, s["time"], s["event"]),
                             {"x": [0, 1], "z": [2]})
        out[b] = [glob.p < 0.05, per["x"].p < 0.05, per["z"].p < 0.05]
    return out


def test_level_under_proportional_hazards() -> None:
    # Seeded simulation with proportional hazards (truth: no time-varying effect), 400
    # replicates of n = 200: the global test, the 2-df term test and the 1-df test reject at
    # 5% within the two-sided 99% Monte-Carlo band 0.05 +- 2.576 sqrt(0.05 0.95 / 400).
    reps = 400
    rates = _rejections(reps, 200, 0.5, seed=20261203).mean(axis=0)
    half = 2.576 * np.sqrt(0.05 * 0.95 / reps)
    assert np.all(np.abs(rates - 0.05) <= half), rates


def test_power_against_a_known_time_varying_effect() -> None:
    # Seeded simulation where x's log hazard ratio drops from 0.5 to -0.5 at t = 1 (z stays
    # proportional): 100 replicates of n = 300. The global and x's term test reject in most
    # replicates (measured 0.9+; asserted >= 0.75, a band of over 3 Monte-Carlo SDs below).
    rates = _rejections(100, 300, -0.5, seed=7).mean(axis=0)
    assert rates[0] >= 0.75 and rates[1] >= 0.75, rates


def _survival_refit(refit_frame: Any, one_analysis: Any) -> tuple[Any, Any, pd.DataFrame]:
    frame = clinic_frame("survival", 500, seed=31)
    raw = one_analysis(OUTCOMES["survival"], "marker", dict(MARKER_GROUPING))
    raw["analyses"][0]["adjust"] = ["age", "sex"]
    spec, r = refit_frame(frame, raw)
    return spec, r, frame


def test_hazards_table_equals_statsmodels_residuals_and_the_formula(
        refit_frame: Any, one_analysis: Any) -> None:
    # Each model rebuilt from the fits table's recorded terms (tests/tablerefs.py), fitted with
    # statsmodels PHReg (tol 1e-12; the simulated times have no ties, so its Breslow-style
    # Schoenfeld residuals are the Efron ones), g = 1 - lifelines' Kaplan-Meier, and the
    # Grambsch-Therneau statistics written out per term and globally.
    import statsmodels.api as sm
    from lifelines import KaplanMeierFitter

    spec, r, frame = _survival_refit(refit_frame, one_analysis)
    tab = hazards_table(r, spec)
    fits = fits_table(r, spec)
    assert tuple(tab.columns) == COLUMNS
    assert (tab["status"] == "ok").all(), tab[tab["status"] != "ok"]["message"].tolist()
    assert (tab["time_transform"] == "km").all()
    time = frame["years"].to_numpy(float)
    event = frame["flare"].to_numpy(float)
    assert not pd.Series(time[event == 1]).duplicated().any()
    km = KaplanMeierFitter().fit(time, event)
    seen = set()
    for (coding, form), rows in tab.groupby(["adjustment", "form"]):
        row = selected_row(fits, str(form), str(coding))
        terms = json.loads(row["exposure_basis"]) + json.loads(row["adjustment_terms"])
        blocks = [term_columns(t, frame[t["variable"]].to_numpy()) for t in terms]
        X = np.column_stack(blocks)
        sd = X.std(axis=0)
        ph = sm.PHReg(time, X / sd, status=event, ties="efron").fit(tol=1e-12)
        V = np.asarray(ph.cov_params())
        resid_all = np.asarray(ph.schoenfeld_residuals)
        ev = np.flatnonzero(event == 1)
        g = 1.0 - km.survival_function_at_times(time[ev]).to_numpy()
        resid = resid_all[ev]
        start = np.cumsum([0] + [b.shape[1] for b in blocks])
        by_term = rows.set_index("term")
        for j, t in enumerate(terms):
            cols = list(range(start[j], start[j + 1]))
            got = by_term.loc[t["variable"]]
            assert got["df"] == len(cols)
            assert got["role"] == ("exposure" if j < len(json.loads(row["exposure_basis"]))
                                   else "adjuster")
            assert got["statistic"] == pytest.approx(_gt_by_hand(resid, V, g, cols), rel=1e-6)
            assert got["p"] == pytest.approx(stats.chi2.sf(got["statistic"], len(cols)),
                                             rel=1e-9)
        glob = by_term.loc["GLOBAL"]
        assert glob["df"] == X.shape[1]
        assert glob["statistic"] == pytest.approx(
            _gt_by_hand(resid, V, g, list(range(X.shape[1]))), rel=1e-6)
        seen.add((str(coding), str(form)))
    for coding in ("legacy", "continuous", "none"):
        for form in ("legacy", "linear", "spline", *(("fp",) if coding != "none" else ())):
            assert (coding, form) in seen, (coding, form)


def test_hazards_table_is_empty_for_other_families(refit_frame: Any,
                                                   one_analysis: Any) -> None:
    frame = clinic_frame("binary", 300, seed=2)
    spec, r = refit_frame(frame, one_analysis(OUTCOMES["binary"], "marker",
                                              dict(MARKER_GROUPING)))
    tab = hazards_table(r, spec)
    assert tab.empty and tuple(tab.columns) == COLUMNS


def test_failed_model_gives_a_failed_global_row(refit_frame: Any, one_analysis: Any) -> None:
    from dataclasses import replace

    from unbin.models.base import failed_fit

    spec, r, _ = _survival_refit(refit_frame, one_analysis)
    i = next(j for j, f in enumerate(r.fits) if f.form == "linear" and f.adjustment == "none")
    res = r.fits[i].result
    r.fits[i] = replace(r.fits[i], result=failed_fit("survival", res.names, res.n, res.events,
                                                     "information matrix is singular"))
    tab = hazards_table(r, spec)
    bad = tab[(tab["form"] == "linear") & (tab["adjustment"] == "none")]
    assert len(bad) == 1 and bad.iloc[0]["term"] == "GLOBAL"
    assert bad.iloc[0]["status"] == "failed"
    assert "singular" in bad.iloc[0]["message"]
    assert (tab.drop(bad.index)["status"] == "ok").all()


def test_hazards_table_with_strata_and_delayed_entry(refit_frame: Any,
                                                     one_analysis: Any) -> None:
    # The spec's entry and strata reach the residuals and the km transform: each linear-form
    # model refitted with statsmodels PHReg (entry=, strata=, tol 1e-12), its residuals by the
    # brute-force loop above, g = 1 - lifelines' Kaplan-Meier with entry=, and the
    # Grambsch-Therneau statistics written out.
    import statsmodels.api as sm
    from lifelines import KaplanMeierFitter

    frame = clinic_frame("survival", 500, seed=33)
    rng = np.random.default_rng(33)
    frame["centre"] = rng.integers(0, 3, len(frame)).astype(float)
    frame["entered"] = np.where(rng.random(len(frame)) < 0.4,
                                rng.uniform(0.0, 0.9, len(frame)) * frame["years"], 0.0)
    outcome = dict(OUTCOMES["survival"], entry="entered")
    raw = one_analysis(outcome, "marker", dict(MARKER_GROUPING))
    raw["analyses"][0]["adjust"] = ["age", "sex"]
    raw["analyses"][0]["strata"] = ["centre"]
    spec, r = refit_frame(frame, raw)
    tab = hazards_table(r, spec)
    assert (tab["status"] == "ok").all(), tab["message"].tolist()
    fits = fits_table(r, spec)
    time, event = frame["years"].to_numpy(float), frame["flare"].to_numpy(float)
    entry, strata = frame["entered"].to_numpy(float), frame["centre"].to_numpy()
    km = KaplanMeierFitter().fit(time, event, entry=entry)
    for coding in ("legacy", "none"):
        row = selected_row(fits, "linear", coding)
        terms = json.loads(row["exposure_basis"]) + json.loads(row["adjustment_terms"])
        X = np.column_stack([term_columns(t, frame[t["variable"]].to_numpy()) for t in terms])
        ph = sm.PHReg(time, X, status=event, entry=entry, strata=strata,
                      ties="efron").fit(tol=1e-12)
        beta, V = np.asarray(ph.params), np.asarray(ph.cov_params())
        s = {"X": X, "time": time, "event": event, "entry": entry, "strata": strata,
             "weights": np.ones(len(time))}
        brute = _brute_force_residuals(s, beta, efron=True)
        rows = np.array(sorted(brute))
        resid = np.array([brute[i] for i in rows])
        g = 1.0 - km.survival_function_at_times(time[rows]).to_numpy()
        got = tab[(tab["form"] == "linear") & (tab["adjustment"] == coding)].set_index("term")
        for j, t in enumerate(terms):
            assert got.loc[t["variable"], "statistic"] == pytest.approx(
                _gt_by_hand(resid, V, g, [j]), rel=1e-6)
        assert got.loc["GLOBAL", "statistic"] == pytest.approx(
            _gt_by_hand(resid, V, g, list(range(X.shape[1]))), rel=1e-6)
