"""The screened fractional-polynomial search (refit/fp_selection.py) against the exhaustive one
(every candidate fitted in full), and the exhaustive deviances against reference libraries."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest

from helpers import bare_refit
from unbin.refit.analysis import FormFit, _Fitter, adjustment_terms
from unbin.refit.fp_selection import exhaustive_best, screened_best, select_fp
from unbin.terms import FPTerm, LinearTerm

OUTCOMES = {
    "binary": {"type": "binary", "event": "yb"},
    "continuous": {"type": "continuous", "value": "yc"},
    "count": {"type": "count", "count": "yn", "persontime": "pt"},
    "survival": {"type": "survival", "time": "t", "event": "d"},
}
SHAPES = {  # the exposure's effect on the linear predictor
    "linear": lambda x: 0.08 * x,
    "log": lambda x: 0.6 * np.log(x),
    "u": lambda x: 0.012 * (x - 10.0) ** 2,
    "threshold": lambda x: 0.15 * np.maximum(x - 12.0, 0.0),
    "null": lambda x: 0.0 * x,
}


def _frame(shape: str, seed: int, n: int = 1500) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.gamma(3.0, 3.0, n) + 0.2
    age = 50 + 10 * rng.normal(size=n) + 0.3 * x
    sex = rng.integers(0, 2, n).astype(float)
    eta = SHAPES[shape](x) + 0.02 * (age - 50) + 0.3 * sex
    pt = rng.uniform(0.5, 3.0, n)
    t_event = rng.exponential(1.0 / (0.2 * np.exp(eta)))
    t_cens = rng.uniform(1.0, 8.0, n)
    return pd.DataFrame({
        "x": x, "age": age, "sex": sex,
        "yb": (rng.random(n) < 1.0 / (1.0 + np.exp(-(eta - 1.5)))).astype(float),
        "yc": eta + rng.normal(0.0, 0.7, n),
        "yn": rng.poisson(0.5 * pt * np.exp(eta)).astype(float), "pt": pt,
        # times rounded to 0.05: tied event times (Efron)
        "t": np.maximum(np.round(np.minimum(t_event, t_cens), 2), 0.01),
        "d": (t_event <= t_cens).astype(float),
    })


def _setup(family: str, frame: pd.DataFrame, **analysis: Any) -> tuple[_Fitter, Any]:
    raw = {
        "study": "sim", "cohorts": [{"name": "sim", "path": "sim.parquet"}],
        "groupings": {"x": {"cuts": [5.0, 10.0, 15.0]}},
        "analyses": [{"name": "a", "outcome": OUTCOMES[family], "exposure": "x",
                      "adjust": ["age", "sex"], **analysis}],
    }
    r, spec = bare_refit(frame, raw)
    return _Fitter(r, r.sample.frame), spec


def _best_both_ways(f: _Fitter, spec: Any, coding: str) -> tuple[dict[int, Any], dict[int, Any],
                                                                  int, int]:
    adjust = adjustment_terms(f.df, f.r.analysis, spec, coding)
    null = f.run((), adjust)
    assert null.ok, null.message
    before = len(f.cache)
    screened = screened_best(f, adjust, f.r.x, "x", null)
    fitted_screened = len(f.cache) - before
    f.cache.clear()
    before = len(f.cache)
    exhaustive = exhaustive_best(f, adjust, f.r.x, "x")
    fitted_exhaustive = len(f.cache) - before
    return screened, exhaustive, fitted_screened, fitted_exhaustive


@pytest.mark.parametrize("family", list(OUTCOMES))
@pytest.mark.parametrize("shape", list(SHAPES))
def test_screened_search_chooses_the_exhaustive_powers(family: str, shape: str) -> None:
    # Brute force as the reference: every one of the 44 candidates fitted to convergence. The
    # screened search must give the same best FP1 and FP2 powers with the same fits (the same
    # log-likelihoods to 1e-8, and in fact the same numbers: the winners are fitted the usual
    # way), while fitting fewer candidates in full.
    f, spec = _setup(family, _frame(shape, seed=10 * list(OUTCOMES).index(family) + list(SHAPES).index(shape)))
    for coding in ("legacy", "continuous"):
        screened, exhaustive, n_screened, n_exhaustive = _best_both_ways(f, spec, coding)
        assert n_exhaustive >= 44 - 1  # (the linear FP1 may share the linear fit's cache)
        assert set(screened) == set(exhaustive) == {1, 2}
        for degree in (1, 2):
            (t_s, r_s), (t_e, r_e) = screened[degree], exhaustive[degree]
            assert t_s == t_e, (family, shape, coding, degree, t_s.powers, t_e.powers)
            assert abs(r_s.loglik - r_e.loglik) <= 1e-8 * max(1.0, abs(r_e.loglik))
            np.testing.assert_array_equal(r_s.coef, r_e.coef)
        assert n_screened < n_exhaustive / 4, (family, shape, coding, n_screened)


def test_screened_search_with_strata_entry_and_weights() -> None:
    # Cox with strata and delayed entry, and the logistic and Poisson models with frequency
    # weights: the bound holds for these likelihoods too (brute force as the reference).
    frame = _frame("u", seed=5)
    rng = np.random.default_rng(5)
    frame["centre"] = rng.integers(0, 3, len(frame)).astype(float)
    frame["entered"] = np.where(rng.random(len(frame)) < 0.4, 0.5 * frame["t"], 0.0)
    frame["w"] = rng.integers(1, 4, len(frame)).astype(float)
    cases = [
        ("survival", {"outcome": {**OUTCOMES["survival"], "entry": "entered"},
                      "strata": ["centre"]}),
        ("binary", {"weights": {"column": "w", "kind": "frequency"}}),
        ("count", {"weights": {"column": "w", "kind": "frequency"}}),
    ]
    for family, extra in cases:
        f, spec = _setup(family, frame, **extra)
        screened, exhaustive, n_screened, _ = _best_both_ways(f, spec, "continuous")
        for degree in (1, 2):
            assert screened[degree][0] == exhaustive[degree][0], (family, degree)
            assert screened[degree][1].loglik == exhaustive[degree][1].loglik
        assert n_screened < 12, (family, n_screened)


def test_select_fp_reports_the_same_rows_both_ways() -> None:
    # The closed test's rows (best FP1, best FP2, the chosen function) are the same objects'
    # numbers whichever search ran (brute force as the reference).
    frame = _frame("log", seed=3)
    f, spec = _setup("binary", frame)
    adjust = adjustment_terms(f.df, f.r.analysis, spec, "legacy")
    null, linear = f.run((), adjust), f.run((LinearTerm("x"),), adjust)
    out: list[tuple[list[FormFit], FormFit]] = []
    for exhaustive in (False, True):
        f.cache.clear()
        out.append(select_fp(f, adjust, f.r.x, "x", 0.05, null, linear, exhaustive=exhaustive))
    (rows_s, chosen_s), (rows_e, chosen_e) = out
    assert chosen_s.detail == chosen_e.detail
    assert [r.detail for r in rows_s] == [r.detail for r in rows_e]
    for a, b in zip(rows_s, rows_e, strict=True):
        assert a.result.loglik == b.result.loglik and a.result.n_params == b.result.n_params
        np.testing.assert_array_equal(a.result.cov, b.result.cov)


def _fp_basis(x: np.ndarray, term: FPTerm) -> np.ndarray:
    """The FP columns written out (Royston & Sauerbrei 2008): x^p, log x for p = 0, and
    x^p log x for a repeated power, after the term's shift and scale."""
    z = (x + term.shift) / term.scale
    cols, prev = [], None
    for p in term.powers:
        col = np.log(z) if p == 0 else z ** p
        cols.append(cols[-1] * np.log(z) if p == prev else col)
        prev = p
    return np.column_stack(cols)


