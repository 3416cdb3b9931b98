"""Edges of the one-effect and pointwise pooling (unbin.consortium.univariate) that the worked
examples of test_pooling.py do not reach: two and three cohorts, a single cohort and equal
estimates under every tau² method, the tau² roots to full precision, empty grid points, the
interval options, and the messages that name the bad input."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import optimize, stats
from statsmodels.stats.meta_analysis import CombineResults, combine_effects

from unbin.consortium.meta_analysis import PoolingInputError, pool_pointwise, pool_univariate

# Kacker 2004 (Metrologia) worked example, as in test_pooling.py.
KACKER_Y = np.array([61.00, 61.40, 62.21, 62.30, 62.34, 62.60, 62.70, 62.84, 65.90])
KACKER_V = np.array([0.2025, 1.21, 0.09, 0.2025, 0.3844, 0.5625, 0.0676, 0.0225, 1.8225])


def _reference(y: np.ndarray, v: np.ndarray, method: str) -> CombineResults:
    """statsmodels combine_effects; it warns when its untruncated DL tau² is negative (see
    test_pooling.py), silenced here only."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", "invalid value encountered in sqrt", RuntimeWarning)
        return combine_effects(y, v, method_re=method, use_t=True)


def _frame(ref: CombineResults, alpha: float) -> object:
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", "invalid value encountered in sqrt", RuntimeWarning)
        return ref.summary_frame(alpha=alpha, use_t=False)


# --------------------------------------------------------------------------- intervals


def test_normal_intervals_at_the_default_level_and_for_the_fixed_effect() -> None:
    # Reference library: statsmodels combine_effects(method_re="dl"), summary_frame with
    # normal limits; 95% is the default level, and random=False gives the fixed-effect limits.
    res = pool_univariate(KACKER_Y, KACKER_V)
    ref = _reference(KACKER_Y, KACKER_V, "dl")
    for alpha, level in ((0.05, None), (0.10, 0.90)):
        frame = _frame(ref, alpha)
        args = () if level is None else (level,)
        np.testing.assert_allclose(res.ci(*args), frame.loc["random effect", ["ci_low", "ci_upp"]],
                                   rtol=1e-9)
        np.testing.assert_allclose(res.ci(*args, random=False),
                                   frame.loc["fixed effect", ["ci_low", "ci_upp"]], rtol=1e-9)
    with pytest.raises(PoolingInputError, match="strictly between 0 and 1"):
        res.ci(1.5)


def test_two_cohorts_hksj_and_paule_mandel_in_closed_form() -> None:
    # With k = 2, Q(tau²) = (y1 - y2)² / (v1 + v2 + 2 tau²) (algebra written out), so the
    # Paule-Mandel equation Q = k - 1 (Paule & Mandel 1982) and DerSimonian & Laird 1986 both
    # give tau² = ((y1 - y2)² - v1 - v2) / 2. The HKSJ interval on t_1 against statsmodels
    # (conf_int(use_t=True)[3], IntHout et al. 2014; its Paule-Mandel iteration stops at a
    # looser tolerance, hence rtol 1e-6 there), one-effect and pointwise.
    y, v = np.array([0.10, 1.12]), np.array([0.04, 0.05])
    tau2 = ((y[0] - y[1]) ** 2 - v.sum()) / 2.0
    for method in ("dl", "pm"):
        one = pool_univariate(y, v, tau2_method=method)
        assert one.tau2 == pytest.approx(tau2, rel=1e-12)
        ref = _reference(y, v, method)
        np.testing.assert_allclose(one.ci_hksj(), ref.conf_int(alpha=0.05, use_t=True)[3],
                                   rtol=1e-9 if method == "dl" else 1e-6)
        pw = pool_pointwise(y[:, None], v[:, None], tau2_method=method)
        np.testing.assert_allclose((pw.hksj_lower[0], pw.hksj_upper[0]), one.ci_hksj(),
                                   rtol=1e-12)
        assert np.isnan(pw.pi_lower[0]) and np.isnan(one.prediction_interval()).all()


def test_three_cohorts_have_a_prediction_interval_on_one_degree_of_freedom() -> None:
    # Higgins, Thompson & Spiegelhalter 2009: mu +- t_{k-2} sqrt(tau² + SE²), defined from
    # k = 3 (t on 1 df), written out with scipy's t quantile; pointwise equal to one-effect.
    y, v = np.array([0.10, 0.60, 1.12]), np.array([0.04, 0.05, 0.03])
    res = pool_univariate(y, v)
    ref = _reference(y, v, "dl")
    half = stats.t.ppf(0.975, 1) * np.sqrt(ref.tau2 + ref.sd_eff_w_re**2)
    expected = (ref.mean_effect_re - half, ref.mean_effect_re + half)
    np.testing.assert_allclose(res.prediction_interval(), expected, rtol=1e-9)
    pw = pool_pointwise(y[:, None], v[:, None])
    np.testing.assert_allclose((pw.pi_lower[0], pw.pi_upper[0]), expected, rtol=1e-9)


