"""The exposure's effect by follow-up window (unbin.refit.windows, unbin.questions.windows).

References: lifelines 0.30 CoxTimeVaryingFitter (Efron ties) on episodes built here from the
definition (a row at risk at t when entry < t <= time, one episode per window); the unsplit Cox
fit (a model without window terms has the same likelihood on the episodes); seeded simulations
for the level of the change-over-time test and the coverage of the per-window intervals."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from reference.tablerefs import MARKER_GROUPING, OUTCOMES, clinic_frame, selected_row, term_columns
from unbin.errors import SpecError
from unbin.models.cox import fit_cox
from unbin.present.figures.windows import select_windows
from unbin.questions.fits import fits_table
from unbin.questions.windows import COLUMNS, windows_table
from unbin.refit.windows import fit_windows, split_episodes, window_labels
from unbin.spec import parse_spec


def _episodes_by_hand(time: np.ndarray, event: np.ndarray, entry: np.ndarray,
                      cuts: list[float]) -> pd.DataFrame:
    """Row by row, window by window: the part of (entry, time] inside (lo, hi]."""
    edges = [-np.inf, *cuts, np.inf]
    out = []
    for i in range(time.size):
        for w in range(len(edges) - 1):
            lo, hi = max(entry[i], edges[w]), min(time[i], edges[w + 1])
            if hi > lo:
                out.append((i, lo, hi, float(event[i] == 1 and time[i] <= edges[w + 1]), w))
    return pd.DataFrame(out, columns=["row", "start", "stop", "event", "window"])


def _sample(seed: int, n: int = 300, late: float = 0.6, early: float = 0.6
            ) -> dict[str, np.ndarray]:
    """x ~ N(0, 1), z binary; x's log hazard ratio ``early`` up to t = 1, ``late`` after; delayed
    entry for a third of the rows (entry uniform on (0, 1), time beyond it); censoring uniform on
    (0.5, 4)."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    z = rng.integers(0, 2, n).astype(float)
    h1, h2 = 0.6 * np.exp(early * x + 0.3 * z), 0.6 * np.exp(late * x + 0.3 * z)
    entry = np.where(rng.random(n) < 1 / 3, rng.uniform(0.0, 1.0, n), 0.0)
    # the cumulative hazard from entry on, inverted piecewise (truncation at entry)
    H_entry = np.where(entry < 1.0, h1 * entry, h1 + h2 * (entry - 1.0))
    H = H_entry + rng.exponential(size=n)
    t = np.where(H < h1, H / h1, 1.0 + (H - h1) / h2)
    c = entry + rng.uniform(0.5, 4.0, n)
    return {"x": x, "z": z, "entry": entry, "time": np.minimum(t, c),
            "event": (t <= c).astype(float)}


def test_episodes_cover_each_row_once_and_keep_the_unsplit_fit() -> None:
    s = _sample(1)
    cuts = [0.5, 1.5]
    ep = split_episodes(s["time"], s["event"], s["entry"], cuts)
    ref = _episodes_by_hand(s["time"], s["event"], s["entry"], cuts)
    mine = pd.DataFrame({"row": ep.row, "start": ep.start, "stop": ep.stop, "event": ep.event,
                         "window": ep.window}).sort_values(["row", "window"], ignore_index=True)
    pd.testing.assert_frame_equal(mine, ref.sort_values(["row", "window"], ignore_index=True),
                                  check_dtype=False)
    assert ep.event.sum() == s["event"].sum()
    # a model without window terms on the episodes is the unsplit model (same risk sets)
    X = np.column_stack([s["x"], s["z"]])
    unsplit = fit_cox(X, s["time"], s["event"], entry=s["entry"], tol=1e-12)
    split = fit_cox(X[ep.row], ep.stop, ep.event, entry=ep.start, tol=1e-12)
    np.testing.assert_allclose(split.coef, unsplit.coef, rtol=1e-9)
    np.testing.assert_allclose(split.cov, unsplit.cov, rtol=1e-8)
    assert split.loglik == pytest.approx(unsplit.loglik, rel=1e-12)
    assert window_labels(cuts) == ["0-0.5", "0.5-1.5", "1.5+"]


