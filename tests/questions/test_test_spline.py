"""The information table's tests use a spline whose knots are fixed before the outcome is seen
(``continuous.test_knots``), so they keep their level; fractional polynomials count their
powers in AIC.

Operating characteristics: type-I error of the nonlinearity test (linear truth) and of the test
that the spline adds beyond the legacy groups (truth: a step function at the legacy cuts), by
seeded simulation with a two-sided Monte-Carlo band of 3 binomial SEs around 0.05 (a correct
test fails by chance with probability ~0.003 per check). Agreement: the likelihood ratios
against statsmodels on the same model built independently (patsy's natural cubic regression
spline ``cr`` on the recorded knots spans the same space as the restricted cubic spline), and
the FP AIC against statsmodels' AIC plus 2 per estimated power (Royston & Sauerbrei 2008).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import patsy
import pytest
import statsmodels.api as sm

from unbin.data import analysis_sample
from unbin.errors import SpecError
from unbin.questions.fits import fits_table
from unbin.questions.information import information_table
from unbin.refit.analysis import refit_analysis
from unbin.spec import Spec, parse_spec

ALPHA = 0.05
N = 300
CUTS = (-0.43, 0.43)


def _spec(family: str, **continuous: Any) -> Spec:
    outcome = ({"type": "binary", "event": "y"} if family == "binary"
               else {"type": "continuous", "value": "y"})
    raw = {"study": "sim", "cohorts": [{"name": "sim", "path": "unused.parquet"}],
           "groupings": {"x": {"cuts": list(CUTS)}},
           "analyses": [{"name": "a", "outcome": outcome, "exposure": "x"}],
           "continuous": {"forms": ["linear", "spline"], "spline_knots": [3, 4, 5], **continuous}}
    return parse_spec(raw, base=Path("."))


def _draw(rng: np.random.Generator, family: str, truth: str) -> pd.DataFrame:
    x = rng.normal(size=N)
    eta = (-0.5 + 0.5 * x if truth == "linear"
           else -0.5 + 0.5 * (x >= CUTS[0]) + 0.5 * (x >= CUTS[1]))
    y = ((rng.random(N) < 1 / (1 + np.exp(-eta))).astype(float) if family == "binary"
         else eta + rng.normal(size=N))
    return pd.DataFrame({"x": x, "y": y})


def _rejection_rate(family: str, truth: str, column: str, replicates: int, seed: int) -> float:
    spec = _spec(family)
    a = spec.analyses[0]
    rng = np.random.default_rng(seed)
    p = []
    for _ in range(replicates):
        r = refit_analysis(analysis_sample(_draw(rng, family, truth), a, spec), a, spec, "sim")
        info = information_table(r)
        p.append(float(info.loc[info["adjustment"] == "legacy", column].iloc[0]))
    p_arr = np.array(p)
    assert np.isfinite(p_arr).all()
    return float(np.mean(p_arr < ALPHA))


CASES = [("binary", "linear", "nonlinearity_p"), ("continuous", "linear", "nonlinearity_p"),
         ("binary", "step", "added_p"), ("continuous", "step", "added_p")]


@pytest.mark.parametrize(("family", "truth", "column"), CASES)
def test_type_one_error_of_the_tests_is_nominal(family: str, truth: str, column: str) -> None:
    """400 replicates of n = 300 under each test's null: the rejection rate at 5% must lie in
    0.05 +- 3 sqrt(0.05 * 0.95 / 400) = [0.017, 0.083] (seeded simulation; two-sided, so an
    over-conservative test fails too). On the AIC-chosen spline the nonlinearity test rejects
    about 10% (benchmarks/checks/nonlinearity.py)."""
    replicates = 400
    rate = _rejection_rate(family, truth, column, replicates, seed=20240 + len(column))
    band = 3 * np.sqrt(ALPHA * (1 - ALPHA) / replicates)
    assert abs(rate - ALPHA) <= band, f"{family} {column}: {rate:.4f} outside 0.05 +- {band:.4f}"


@pytest.mark.slow
@pytest.mark.parametrize(("family", "truth", "column"), CASES)
def test_type_one_error_of_the_tests_is_nominal_at_2000_replicates(family: str, truth: str,
                                                                    column: str) -> None:
    """As above with 2,000 replicates: band 0.05 +- 0.0146, narrow enough that a test on the
    AIC-chosen spline (about 0.10) cannot pass by chance."""
    replicates = 2000
    rate = _rejection_rate(family, truth, column, replicates, seed=31 + len(family))
    band = 3 * np.sqrt(ALPHA * (1 - ALPHA) / replicates)
    assert abs(rate - ALPHA) <= band, f"{family} {column}: {rate:.4f} outside 0.05 +- {band:.4f}"


def _cr(x: np.ndarray, knots: list[float]) -> np.ndarray:
    """patsy's natural cubic regression spline on the recorded knots (centred, no intercept):
    an implementation independent of unbin's, spanning the same space."""
    return np.asarray(patsy.dmatrix(
        "cr(x, knots=inner, lower_bound=lo, upper_bound=hi, constraints='center') - 1",
        {"x": x, "inner": knots[1:-1], "lo": knots[0], "hi": knots[-1]}))