# --------------------------------------------------------------------------- tau² methods


@pytest.mark.parametrize("method", ["dl", "pm", "reml"])
def test_a_single_cohort_has_no_heterogeneity_under_every_method(method: str) -> None:
    # Common practice (module convention): one cohort gives its own estimate, tau² = 0,
    # Q = 0 on 0 df, I² undefined; the random-effects SE is the cohort's own (sqrt 0.09).
    res = pool_univariate([1.7], [0.09], tau2_method=method)
    assert res.tau2 == 0.0 and res.q == 0.0 and res.q_df == 0
    assert res.re_se == pytest.approx(0.3, rel=1e-15)
    assert res.re_mean == pytest.approx(1.7, rel=1e-15)
    assert np.isnan(res.i2) and np.isnan(res.q_pvalue)
    assert res.tau2_method == method


@pytest.mark.parametrize("method", ["dl", "pm", "reml"])
def test_equal_estimates_give_q_zero_and_no_heterogeneity(method: str) -> None:
    # Exact arithmetic (values chosen so the weighted mean is exactly 0.5): Q = 0, I² = 0
    # (Higgins & Thompson 2002 truncate at 0), tau² = 0, the Q p-value chi2.sf(0) = 1 (scipy).
    res = pool_univariate([0.5, 0.5, 0.5], [0.25, 0.5, 1.0], tau2_method=method)
    assert res.q == 0.0 and res.i2 == 0.0 and res.tau2 == 0.0
    assert res.q_pvalue == stats.chi2.sf(0.0, 2) == 1.0
    assert res.re_mean == 0.5 and res.re_se == pytest.approx(np.sqrt(1 / 7), rel=1e-14)


def test_paule_mandel_is_zero_when_q_is_below_its_degrees_of_freedom() -> None:
    # Paule & Mandel 1982 (DerSimonian & Kacker 2007): Q(0) <= k - 1 gives tau² = 0;
    # statsmodels combine_effects(method_re="pm") gives 0 on the same data.
    y = np.array([0.10, 0.12, 0.09, 0.11, 0.10])
    v = np.array([0.04, 0.05, 0.03, 0.06, 0.04])
    res = pool_univariate(y, v, tau2_method="pm")
    assert _reference(y, v, "pm").tau2 == 0.0
    assert res.tau2 == 0.0 and res.re_mean == pytest.approx(res.fe_mean, rel=1e-15)


def _scaled(seed: int, ratio: float) -> tuple[np.ndarray, np.ndarray]:
    """Six estimates whose fixed-effect Q is ``ratio`` times its 5 df (the deviations from
    the fixed-effect mean scaled; the weights and that mean do not change)."""
    rng = np.random.default_rng(seed)
    v = rng.uniform(0.01, 0.2, 6)
    y = 0.3 + rng.normal(0.0, np.sqrt(v))
    w = 1.0 / v
    fe = np.sum(w * y) / np.sum(w)
    q = np.sum(w * (y - fe) ** 2)
    return fe + (y - fe) * np.sqrt(5.0 * ratio / q), v


@pytest.mark.parametrize(("seed", "ratio"), [(0, 1.0005), (1, 1.02), (2, 1.3), (3, 4.0)])
def test_paule_mandel_and_reml_roots_to_full_precision(seed: int, ratio: float) -> None:
    # Brute force with scipy's brentq (tolerance at rounding level), from tau² near 0 to large:
    # Paule-Mandel solves Q(tau²) = k - 1 (Paule & Mandel 1982); REML solves the restricted
    # likelihood's score equation sum w² (y - mu)² - sum w + sum w² / sum w = 0
    # (Viechtbauer 2005, J Educ Behav Stat 30:261, written out here), else tau² = 0.
    y, v = _scaled(seed, ratio)

    def q_minus_df(t2: float) -> float:
        w = 1.0 / (v + t2)
        mu = np.sum(w * y) / np.sum(w)
        return float(np.sum(w * (y - mu) ** 2) - 5.0)

    def reml_score(t2: float) -> float:
        w = 1.0 / (v + t2)
        mu = np.sum(w * y) / np.sum(w)
        return float(np.sum(w**2 * (y - mu) ** 2) - np.sum(w) + np.sum(w**2) / np.sum(w))

    pm = optimize.brentq(q_minus_df, 0.0, 100.0, xtol=1e-300, rtol=4 * np.finfo(float).eps)
    assert pool_univariate(y, v, tau2_method="pm").tau2 == pytest.approx(pm, rel=1e-11)
    reml = pool_univariate(y, v, tau2_method="reml").tau2
    if reml_score(0.0) <= 0:
        assert reml == 0.0
    else:
        root = optimize.brentq(reml_score, 0.0, 100.0, xtol=1e-300,
                               rtol=4 * np.finfo(float).eps)
        assert reml == pytest.approx(root, rel=1e-9)