def test_window_model_equals_lifelines_time_varying_fit() -> None:
    # lifelines CoxTimeVaryingFitter on the hand-built episodes with x x window columns and z.
    from lifelines import CoxTimeVaryingFitter

    s = _sample(2, late=0.0)
    cuts = [1.0]
    wf = fit_windows(s["x"][:, None], s["z"][:, None], s["time"], s["event"], s["entry"],
                     None, None, cuts)
    assert wf.message == ""
    ep = _episodes_by_hand(s["time"], s["event"], s["entry"], cuts)
    d = ep.assign(x0=s["x"][ep["row"]] * (ep["window"] == 0),
                  x1=s["x"][ep["row"]] * (ep["window"] == 1), z=s["z"][ep["row"]])
    cols = ["row", "start", "stop", "event"]
    ctv = CoxTimeVaryingFitter().fit(d[[*cols, "x0", "x1", "z"]], id_col="row",
                                     event_col="event", start_col="start", stop_col="stop",
                                     fit_options={"precision": 1e-12})
    np.testing.assert_allclose([wf.coef[0][0], wf.coef[1][0]], ctv.params_[["x0", "x1"]],
                               rtol=1e-6)
    np.testing.assert_allclose([wf.cov[0][0, 0], wf.cov[1][0, 0]],
                               np.diag(ctv.variance_matrix_)[:2], rtol=1e-6)
    assert wf.loglik == pytest.approx(ctv.log_likelihood_, rel=1e-9)
    common = CoxTimeVaryingFitter().fit(
        d.assign(x=s["x"][d["row"]])[[*cols, "x", "z"]], id_col="row", event_col="event",
        start_col="start", stop_col="stop", fit_options={"precision": 1e-12})
    assert wf.loglik_common == pytest.approx(common.log_likelihood_, rel=1e-9)
    assert wf.lr == pytest.approx(2 * (ctv.log_likelihood_ - common.log_likelihood_), rel=1e-6)
    assert wf.df == 1
    np.testing.assert_array_equal(wf.events, np.bincount(ep["window"][ep["event"] == 1]))


def _rates(reps: int, late: float, seed: int) -> np.ndarray:
    """Per replicate: the change test rejects at 5%; each window's 95% interval for x covers
    its true log hazard ratio (0.6 up to t = 1, ``late`` after)."""
    rng = np.random.default_rng(seed)
    out = np.zeros((reps, 3), dtype=bool)
    for b in range(reps):
        s = _sample(int(rng.integers(2**31)), n=250, late=late)
        wf = fit_windows(s["x"][:, None], s["z"][:, None], s["time"], s["event"], s["entry"],
                         None, None, [1.0])
        assert wf.message == "", wf.message
        cover = [abs(wf.coef[w][0] - truth) <= 1.959964 * np.sqrt(wf.cov[w][0, 0])
                 for w, truth in enumerate((0.6, late))]
        out[b] = [wf.p < 0.05, *cover]
    return out


def test_change_test_level_and_window_interval_coverage() -> None:
    # Seeded simulation, proportional hazards (x's log HR 0.6 throughout), 400 replicates of
    # n = 250 with delayed entry: the change test rejects at 5% and each window's interval
    # covers at 95%, within two-sided 99% Monte-Carlo bands (+- 2.576 binomial SDs).
    reps = 400
    rates = _rates(reps, 0.6, seed=11).mean(axis=0)
    assert abs(rates[0] - 0.05) <= 2.576 * np.sqrt(0.05 * 0.95 / reps), rates
    assert np.all(np.abs(rates[1:] - 0.95) <= 2.576 * np.sqrt(0.05 * 0.95 / reps)), rates


