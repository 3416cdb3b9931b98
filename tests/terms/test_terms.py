"""Design columns (unbin.terms) against published formulas and reference libraries."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd
import patsy
import pytest
import statsmodels.api as sm
from scipy import stats

from unbin.models import Outcome, fit
from unbin.refit.analysis import Refit
from unbin.spec import Grouping
from unbin.terms import (
    FP_POWERS,
    FPTerm,
    GroupedTerm,
    LinearTerm,
    SplineTerm,
    default_knots,
    fp_shift,
)
from unbin.terms.fp import FP1_SET, FP2_SET
from unbin.terms.legacy import resolve_cuts

# --------------------------------------------------------------------------- splines


def _ls_fitted(X: np.ndarray, y: np.ndarray) -> np.ndarray:
    coef, *_ = np.linalg.lstsq(X, y, rcond=None)
    return np.asarray(X @ coef)


@pytest.mark.parametrize("k", [3, 4, 5, 7])
def test_spline_spans_the_same_space_as_patsy_natural_cubic_spline(k: int) -> None:
    # Reference library: patsy cr(x, knots=inner, lower_bound=t1, upper_bound=tk) is a natural
    # cubic regression spline with the same knots, i.e. the same function space as the
    # restricted cubic spline (patsy's cr() as the reference library): OLS fitted values must agree.
    rng = np.random.default_rng(11 + k)
    x = rng.gamma(3.0, 2.0, 800)  # skewed, with values well beyond both outer knots
    y = np.sin(x / 2.0) + 0.05 * x**2 + rng.normal(0.0, 0.3, x.size)
    term = SplineTerm.at_quantiles("x", x, k)
    t = np.asarray(term.knots)
    ours = _ls_fitted(np.column_stack([np.ones_like(x), term.basis(x)]), y)
    ref_basis = np.asarray(patsy.dmatrix(
        "cr(x, knots=inner, lower_bound=lo, upper_bound=hi) - 1",
        {"x": x, "inner": t[1:-1], "lo": t[0], "hi": t[-1]}))
    assert ref_basis.shape[1] == k  # k natural-spline functions, constant included
    ref = _ls_fitted(ref_basis, y)
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-8 * np.abs(y).max())
    # ... and the spline really bends: a straight line fits clearly worse.
    line = _ls_fitted(np.column_stack([np.ones_like(x), x]), y)
    assert np.sum((y - line) ** 2) > 1.2 * np.sum((y - ours) ** 2)


def _durrleman_simon(x: float, t: list[float]) -> list[float]:
    """Durrleman & Simon 1989 (Stat Med 8:551), written out here, one point at a time."""
    k = len(t)

    def cube(u: float) -> float:
        return max(u, 0.0) ** 3

    out = [x]
    for j in range(k - 2):
        s = (cube(x - t[j])
             - cube(x - t[k - 2]) * (t[k - 1] - t[j]) / (t[k - 1] - t[k - 2])
             + cube(x - t[k - 1]) * (t[k - 2] - t[j]) / (t[k - 1] - t[k - 2]))
        out.append(s / (t[k - 1] - t[0]) ** 2)
    return out


def test_spline_basis_matches_the_durrleman_simon_formula() -> None:
    # Published formula (Durrleman & Simon 1989), written out independently above.
    knots = [1.0, 2.5, 4.0, 7.0, 10.0]
    points = [-3.0, 1.0, 1.7, 2.5, 3.2, 5.5, 7.0, 8.8, 10.0, 14.0]
    got = SplineTerm("x", tuple(knots)).basis(np.array(points))
    want = np.array([_durrleman_simon(p, knots) for p in points])
    assert got.shape == (len(points), len(knots) - 1)
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-14)


def test_spline_is_linear_beyond_the_outer_knots_and_cubic_inside() -> None:
    # Restricted cubic spline: linear in the tails (Stone & Koo 1985; Durrleman & Simon 1989).
    knots = (2.0, 3.0, 5.0, 8.0)
    term = SplineTerm("x", knots)
    h = 0.25
    for lo, hi in ((-10.0, 2.0), (8.0, 30.0)):
        b = term.basis(np.arange(lo, hi + h / 2, h))
        second = np.diff(b, n=2, axis=0)
        assert np.abs(second).max() < 1e-9 * max(1.0, np.abs(b).max())
    inside = np.diff(term.basis(np.arange(3.0, 8.0, h)), n=2, axis=0)
    assert np.abs(inside[:, 1:]).max() > 1e-3  # the nonlinear columns do bend between knots


# Default knot quantiles (published regression-modelling texts; common practice).
KNOT_QUANTILES = {
    3: [0.10, 0.50, 0.90],
    4: [0.05, 0.35, 0.65, 0.95],
    5: [0.05, 0.275, 0.50, 0.725, 0.95],
    6: [0.05, 0.23, 0.41, 0.59, 0.77, 0.95],
    7: [0.025, 0.1833, 0.3417, 0.50, 0.6583, 0.8167, 0.975],
}


@pytest.mark.parametrize("k", sorted(KNOT_QUANTILES))
def test_default_knots_sit_at_the_published_quantiles(k: int) -> None:
    x = np.random.default_rng(k).lognormal(0.0, 0.6, 1000)
    np.testing.assert_allclose(default_knots(x, k), np.quantile(x, KNOT_QUANTILES[k]),
                               rtol=1e-12)
    # numpy's quantiles of the sorted sample, exactly: the unsorted sample is not sorted first
    # (order statistics do not depend on the order), and the knots do not move
    np.testing.assert_array_equal(default_knots(x, k),
                                  np.quantile(np.sort(x), KNOT_QUANTILES[k]))


def test_default_outer_knots_move_to_fifth_extreme_values_below_100_observations() -> None:
    # Common practice: with under 100 values the outer knots are the 5th smallest
    # and 5th largest values; the inner ones stay at their quantiles.
    x = np.random.default_rng(3).normal(50.0, 10.0, 60)
    xs = np.sort(x)
    knots = default_knots(x, 4)
    assert knots[0] == xs[4] and knots[-1] == xs[-5]
    np.testing.assert_allclose(knots[1:-1], np.quantile(x, [0.35, 0.65]), rtol=1e-12)


def test_spline_refuses_unsorted_or_too_few_knots() -> None:
    with pytest.raises(ValueError, match="strictly increasing"):
        SplineTerm("x", (1.0, 3.0, 2.0))
    with pytest.raises(ValueError, match="at least 3"):
        SplineTerm("x", (1.0, 2.0))


# --------------------------------------------------------------------------- fractional polynomials


def test_fp_power_set_and_model_counts() -> None:
    # Royston & Altman 1994 (JRSS-C 43:429): S = {-2, -1, -0.5, 0, 0.5, 1, 2, 3}; 8 FP1 and
    # 36 FP2 models (pairs with repetition).
    assert sorted(FP_POWERS) == [-2.0, -1.0, -0.5, 0.0, 0.5, 1.0, 2.0, 3.0]
    assert len(FP1_SET) == 8 and len(set(FP1_SET)) == 8
    assert len(FP2_SET) == 36 and len({tuple(sorted(p)) for p in FP2_SET}) == 36


@pytest.mark.parametrize("p", [-2.0, -0.5, 0.0, 0.5, 1.0, 3.0])
def test_fp_repeated_power_gives_x_to_p_and_x_to_p_log_x(p: float) -> None:
    # Royston & Altman 1994: x^0 = log x; a repeated power p gives x^p and x^p log x.
    x = np.array([0.2, 0.9, 1.0, 2.5, 7.0, 40.0])
    first = np.log(x) if p == 0 else x**p
    got = FPTerm("x", (p, p)).basis(x)
    np.testing.assert_allclose(got[:, 0], first, rtol=1e-13)
    np.testing.assert_allclose(got[:, 1], first * np.log(x), rtol=1e-13, atol=1e-15)
    single = FPTerm("x", (p, 2.0 if p != 2.0 else 3.0)).basis(x)
    np.testing.assert_allclose(single[:, 0], first, rtol=1e-13)


@pytest.mark.parametrize("values", [
    [-3.0, -1.0, -1.0, 0.0, 0.5, 2.0],  # negatives: smallest gap 0.5
    [0.0, 0.25, 1.0, 1.0, 4.0],  # zero: smallest gap 0.25
    [-12.0, -2.0, 8.0],  # smallest gap 10
])
def test_fp_shift_rule_for_non_positive_data(values: list[float]) -> None:
    # Royston & Sauerbrei 2008 (sec. 4.7): shift by -min + the data's rounding step (here the
    # smallest gap between sorted distinct values, which exceeds 1% of the range), so that the
    # smallest shifted value equals that gap.
    distinct = sorted(set(values))
    gap = min(b - a for a, b in zip(distinct, distinct[1:], strict=False))
    assert fp_shift(values) == pytest.approx(-min(values) + gap, rel=1e-14)
    term = FPTerm.from_data("x", np.array(values), (0.0,))
    assert min(values) + term.shift == pytest.approx(gap, rel=1e-12)
    assert np.isfinite(term.basis(np.array(values))).all()


def test_fp_shift_at_full_precision_lets_no_single_row_dominate() -> None:
    # Full-precision data: the smallest gap (~1e-7 here) is not a rounding step. The shift
    # floors the origin distance at 1% of the range (documented in unbin.terms.fp), so the
    # smallest row's x^-2 is bounded relative to its neighbours, and its leverage in the FP1(-2)
    # least-squares fit (hat matrix by numpy QR, an independent computation) is bounded, where
    # the smallest-gap rule gives that row leverage > 0.9 (it alone decides the fit).
    rng = np.random.default_rng(4)
    x = rng.uniform(-1.0, 1.0, 2000)
    x[1] = x.min() + 1e-7  # a near-tie at the minimum, as full-precision data have somewhere
    gap = float(np.diff(np.unique(x)).min())
    assert gap < 1e-6

    def leverage_of_min(shift: float) -> tuple[float, float]:
        term = FPTerm("x", (-2.0,), shift, 1.0)
        B = np.column_stack([np.ones(x.size), term.basis(x)])
        Q, _ = np.linalg.qr(B)
        h = np.sum(Q**2, axis=1)
        col = B[:, 1]
        order = np.argsort(x)
        return float(h[order[0]]), float(col[order[0]] / col[order[2]])

    shift = fp_shift(x)
    assert shift == pytest.approx(-x.min() + 0.01 * (x.max() - x.min()), rel=1e-12)
    h_new, ratio_new = leverage_of_min(shift)
    h_old, ratio_old = leverage_of_min(-x.min() + gap)
    assert h_old > 0.9 and ratio_old > 1e6  # the old rule: one row dominates
    # 3 / (n * P(x within delta of min) + 3) = 3 / (2000 * 0.01 + 3) ~ 0.13 for uniform data
    assert h_new < 0.2
    assert ratio_new < 1.5
    # the term records shift and scale, so the basis rebuilds exactly from its dict
    term = FPTerm.from_data("x", x, (-2.0, 1.0))
    d = term.to_dict()
    again = FPTerm(d["variable"], tuple(d["powers"]), d["shift"], d["scale"])
    np.testing.assert_array_equal(again.basis(x), term.basis(x))
    assert not term.in_domain(np.array([x.min() - 0.05]))[0]
    assert term.in_domain(np.array([x.min()]))[0]


def test_fp_no_shift_for_positive_data_and_refuses_values_below_the_origin() -> None:
    x = np.array([0.3, 1.0, 5.0])
    assert fp_shift(x) == 0.0
    term = FPTerm.from_data("x", x, (-1.0,))
    with pytest.raises(ValueError, match="cannot be transformed"):
        term.basis(np.array([-0.1]))


def test_fp_scaling_by_a_power_of_ten_leaves_the_deviance_unchanged() -> None:
    # Common practice (Royston & Sauerbrei 2008 scale x before transforming): dividing x by a
    # constant only reparametrises every FP model, so each OLS deviance is unchanged.
    rng = np.random.default_rng(5)
    x = rng.uniform(0.3, 300.0, 400)
    y = np.log(x) + rng.normal(0.0, 0.4, x.size)
    outcome = Outcome("continuous", y)
    for powers in FP1_SET + FP2_SET:
        lls = []
        for scale in (1.0, 10.0, 100.0):
            term = FPTerm("x", powers, 0.0, scale)
            res = fit("continuous", term.basis(x), outcome, term.names())
            assert res.ok, res.message
            lls.append(res.loglik)
        np.testing.assert_allclose(lls, lls[0], rtol=1e-9, err_msg=str(powers))
    assert FPTerm.from_data("x", x, (1.0,)).scale == 100.0  # a power of ten near max(x)


def _fp_refit(refit_frame: Callable[..., tuple[Any, Refit]], one_analysis: Callable[..., Any],
              x: np.ndarray, y: np.ndarray) -> Refit:
    raw = one_analysis({"type": "continuous", "value": "y"}, "x", {"quantiles": 3},
                       continuous={"forms": ["fp"], "spline_knots": [3], "fp_alpha": 0.05})
    _, r = refit_frame(pd.DataFrame({"x": x, "y": y}), raw)
    return r


def _reference_fsp(x: np.ndarray, y: np.ndarray, alpha: float = 0.05) -> tuple[float, ...]:
    """The closed-test function selection (Royston & Sauerbrei 2008) written out with
    statsmodels OLS deviances: () null, (1,) linear, else the chosen FP powers."""
    def dev(B: np.ndarray) -> float:
        return float(-2.0 * sm.OLS(y, sm.add_constant(B, has_constant="add")).fit().llf)

    def fp(powers: tuple[float, ...]) -> np.ndarray:
        cols, prev = [], None
        for p in powers:
            cols.append(cols[-1] * np.log(x) if p == prev else (np.log(x) if p == 0 else x**p))
            prev = p
        return np.column_stack(cols)

    d1 = {p: dev(fp(p)) for p in FP1_SET}
    d2 = {p: dev(fp(p)) for p in FP2_SET}
    b1, b2 = min(d1, key=d1.__getitem__), min(d2, key=d2.__getitem__)
    d_null, d_lin = dev(np.zeros((x.size, 0))), dev(x[:, None])
    if stats.chi2.sf(d_null - d2[b2], 4) >= alpha:
        return ()
    if stats.chi2.sf(d_lin - d2[b2], 3) >= alpha:
        return (1.0,)
    return b1 if stats.chi2.sf(d1[b1] - d2[b2], 2) >= alpha else b2


def _chosen_powers(r: Refit) -> tuple[float, ...]:
    chosen = r.get("fp", "legacy")
    assert chosen is not None and chosen.result.ok, chosen
    if not chosen.exposure_terms:
        return ()
    (term,) = chosen.exposure_terms
    return (1.0,) if isinstance(term, LinearTerm) else tuple(term.to_dict()["powers"])


def test_fp_selection_finds_a_log_truth(refit_frame: Any, one_analysis: Any) -> None:
    # Function selection procedure (Royston & Sauerbrei 2008), closed test at 5%,
    # checked against the same procedure written out with statsmodels OLS (reference library).
    # Truth y = log(x) + noise is FP1(0). With n = 5000 over x in [0.5, 20] the FP2-vs-null and
    # FP2-vs-linear tests have power ~1 (log and linear differ by far more than the noise), the
    # FP2-vs-FP1 test rejects only by chance (about 5% of seeds), and among the FP1 models the
    # true power has the best likelihood; so the choice is FP1(0) (or rarely an FP2 near log).
    rng = np.random.default_rng(11)
    x = rng.uniform(0.5, 20.0, 5000)
    y = np.log(x) + rng.normal(0.0, 0.5, x.size)
    r = _fp_refit(refit_frame, one_analysis, x, y)
    powers = _chosen_powers(r)
    assert powers == _reference_fsp(x, y)
    assert powers == (0.0,) or (len(powers) == 2 and 0.0 in powers)
    best_fp1 = next(f for f in r.fits if f.form == "fp1" and f.adjustment == "legacy")
    assert best_fp1.exposure_terms[0].to_dict()["powers"] == [0.0]


def test_fp_selection_keeps_a_linear_truth_linear(refit_frame: Any, one_analysis: Any) -> None:
    # Same procedure and reference; truth y = 0.1 x + noise. FP2 vs null is significant (power
    # ~1 at n = 5000) and FP2 vs linear has size about 5% under this truth, so linear is chosen
    # (seeded; about 95% of seeds).
    rng = np.random.default_rng(7)
    x = rng.uniform(0.5, 20.0, 5000)
    y = 0.1 * x + rng.normal(0.0, 0.5, x.size)
    r = _fp_refit(refit_frame, one_analysis, x, y)
    assert _chosen_powers(r) == (1.0,) == _reference_fsp(x, y)
    chosen = r.get("fp", "legacy")
    assert chosen is not None and chosen.exposure_terms == (LinearTerm("x"),), chosen.detail


# --------------------------------------------------------------------------- legacy groups


def test_closed_left_puts_a_value_on_a_cut_in_the_group_above() -> None:
    # Reference library: pandas.cut with right=False gives [c_j, c_j+1) intervals.
    cuts = (30.0, 45.0, 60.0)
    x = np.array([10.0, 29.999, 30.0, 44.0, 45.0, 59.9, 60.0, 61.0, 120.0])
    term = GroupedTerm("egfr", cuts, "left", ("<30", "30-<45", "45-<60", ">=60"))
    codes = term.codes(x)
    np.testing.assert_array_equal(codes, [0, 0, 1, 1, 2, 2, 3, 3, 3])
    ref = pd.cut(x, [-np.inf, *cuts, np.inf], right=False, labels=False)
    np.testing.assert_array_equal(codes, ref)


def test_closed_right_puts_a_value_on_a_cut_in_the_group_below() -> None:
    # Reference library: pandas.cut with right=True gives (c_j, c_j+1] intervals.
    cuts = (30.0, 45.0, 60.0)
    x = np.array([10.0, 30.0, 30.001, 45.0, 59.9, 60.0, 60.5, 120.0])
    term = GroupedTerm("egfr", cuts, "right", ("<=30", ">30-45", ">45-60", ">60"))
    codes = term.codes(x)
    np.testing.assert_array_equal(codes, [0, 0, 1, 1, 2, 2, 3, 3])
    ref = pd.cut(x, [-np.inf, *cuts, np.inf], right=True, labels=False)
    np.testing.assert_array_equal(codes, ref)


def test_grouped_basis_has_indicators_of_every_group_but_the_reference() -> None:
    term = GroupedTerm("na", (135.0, 145.0), "left", ("low", "normal", "high"), reference=1)
    assert term.names() == ("na[low]", "na[high]") and term.df == 2
    b = term.basis(np.array([130.0, 135.0, 140.0, 145.0, 150.0]))
    np.testing.assert_array_equal(b, [[1, 0], [0, 0], [0, 0], [0, 1], [0, 1]])


@pytest.mark.parametrize("k", [2, 3, 4, 5])
def test_quantile_groupings_have_equal_frequencies(k: int) -> None:
    # Reference library: pandas.qcut (equal-frequency groups at the sample's j/k quantiles).
    x = np.random.default_rng(k).gamma(2.0, 3.0, 1200)
    g = Grouping("x", quantiles=k)
    cuts = resolve_cuts(x, g)
    term = GroupedTerm("x", cuts, "left", tuple(f"Q{j + 1}" for j in range(k)))
    counts = np.bincount(term.codes(x), minlength=k)
    np.testing.assert_array_equal(counts, np.full(k, 1200 // k))
    np.testing.assert_array_equal(term.codes(x), pd.qcut(x, k, labels=False))