def test_an_unknown_tau2_method_is_named() -> None:
    with pytest.raises(PoolingInputError, match=r"^tau2 method 'ml' is not one of \('dl', 'pm', "
                                                r"'reml'\)$"):
        pool_univariate([0.1, 0.2], [0.1, 0.1], tau2_method="ml")


# --------------------------------------------------------------------------- pointwise


@pytest.mark.parametrize("method", ["dl", "pm", "reml"])
def test_a_grid_point_without_cohorts_is_nan_under_every_method(method: str) -> None:
    # Independent route: the one-effect function on each column that has cohorts; the empty
    # point is NaN with k = 0 (and raises no floating-point warning: pytest runs strict).
    # The requested level reaches the normal limits (scipy's normal quantile written out).
    rng = np.random.default_rng(8)
    Y = rng.normal(0.0, 0.6, (4, 5))
    V = rng.uniform(0.01, 0.1, (4, 5))
    Y[:, 2] = np.nan
    pw = pool_pointwise(Y, V, level=0.9, tau2_method=method)
    assert pw.level == 0.9 and pw.k[2] == 0
    for name in ("fe_mean", "re_mean", "tau2", "re_lower", "hksj_upper", "pi_lower"):
        assert np.isnan(getattr(pw, name)[2]), name
    z = stats.norm.ppf(0.95)
    for j in (0, 1, 3, 4):
        one = pool_univariate(Y[:, j], V[:, j], tau2_method=method)
        assert pw.tau2[j] == pytest.approx(one.tau2, rel=1e-9, abs=1e-15)
        assert pw.re_mean[j] == pytest.approx(one.re_mean, rel=1e-12)
        assert pw.re_lower[j] == pytest.approx(one.re_mean - z * one.re_se, rel=1e-12)
        assert pw.fe_upper[j] == pytest.approx(one.fe_mean + z * one.fe_se, rel=1e-12)


# --------------------------------------------------------------------------- messages


def test_messages_name_the_argument_and_the_problem() -> None:
    # The project's rule for bad input: the message names the argument (y, v for one effect;
    # Y, V for a grid), the cohort and grid point, and the fix.
    cases = [
        (lambda: pool_univariate(["a", 0.2], [0.1, 0.1]), r"^estimates y must be numeric"),
        (lambda: pool_univariate([0.1, 0.2], ["b", 0.1]), r"^variances v must be numeric"),
        (lambda: pool_univariate([[0.1]], [0.1]), r"^estimates y must be a 1-dimensional"),
        (lambda: pool_univariate([0.1], [[0.1]]), r"^variances v must be a 1-dimensional"),
        (lambda: pool_pointwise([0.1, 0.2], [[0.1, 0.1]]), r"^estimates Y must be a "
                                                            r"2-dimensional"),
        (lambda: pool_pointwise([[0.1, 0.2]], [0.1, 0.1]), r"^variances V must be a "
                                                            r"2-dimensional"),
        (lambda: pool_univariate([0.1, 0.2], [0.1]),
         r"^estimates y \(2 values\) and variances v \(1 values\) must have the same length$"),
        (lambda: pool_pointwise(np.zeros((2, 3)), np.ones((2, 2))),
         r"^estimates Y \(2, 3\) and variances V \(2, 2\) must have the same shape "
         r"\(cohorts x grid points\)$"),
        (lambda: pool_univariate([], []), r"^nothing to pool: y and v are empty$"),
        (lambda: pool_univariate([0.1, np.nan], [0.1, 0.1]),
         r"^estimate y of cohort 1 is nan; it must be finite$"),
        (lambda: pool_univariate([0.1, 0.2], [0.1, 0.0]),
         r"^variance v of cohort 1 is 0\.0 \(not positive\); variances must be positive"),
        (lambda: pool_pointwise([[0.1, 0.2], [0.3, 0.4]], [[0.1, 0.1], [0.1, -1.0]]),
         r"^variance V of cohort 1 at grid point 1 is -1\.0 \(not positive\).*"
         r"\(1 such cell\(s\) in all\)$"),
        (lambda: pool_pointwise([[0.1, 0.2, 0.3], [0.3, 0.4, np.inf]], np.ones((2, 3))),
         r"^estimate Y of cohort 1 at grid point 2 is infinite; use NaN for a missing value$"),
    ]
    for call, pattern in cases:
        with pytest.raises(PoolingInputError, match=pattern):
            call()