def test_change_test_power_and_coverage_when_the_effect_stops() -> None:
    # Seeded simulation: x's log HR 0.6 up to t = 1, 0 after (100 replicates of n = 250). The
    # windows' intervals still cover (99% band) and the change test rejects in most replicates
    # (measured 0.96; asserted >= 0.8, over 3 Monte-Carlo SDs below).
    reps = 100
    rates = _rates(reps, 0.0, seed=12).mean(axis=0)
    assert rates[0] >= 0.8, rates
    assert np.all(np.abs(rates[1:] - 0.95) <= 2.576 * np.sqrt(0.05 * 0.95 / reps)), rates


def _raw(one_analysis: Any, windows: list[float], family: str = "survival") -> dict[str, Any]:
    outcome = dict(OUTCOMES[family])
    outcome["follow_up_windows"] = windows
    raw = one_analysis(outcome, "marker", dict(MARKER_GROUPING))
    raw["analyses"][0]["adjust"] = ["age", "sex"]
    return raw


def test_windows_table_equals_lifelines_time_varying_fits(refit_frame: Any,
                                                          one_analysis: Any) -> None:
    # The legacy and test-spline models rebuilt from the fits table's recorded terms
    # (tests/tablerefs.py) on hand-built episodes, fitted with lifelines CoxTimeVaryingFitter.
    from lifelines import CoxTimeVaryingFitter

    frame = clinic_frame("survival", 700, seed=21)
    spec, r = refit_frame(frame, _raw(one_analysis, [1.0, 3.0]))
    tab = windows_table(r, spec)
    assert tuple(tab.columns) == COLUMNS
    assert (tab["status"] == "ok").all(), tab["message"].unique()
    fits = fits_table(r, spec)
    time, event = frame["years"].to_numpy(float), frame["flare"].to_numpy(float)
    ep = _episodes_by_hand(time, event, np.zeros_like(time) - 1.0, [1.0, 3.0])
    for form in ("legacy", "test_spline"):
        row = selected_row(fits, form, "legacy")
        (term,) = json.loads(row["exposure_basis"])
        E = term_columns(term, frame["marker"].to_numpy())[ep["row"]]
        A = np.column_stack([term_columns(t, frame[t["variable"]].to_numpy())
                             for t in json.loads(row["adjustment_terms"])])[ep["row"]]
        k = E.shape[1]
        blocks = np.column_stack([E * (ep["window"].to_numpy() == w)[:, None] for w in range(3)])
        names = [f"e{j}" for j in range(3 * k)] + [f"a{j}" for j in range(A.shape[1])]
        d = pd.DataFrame(np.column_stack([blocks, A]), columns=names)
        d[["row", "start", "stop", "event"]] = ep[["row", "start", "stop", "event"]]
        ctv = CoxTimeVaryingFitter().fit(d, id_col="row", event_col="event", start_col="start",
                                         stop_col="stop", fit_options={"precision": 1e-12})
        d0 = pd.DataFrame(np.column_stack([E, A]), columns=[f"c{j}" for j in range(k + A.shape[1])])
        d0[["row", "start", "stop", "event"]] = ep[["row", "start", "stop", "event"]]
        ctv0 = CoxTimeVaryingFitter().fit(d0, id_col="row", event_col="event", start_col="start",
                                          stop_col="stop", fit_options={"precision": 1e-12})
        b, V = ctv.params_.to_numpy(), ctv.variance_matrix_.to_numpy()
        mine = tab[(tab["form"] == form) & (tab["adjustment"] == "legacy")]
        test = mine[mine["row_type"] == "test"].iloc[0]
        assert test["df"] == 2 * k
        assert test["lr"] == pytest.approx(2 * (ctv.log_likelihood_ - ctv0.log_likelihood_),
                                           rel=1e-5)
        for w, label in enumerate(["0-1", "1-3", "3+"]):
            bw, Vw = b[w * k:(w + 1) * k], V[w * k:(w + 1) * k, w * k:(w + 1) * k]
            rows = mine[mine["window"] == label]
            assert (rows["events"] == int(ep["event"][ep["window"] == w].sum())).all()
            if form == "legacy":
                np.testing.assert_allclose(rows["estimate"], bw, rtol=1e-5, atol=1e-7)
                np.testing.assert_allclose(rows["se"], np.sqrt(np.diag(Vw)), rtol=1e-5)
                # placed at each group's median marker, the reference group's as x_reference
                # (groups from the recorded indicator columns, medians by numpy)
                marker = frame["marker"].to_numpy(float)
                G = term_columns(term, marker)
                np.testing.assert_allclose(rows["x"], [np.median(marker[G[:, j] == 1])
                                                       for j in range(k)])
                assert (rows["x_reference"] == np.median(marker[G.sum(axis=1) == 0])).all()
            else:
                xs = rows["x"].to_numpy()
                x_ref = float(rows["x_reference"].iloc[0])
                D = term_columns(term, xs) - term_columns(term, np.array([x_ref]))
                np.testing.assert_allclose(rows["estimate"], D @ bw, rtol=1e-5, atol=1e-7)
                np.testing.assert_allclose(rows["se"], np.sqrt(np.einsum(
                    "ij,jk,ik->i", D, Vw, D)), rtol=1e-5, atol=1e-9)
            np.testing.assert_allclose(rows["effect"], np.exp(rows["estimate"]), rtol=1e-12)
    # the figure's selection holds the table's rows of the legacy coding, window by window
    sel = select_windows(tab, "years")
    assert sel is not None and sel.adjustment == "legacy"
    assert [w.label for w in sel.windows] == ["0–1 years", "1–3 years", "3+ years"]
    for w, label in zip(sel.windows, ["0-1", "1-3", "3+"], strict=True):
        rows = tab[(tab["window"] == label) & (tab["adjustment"] == "legacy")]
        curve = rows[rows["row_type"] == "curve"].sort_values("x")
        np.testing.assert_array_equal(w.curve["effect"], curve["effect"])
        np.testing.assert_array_equal(w.groups["x"], np.sort(rows.loc[rows["row_type"] == "group",
                                                                      "x"]))
    tests = tab[(tab["row_type"] == "test") & (tab["adjustment"] == "legacy")].set_index("form")
    assert sel.p_curve == tests.loc["test_spline", "p"]
    assert sel.p_groups == tests.loc["legacy", "p"]