@pytest.mark.parametrize("family", ["binary", "continuous"])
def test_test_spline_likelihood_ratios_match_statsmodels(family: str) -> None:
    """LR chi-squares of the test spline, of the nonlinearity test, of the spline beyond the
    groups and of the legacy + spline model, with an adjustment variable z (legacy coding:
    z linear), against statsmodels GLM (binomial) / OLS log-likelihoods on designs rebuilt from
    the knots recorded in the fits table. The knots are the exposure's 5/35/65/95th percentiles
    whatever the outcome (common practice for 4 knots)."""
    rng = np.random.default_rng(808)
    n = 1500
    x = rng.gamma(3.0, 1.0, size=n)
    z = rng.normal(size=n)
    eta = -1.0 + 0.4 * np.log(x) + 0.3 * z
    y = ((rng.random(n) < 1 / (1 + np.exp(-eta))).astype(float) if family == "binary"
         else eta + rng.normal(size=n))
    frame = pd.DataFrame({"x": x, "z": z, "y": y})
    outcome = ({"type": "binary", "event": "y"} if family == "binary"
               else {"type": "continuous", "value": "y"})
    raw = {"study": "sim", "cohorts": [{"name": "sim", "path": "unused.parquet"}],
           "groupings": {"x": {"cuts": [2.0, 4.0]}},
           "analyses": [{"name": "a", "outcome": outcome, "exposure": "x", "adjust": ["z"]}],
           "continuous": {"forms": ["linear", "spline"], "spline_knots": [3, 5]}}
    spec = parse_spec(raw, base=Path("."))
    a = spec.analyses[0]
    r = refit_analysis(analysis_sample(frame, a, spec), a, spec, "sim")
    fits = fits_table(r)
    row = fits[(fits["form"] == "test_spline") & (fits["adjustment"] == "legacy")].iloc[0]
    knots = json.loads(row["exposure_basis"])[0]["knots"]
    np.testing.assert_allclose(knots, np.quantile(x, [0.05, 0.35, 0.65, 0.95]), rtol=1e-12)
    info = information_table(r).set_index("adjustment").loc["legacy"]
    assert info["test_detail"].startswith("restricted cubic spline, 4 fixed knots at")
    assert f"{knots[0]:.4g}" in info["test_detail"]

    groups = np.column_stack([(x >= 2.0) & (x < 4.0), x >= 4.0]).astype(float)
    designs = {"null": [z], "linear": [x, z], "test": [_cr(x, knots), z],
               "legacy": [groups, z], "both": [groups, _cr(x, knots), z]}

    def loglik(cols: list[np.ndarray]) -> float:
        X = sm.add_constant(np.column_stack(cols))
        if family == "binary":
            return float(sm.GLM(y, X, family=sm.families.Binomial()).fit().llf)
        return float(sm.OLS(y, X).fit().llf)

    ll = {k: loglik(v) for k, v in designs.items()}
    tol = {"rel": 1e-6, "abs": 1e-6}
    assert info["lr_test_spline"] == pytest.approx(2 * (ll["test"] - ll["null"]), **tol)
    assert info["df_test_spline"] == 3
    assert info["nonlinearity_lr"] == pytest.approx(2 * (ll["test"] - ll["linear"]), **tol)
    assert info["nonlinearity_df"] == 2
    assert info["added_lr"] == pytest.approx(2 * (ll["both"] - ll["legacy"]), **tol)
    assert info["added_df"] == 3
    assert info["lr_legacy_plus_spline"] == pytest.approx(2 * (ll["both"] - ll["null"]), **tol)
    assert info["info_kept"] == pytest.approx((ll["legacy"] - ll["null"])
                                              / (ll["both"] - ll["null"]), rel=1e-6)


def _fp_basis(x: np.ndarray, term: dict[str, Any]) -> np.ndarray:
    """FP columns rebuilt from the recorded powers, shift and scale (Royston & Altman 1994: a
    repeated power p gives x^p and x^p log x; power 0 is log x)."""
    v = (x + term["shift"]) / term["scale"]
    cols, prev = [], None
    for p in term["powers"]:
        base = np.log(v) if p == 0 else v ** p
        cols.append(base * np.log(v) if p == prev else base)
        prev = p
    return np.column_stack(cols)