def test_exhaustive_deviances_equal_statsmodels_and_lifelines() -> None:
    # Every candidate's log-likelihood in the exhaustive search, on one design per family,
    # against statsmodels GLM (logistic, Poisson with log person-time offset, Gaussian by OLS)
    # and lifelines CoxPHFitter (Efron ties), fitted to the same columns.
    import statsmodels.api as sm
    from lifelines import CoxPHFitter

    frame = _frame("log", seed=21, n=600)
    frame["x"] += 2.0  # away from the origin, where x^-1 would fit a rate of practically 0
    adj = frame[["age", "sex"]].to_numpy()
    for family in OUTCOMES:
        f, spec = _setup(family, frame)
        adjust = adjustment_terms(f.df, f.r.analysis, spec, "legacy")
        checked = 0
        for powers in ((-1.0,), (0.0,), (-0.5, 1.0), (0.5, 0.5), (2.0, 3.0)):
            term = FPTerm.from_data("x", f.r.x, powers)
            res = f.run((term,), adjust)
            assert res.ok, res.message
            checked += 1
            X = np.column_stack([_fp_basis(frame["x"].to_numpy(), term), adj])
            if family == "survival":
                df = pd.DataFrame(X, columns=[f"c{j}" for j in range(X.shape[1])])
                df["t"], df["d"] = frame["t"], frame["d"]
                ref = CoxPHFitter().fit(df, "t", "d").log_likelihood_
                tol = 1e-6
            elif family == "continuous":
                ref = sm.OLS(frame["yc"], sm.add_constant(X)).fit().llf
                tol = 1e-9
            elif family == "binary":
                ref = sm.GLM(frame["yb"], sm.add_constant(X), family=sm.families.Binomial()
                             ).fit(tol=1e-12).llf
                tol = 1e-8
            else:
                ref = sm.GLM(frame["yn"], sm.add_constant(X), family=sm.families.Poisson(),
                             offset=np.log(frame["pt"])).fit(tol=1e-12).llf
                tol = 1e-8
            assert res.loglik == pytest.approx(ref, rel=tol), (family, powers)
        assert checked == 5, family


@pytest.mark.parametrize("family", ["binary", "count", "continuous"])
def test_near_equal_candidates_pruned_by_the_glm_margin(family: str,
                                                       monkeypatch: pytest.MonkeyPatch) -> None:
    # A wide, smooth exposure range on 20,000 rows: the best FP2 candidates' maxima lie a few
    # 1e-8 of the log-likelihood apart, inside the Cox margin (1e-7) and outside the linear,
    # logistic and Poisson fits' (1e-9). Brute force as the reference: the screened search
    # still picks the exhaustive powers with the same fits, and with the smaller margin it
    # fits fewer candidates in full than with the larger one.
    from unbin.refit import fp_selection

    frame = _frame("log", seed=7, n=20000)
    frame["x"] = 5.0 + 20.0 * np.random.default_rng(1).random(len(frame))
    f, spec = _setup(family, frame)
    screened, exhaustive, n_screened, _ = _best_both_ways(f, spec, "continuous")
    for degree in (1, 2):
        (t_s, r_s), (t_e, r_e) = screened[degree], exhaustive[degree]
        assert t_s == t_e, (family, degree, t_s.powers, t_e.powers)
        np.testing.assert_array_equal(r_s.coef, r_e.coef)
    f.cache.clear()
    monkeypatch.setattr(fp_selection, "_GLM_MARGIN", 1e-7)
    wide, _, n_wide, _ = _best_both_ways(f, spec, "continuous")
    assert [wide[d][0] for d in (1, 2)] == [exhaustive[d][0] for d in (1, 2)]
    assert n_screened < n_wide, (family, n_screened, n_wide)