def test_windows_table_empty_without_windows_or_survival(refit_frame: Any,
                                                         one_analysis: Any) -> None:
    frame = clinic_frame("survival", 300, seed=3)
    raw = _raw(one_analysis, [1.0])
    del raw["analyses"][0]["outcome"]["follow_up_windows"]
    spec, r = refit_frame(frame, raw)
    tab = windows_table(r, spec)
    assert tab.empty and tuple(tab.columns) == COLUMNS


def test_bad_windows_are_named(refit_frame: Any, one_analysis: Any, tmp_path: Path) -> None:
    frame = clinic_frame("survival", 300, seed=3)
    spec, r = refit_frame(frame, _raw(one_analysis, [3.0, 1.0]))
    tab = windows_table(r, spec)
    assert len(tab) == 1 and tab.iloc[0]["status"] == "failed"
    assert "outcome.follow_up_windows" in tab.iloc[0]["message"]
    assert "increasing order" in tab.iloc[0]["message"]
    # a window past the end of follow-up has no events: failed test rows, the reason given
    spec, r = refit_frame(frame, _raw(one_analysis, [50.0]))
    tab = windows_table(r, spec)
    assert (tab["status"] == "failed").all() and (tab["row_type"] == "test").all()
    assert tab["message"].str.contains("no events in follow-up window").all()
    with pytest.raises(SpecError, match="follow_up_windows"):
        parse_spec(_raw(one_analysis, [-1.0]), base=tmp_path)
    with pytest.raises(SpecError, match="follow_up_windows"):
        parse_spec(_raw(one_analysis, [1.0], family="binary"), base=tmp_path)