def test_fp_aic_counts_the_estimated_powers() -> None:
    """fp1/fp2 rows of the fits table: AIC = statsmodels' AIC on the same design + 2 per power
    (FP1 spends 2 df on the exposure, FP2 4; Royston & Sauerbrei 2008), n_params likewise, and
    the information table's aic_fp is the selected FP's."""
    rng = np.random.default_rng(1994)
    n = 2000
    x = rng.uniform(0.5, 10.0, size=n)
    eta = -1.0 + 0.8 * np.log(x) - 0.05 * x
    y = (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(float)
    raw = {"study": "sim", "cohorts": [{"name": "sim", "path": "unused.parquet"}],
           "groupings": {"x": {"cuts": [3.0, 6.0]}},
           "analyses": [{"name": "a", "outcome": {"type": "binary", "event": "y"},
                         "exposure": "x"}],
           "continuous": {"forms": ["fp"]}}
    spec = parse_spec(raw, base=Path("."))
    a = spec.analyses[0]
    r = refit_analysis(analysis_sample(pd.DataFrame({"x": x, "y": y}), a, spec), a, spec, "sim")
    fits = fits_table(r)
    fits = fits[fits["adjustment"] == "legacy"]
    for form in ("fp1", "fp2"):
        row = fits[fits["form"] == form].iloc[0]
        term = json.loads(row["exposure_basis"])[0]
        ref = sm.GLM(y, sm.add_constant(_fp_basis(x, term)),
                     family=sm.families.Binomial()).fit()
        k = len(term["powers"])
        assert row["aic"] == pytest.approx(ref.aic + 2 * k, rel=1e-8)
        assert row["n_params"] == 1 + 2 * k
    chosen = fits[(fits["form"] == "fp") & fits["selected"]].iloc[0]
    info = information_table(r).set_index("adjustment").loc["legacy"]
    assert info["aic_fp"] == pytest.approx(chosen["aic"], rel=1e-12)
    if chosen["detail"].startswith("FP"):  # an FP1/FP2 was chosen: its powers are counted
        k = len(json.loads(chosen["exposure_basis"])[0]["powers"])
        assert chosen["n_params"] == 1 + 2 * k


def test_test_knots_override_and_validation(tmp_path: Path) -> None:
    """An analysis' own test_knots gives the test spline that many knots; bad values are named
    with the field, the value and the fix."""
    rng = np.random.default_rng(3)
    frame = _draw(rng, "binary", "linear")
    spec = _spec("binary", test_knots=5)
    a = spec.analyses[0]
    assert a.continuous.test_knots == 5 and _spec("binary").analyses[0].continuous.test_knots == 4
    r = refit_analysis(analysis_sample(frame, a, spec), a, spec, "sim")
    info = information_table(r).set_index("adjustment").loc["legacy"]
    assert info["df_test_spline"] == 4 and info["nonlinearity_df"] == 3
    assert "5 fixed knots" in info["test_detail"]
    for bad, expected in ((2, "continuous.test_knots: 2 knots is not supported; use a whole "
                               "number of knots from 3 to 7"),
                          (9, "continuous.test_knots: 9 knots is not supported"),
                          ("four", "continuous.test_knots: 'four' has the wrong type; expected "
                                   "integer")):
        with pytest.raises(SpecError) as err:
            _spec("binary", test_knots=bad)
        assert expected in str(err.value)
    with pytest.raises(SpecError) as err:
        _spec("binary", test_knot=4)
    assert "Did you mean 'test_knots'?" in str(err.value)


def test_too_few_distinct_values_for_the_test_spline_is_a_message_not_a_crash() -> None:
    """An exposure with five distinct values cannot carry 7 distinct knots at the default
    quantiles: the analysis still runs, the tests are NaN (not computed on some other spline)
    and the message names the spec field to change."""
    rng = np.random.default_rng(12)
    x = rng.choice([0.0, 1.0, 2.0, 3.0, 4.0], size=N)
    y = (rng.random(N) < 1 / (1 + np.exp(-0.5 * x))).astype(float)
    spec = _spec("binary", test_knots=7, spline_knots=[3])
    a = spec.analyses[0]
    r = refit_analysis(analysis_sample(pd.DataFrame({"x": x, "y": y}), a, spec), a, spec, "sim")
    assert any("continuous.test_knots" in m for m in r.messages)
    info = information_table(r).set_index("adjustment").loc["legacy"]
    assert np.isnan(info["nonlinearity_p"]) and np.isnan(info["added_p"])
    assert np.isnan(info["info_kept"]) and info["test_detail"] == ""
    assert np.isfinite(info["lr_linear"])
