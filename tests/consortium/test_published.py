"""Published grouped tables as input: assigned exposures, the Greenland–Longnecker and
Hamling covariances, the GLS trend, and pooling beside data cohorts."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm

from unbin.consortium.meta_analysis import pool_multivariate
from unbin.published.covariance import (
    Z95,
    gl_fitted_counts,
    hamling_counts,
    log_ratio_and_variance,
    study_covariance,
)
from unbin.published.exposure import assigned_exposures
from unbin.published.gls import fit_trend, trend_basis

# An invented case-control table, reference group first.
CASES = np.array([50.0, 60.0, 70.0, 90.0])
CONTROLS = np.array([400.0, 380.0, 350.0, 300.0])
ADJ_LOG_OR = np.log([1.3, 1.7, 2.4])


# --- assigned exposures (rules: common practice) ---------------------------------------------

def test_assigned_exposures_follow_the_rules_in_order() -> None:
    lower = [None, 10.0, 20.0, 30.0]
    upper = [10.0, 20.0, 30.0, None]
    med = [None, 14.0, None, None]
    vals, rules = assigned_exposures(lower, upper, med)
    # open bottom: 10 - 10/2; reported median; midpoint; open top: 30 + 10/2
    assert vals == [5.0, 14.0, 25.0, 35.0]
    assert rules == ["open group: adjacent width", "reported median", "midpoint",
                     "open group: adjacent width"]
    vals2, rules2 = assigned_exposures(lower, upper, mean=[None, None, 24.0, None],
                                       open_rule="scaled_bound")
    assert vals2 == pytest.approx([10 / 1.2, 15.0, 24.0, 36.0])
    assert rules2[2] == "reported mean" and rules2[0] == "open group: 1.2 x bound"


def test_open_bottom_group_is_floored_at_zero_and_unassignable_groups_are_named() -> None:
    vals, _ = assigned_exposures([None, 2.0], [2.0, 10.0])
    assert vals[0] == 0.0  # 2 - 8/2 < 0, exposure cannot be negative
    with pytest.raises(ValueError, match="group 1 is open-ended"):
        assigned_exposures([0.0, 5.0], [None, None])


# --- Greenland & Longnecker (1992): the defining constraints ---------------------------------

def test_gl_odds_fitted_counts_reproduce_ratios_and_margins() -> None:
    A, B = gl_fitted_counts("odds", ADJ_LOG_OR, CASES, CONTROLS)
    # the method's defining constraints (Greenland & Longnecker 1992), to 1e-8
    assert np.log(A[1:] * B[0] / (A[0] * B[1:])) == pytest.approx(ADJ_LOG_OR, abs=1e-8)
    assert A.sum() == pytest.approx(CASES.sum(), abs=1e-8)
    assert B.sum() == pytest.approx(CONTROLS.sum(), abs=1e-8)
    assert A + B == pytest.approx(CASES + CONTROLS, abs=1e-8)
    assert (A > 0).all() and (B > 0).all()


@pytest.mark.parametrize("kind", ["rate", "risk"])
def test_gl_cohort_fitted_counts_reproduce_ratios_and_margins(kind: str) -> None:
    other = np.array([1e4, 9e3, 8e3, 5e3]) if kind == "rate" else CASES + CONTROLS
    A, Oth = gl_fitted_counts(kind, ADJ_LOG_OR, CASES, other)
    assert np.log((A[1:] / Oth[1:]) / (A[0] / Oth[0])) == pytest.approx(ADJ_LOG_OR, abs=1e-8)
    assert A.sum() == pytest.approx(CASES.sum(), abs=1e-8)
    assert Oth == pytest.approx(other, abs=1e-8)


def test_gl_with_crude_ratios_gives_back_the_table() -> None:
    # When the 'adjusted' ratios are the table's own crude odds ratios, the table itself
    # satisfies every constraint, so the fitted counts are the observed ones and the
    # covariance is Woolf's 1/a_0 + 1/b_0 (brute force from the table).
    crude = np.log(CASES[1:] * CONTROLS[0] / (CASES[0] * CONTROLS[1:]))
    A, B = gl_fitted_counts("odds", crude, CASES, CONTROLS)
    assert A == pytest.approx(CASES, abs=1e-8) and B == pytest.approx(CONTROLS, abs=1e-8)
    v = 1 / CASES[1:] + 1 / CONTROLS[1:] + 1 / CASES[0] + 1 / CONTROLS[0]
    sc = study_covariance("odds", crude, v, CASES, CONTROLS)
    assert sc.method == "greenland_longnecker"
    assert sc.cov[0, 1] == pytest.approx(1 / CASES[0] + 1 / CONTROLS[0], rel=1e-12)
    assert np.diag(sc.cov) == pytest.approx(v, rel=1e-12)


@pytest.mark.parametrize("kind", ["odds", "risk", "rate"])
def test_hamling_effective_counts_recover_a_consistent_table(kind: str) -> None:
    # A table whose crude ratios and variances are exactly known (brute force): given only the
    # ratios, the variances and the groups' sizes, Hamling's effective counts give it back.
    if kind == "rate":
        A = CASES
        T = np.array([1e4, 9e3, 8e3, 5e3])
        lr = np.log((A[1:] / T[1:]) / (A[0] / T[0]))
        v = 1 / A[1:] + 1 / A[0]
        eA, eO, err = hamling_counts(kind, lr, v, T)
        assert eA == pytest.approx(A, rel=1e-6)
        assert eO == pytest.approx(T, rel=1e-6)  # person-time scaled to the reported total
        return
    N = CASES + CONTROLS
    if kind == "odds":
        lr = np.log(CASES[1:] * CONTROLS[0] / (CASES[0] * CONTROLS[1:]))
        v = 1 / CASES[1:] + 1 / CONTROLS[1:] + 1 / CASES[0] + 1 / CONTROLS[0]
        want_other = CONTROLS
    else:
        lr = np.log((CASES[1:] / N[1:]) / (CASES[0] / N[0]))
        v = 1 / CASES[1:] - 1 / N[1:] + 1 / CASES[0] - 1 / N[0]
        want_other = N
    eA, eO, err = hamling_counts(kind, lr, v, N, CASES.sum())
    assert err < 1e-6
    assert eA == pytest.approx(CASES, rel=1e-6)
    assert eO == pytest.approx(want_other, rel=1e-6)


def test_independence_is_the_flagged_last_resort() -> None:
    v = np.array([0.04, 0.05, 0.06])
    sc = study_covariance("odds", ADJ_LOG_OR, v)
    assert sc.method == "independence"
    assert sc.cov == pytest.approx(np.diag(v))


def test_log_ratio_and_variance_from_a_95_interval() -> None:
    se = 0.2
    lr, var = log_ratio_and_variance(np.array([1.5]),
                                     np.array([1.5 * np.exp(-Z95 * se)]),
                                     np.array([1.5 * np.exp(Z95 * se)]))
    assert lr[0] == pytest.approx(np.log(1.5)) and var[0] == pytest.approx(se**2)


# --- GLS trend --------------------------------------------------------------------------------

def test_linear_gls_with_diagonal_covariance_matches_hand_computation() -> None:
    # Hand computation: with C diagonal, b = sum(d y / v) / sum(d^2 / v), var = 1 / sum(d^2 / v),
    # d the exposure distance from the reference.
    x = np.array([2.0, 5.0, 9.0, 14.0])
    y = np.array([0.1, 0.35, 0.5])
    v = np.array([0.02, 0.03, 0.05])
    fit = fit_trend("linear", x, y, np.diag(v))
    d = x[1:] - x[0]
    assert fit.coef[0] == pytest.approx(np.sum(d * y / v) / np.sum(d**2 / v), rel=1e-12)
    assert fit.cov[0, 0] == pytest.approx(1 / np.sum(d**2 / v), rel=1e-12)
    resid = y - d * fit.coef[0]
    assert fit.q == pytest.approx(np.sum(resid**2 / v), rel=1e-10)
    assert fit.q_df == 2


@pytest.mark.parametrize("form", ["linear", "spline"])
def test_gls_matches_statsmodels_on_the_same_matrices(form: str) -> None:
    x = np.array([1.0, 3.0, 4.5, 6.0, 8.0, 11.0])
    knots = (2.0, 5.0, 9.0)
    rng = np.random.default_rng(11)
    y = 0.08 * (x[1:] - x[0]) + rng.normal(0, 0.05, 5)
    C = np.full((5, 5), 0.01) + np.diag([0.02, 0.03, 0.025, 0.04, 0.05])
    fit = fit_trend(form, x, y, C, knots)
    B = trend_basis(form, knots, x)
    X = B[1:] - B[0]
    ref = sm.GLS(y, X, sigma=C).fit()  # statsmodels' GLS on the same matrices
    assert fit.coef == pytest.approx(ref.params, rel=1e-9, abs=1e-12)
    # statsmodels scales by the residual variance; the known-covariance GLS does not
    assert fit.cov == pytest.approx(ref.normalized_cov_params, rel=1e-9, abs=1e-14)
    if form == "spline":
        # Wald test of the nonlinear coefficient against statsmodels' own Wald test on the
        # same known covariance
        w = ref.wald_test(np.array([[0.0, 1.0]]), cov_p=ref.normalized_cov_params,
                          scalar=True, use_f=False)
        assert fit.nonlinear_chi2 == pytest.approx(float(w.statistic), rel=1e-9)
        assert fit.nonlinear_p == pytest.approx(float(w.pvalue), rel=1e-9)


def test_too_few_groups_for_the_spline_is_a_clear_error() -> None:
    with pytest.raises(ValueError, match="cannot identify"):
        fit_trend("spline", np.array([1.0, 5.0]), np.array([0.2]), np.eye(1) * 0.01,
                  (1.0, 4.0, 8.0, 12.0))


# --- against individual data (seeded simulations) ---------------------------------------------

def _grouped_logit(seed: int, n: int, confounding: float):
    """Individual data grouped at 3, 5, 7; the logistic fit with group indicators (statsmodels)
    adjusted for z when ``confounding`` > 0: its log odds ratios, their model covariance, and
    the cases and non-cases per group."""
    rng = np.random.default_rng(seed)
    z = rng.normal(size=n)
    x = np.clip(5 + 0.5 * z + rng.normal(0, 2.4, n), 0, None)
    y = rng.random(n) < 1 / (1 + np.exp(-(-3 + 0.12 * x + confounding * z)))
    g = np.digitize(x, [3.0, 5.0, 7.0])
    cols = [np.ones(n)] + [(g == j).astype(float) for j in (1, 2, 3)]
    if confounding > 0:
        cols.append(z)
    fit = sm.Logit(y.astype(float), np.column_stack(cols)).fit(disp=0)
    a = np.bincount(g, weights=y, minlength=4)
    b = np.bincount(g, weights=~y, minlength=4)
    return fit.params[1:4], fit.cov_params()[1:4, 1:4], a, b


def test_gl_covariance_against_the_individual_data_fit() -> None:
    # Crude fit: the model covariance of the indicator log odds ratios is exactly Woolf's
    # 1/a_0 + 1/b_0 off the diagonal (statsmodels Logit on the rows), which GL must give.
    lr, V, a, b = _grouped_logit(2026, 20000, 0.0)
    sc = study_covariance("odds", lr, np.diag(V), a, b)
    assert sc.cov == pytest.approx(V, rel=1e-6)
    # Adjusted for a covariate weakly related to the exposure: GL is an approximation; on this
    # seeded design its off-diagonals are within 15% of the model's (they were 12% low; known
    # direction: adjustment adds covariance GL's crude cells do not see), and the GLS slope's SE
    # built on it is within 8% of the one built on the model covariance (measured: 5%).
    lr, V, a, b = _grouped_logit(2026, 20000, 0.4)
    sc = study_covariance("odds", lr, np.diag(V), a, b)
    off = ~np.eye(3, dtype=bool)
    assert np.abs(sc.cov[off] / V[off] - 1).max() < 0.15
    x = np.array([2.0, 4.0, 6.0, 9.0])
    se_gl = np.sqrt(fit_trend("linear", x, lr, sc.cov).cov[0, 0])
    se_model = np.sqrt(fit_trend("linear", x, lr, V).cov[0, 0])
    assert se_gl == pytest.approx(se_model, rel=0.08)


SLOPE = 0.08
SIM_CUTS = np.array([2.0, 4.0, 6.0, 8.0])
SIM_MIDS = np.array([1.0, 3.0, 5.0, 7.0, 9.0])
SIM_KNOTS = (1.0, 5.0, 9.0)


def _published_cohort(rng: np.random.Generator, n: int = 2000, p0: float = 0.05):
    """Individual data with a known log-linear risk, x ~ U(0, 10), published as crude risk
    ratios of five equal-width groups. For equal-width uniform groups the true log risk ratio
    of group j against group 0 is exactly SLOPE x (midpoint_j - midpoint_0), so the
    assigned-exposure (midpoint) trend has a known truth."""
    x = rng.uniform(0, 10, n)
    g = np.digitize(x, SIM_CUTS)
    y = rng.random(n) < p0 * np.exp(SLOPE * x)
    a = np.bincount(g, weights=y, minlength=5)
    N = np.bincount(g, minlength=5).astype(float)
    lr = np.log((a[1:] / N[1:]) / (a[0] / N[0]))
    v = 1 / a[1:] - 1 / N[1:] + 1 / a[0] - 1 / N[0]
    return lr, v, a, N


def test_pooled_published_curve_covers_the_truth_and_nonlinearity_test_holds_its_size() -> None:
    # 300 replications of five published-only studies pooled by the multivariate method of
    # moments. Monte-Carlo band: 0.95 +/- 3 x sqrt(0.95 x 0.05 / 300) = [0.912, 0.988] for
    # coverage; per-study nonlinearity size over 1500 tests 0.05 +/- 3 x 0.0056 = [0.033,
    # 0.067]; pooled nonlinearity size over 300: [0.012, 0.088].
    rng = np.random.default_rng(7)
    reps = 300
    cover_lin = cover_spl = rej_study = rej_pool = 0
    d = trend_basis("spline", SIM_KNOTS, np.array([9.0]))[0] \
        - trend_basis("spline", SIM_KNOTS, np.array([1.0]))[0]
    for _ in range(reps):
        Y, S, Ys, Ss = [], [], [], []
        for _k in range(5):
            lr, v, a, N = _published_cohort(rng)
            sc = study_covariance("risk", lr, v, a, N)
            assert sc.method == "greenland_longnecker"
            f = fit_trend("linear", SIM_MIDS, lr, sc.cov)
            fs = fit_trend("spline", SIM_MIDS, lr, sc.cov, SIM_KNOTS)
            Y.append(f.coef)
            S.append(f.cov)
            Ys.append(fs.coef)
            Ss.append(fs.cov)
            rej_study += fs.nonlinear_p < 0.05
        lin = pool_multivariate(np.array(Y), np.array(S))
        cover_lin += abs(lin.re_mean[0] - SLOPE) < Z95 * np.sqrt(lin.re_cov[0, 0])
        spl = pool_multivariate(np.array(Ys), np.array(Ss))
        est, se = d @ spl.re_mean, np.sqrt(d @ spl.re_cov @ d)
        cover_spl += abs(est - 8 * SLOPE) < Z95 * se
        bn = spl.re_mean[1:]
        rej_pool += bn @ np.linalg.solve(spl.re_cov[1:, 1:], bn) > 3.841459
    assert 0.912 <= cover_lin / reps <= 0.988
    assert 0.912 <= cover_spl / reps <= 0.988
    assert 0.033 <= rej_study / (5 * reps) <= 0.067
    assert 0.012 <= rej_pool / reps <= 0.088


# --- the spec section ---------------------------------------------------------------------------

def _spec_with(published: dict) -> dict:
    from unbin.demo import demo_spec

    raw = demo_spec()
    raw["published"] = published
    return raw


def _study(**over: object) -> dict:
    s = {"name": "tideford", "analysis": "visits_bmi", "scale": "RR",
         "design": "cohort_person_time", "groups": [
             {"upper": 25, "cases": 100, "person_time": 90.0, "ratio": 1},
             {"lower": 25, "upper": 30, "median": 27, "cases": 140, "person_time": 100.0,
              "ratio": 1.3, "ratio_lower": 1.0, "ratio_upper": 1.69},
             {"lower": 30, "cases": 90, "person_time": 50.0, "ratio": 1.6, "ratio_lower": 1.2,
              "ratio_upper": 2.13}]}
    s.update(over)
    return s


def _problems(published: dict) -> str:
    from pathlib import Path

    from unbin.errors import SpecError
    from unbin.spec import parse_spec

    with pytest.raises(SpecError) as err:
        parse_spec(_spec_with(published), Path("."))
    return str(err.value)


def test_a_valid_published_section_parses_with_its_rules() -> None:
    from pathlib import Path

    from unbin.published.spec import published_studies
    from unbin.published.tables import prepare
    from unbin.spec import parse_spec

    spec = parse_spec(_spec_with({"studies": [_study()]}), Path("."))
    (s,) = published_studies(spec.raw)
    assert s.kind == "rate" and s.scale_label == "rate ratio" and s.reference == 0
    p = prepare(s)
    assert p.rules == ("open group: adjacent width", "reported median",
                       "open group: adjacent width")
    assert p.assigned == (22.5, 27.0, 32.5)  # 25 - 5/2; median; 30 + 5/2
    assert p.covariance.method == "greenland_longnecker"


def test_published_spec_errors_name_the_field_and_the_fix() -> None:
    bad = _study()
    bad["groups"][1]["ratio"] = 2.5  # outside [1.0, 1.69]
    bad["groups"][0]["ratio"] = 0.9  # the reference is not 1
    msg = _problems({"studies": [bad]})
    assert "published.studies[tideford].groups[2]: the interval [1.0, 1.69] does not " \
           "contain the ratio 2.5" in msg
    assert "published.studies[tideford].groups[1].ratio: the reference group's ratio is 0.9" in msg
    msg = _problems({"studies": [_study(total_cases=400)]})
    assert "total_cases: 400 but the groups' cases add up to 330" in msg
    msg = _problems({"studies": [_study(analysis="visits_bmx", design="cohort_persontime")]})
    assert "'visits_bmx' is not an analysis of this spec" in msg
    assert "is not one of ['case_control', 'cohort_person_time', 'cohort_participants']" in msg
    gaps = _study()
    del gaps["groups"][1]["cases"]
    assert "'cases' is given for some groups only" in _problems({"studies": [gaps]})


def test_a_study_that_cannot_be_fitted_is_recorded_and_the_rest_completes() -> None:
    import pandas as pd

    from unbin.published.spec import published_studies
    from unbin.published.tables import published_tables

    two = _study(name="two_groups", groups=_study()["groups"][:2])
    raw = _spec_with({"studies": [_study(), _study(name="second"), two]})
    got = published_tables(published_studies(raw), pd.DataFrame(), pd.DataFrame(),
                           {"visits_bmi": None}, {"visits_bmi": 3})
    fits = got["published_fits"]
    row = fits[(fits["study"] == "two_groups") & (fits["form"] == "spline")].iloc[0]
    assert row["status"] == "failed" and "cannot identify" in row["message"]
    ok = fits[(fits["study"] == "two_groups") & (fits["form"] == "linear")].iloc[0]
    assert ok["status"] == "ok"
    pooled = fits[fits["study"] == "pooled: all contributors"].iloc[0]
    assert pooled["status"] == "ok" and pooled["k"] == 2
    assert set(got["published_curves"]["curve"]) >= {"tideford", "second",
                                                     "pooled: all contributors"}


# --- the grouped table a data cohort's legacy paper would have published ------------------------

def test_as_published_table_against_statsmodels_and_the_rows() -> None:
    from pathlib import Path

    import pandas as pd

    from unbin.data import analysis_sample
    from unbin.questions.as_published import as_published_table
    from unbin.refit.analysis import refit_analysis
    from unbin.spec import parse_spec

    rng = np.random.default_rng(404)
    n = 4000
    z = rng.normal(size=n)
    x = np.round(rng.normal(27 + 1.5 * z, 4), 1)
    py = rng.uniform(0.5, 3.0, n)
    y = rng.poisson(py * np.exp(-0.5 + 0.04 * x + 0.2 * z))
    df = pd.DataFrame({"x": x, "z": z, "py": py, "y": y})
    raw = {"study": "s", "cohorts": [{"name": "c", "path": "unused.csv"}],
           "groupings": {"x": {"cuts": [24.0, 28.0, 32.0]}},
           "analyses": [{"name": "a", "outcome": {"type": "count", "count": "y",
                                                  "persontime": "py"},
                         "exposure": "x", "adjust": ["z"],
                         "continuous": {"forms": ["linear"], "spline_knots": [3]}}]}
    spec = parse_spec(raw, base=Path("."))
    a = spec.analysis("a")
    t = as_published_table(refit_analysis(analysis_sample(df, a, spec), a, spec, "c"), spec)
    groups = t[t["row_type"] == "group"]
    g = np.searchsorted([24.0, 28.0, 32.0], x, side="right")  # cuts closed on the left
    assert groups["cases"].astype(float).tolist() == np.bincount(g, weights=y).tolist()
    assert groups["other_count"].to_numpy(float) == pytest.approx(np.bincount(g, weights=py))
    # statsmodels' Poisson GLM with the group indicators, z and the log person-time offset
    X = np.column_stack([np.ones(n)] + [(g == j).astype(float) for j in (1, 2, 3)] + [z])
    ref = sm.GLM(y, X, family=sm.families.Poisson(), offset=np.log(py)).fit()
    assert np.log(groups["ratio"].to_numpy(float)[1:]) == pytest.approx(ref.params[1:4],
                                                                       rel=1e-6)
    lo = np.exp(ref.params[1:4] - Z95 * ref.bse[1:4])
    assert groups["ratio_lower"].to_numpy(float)[1:] == pytest.approx(lo, rel=1e-5)
    route = t[t["row_type"] == "route"].iloc[0]
    assert route["status"] == "ok" and route["covariance_method"] == "greenland_longnecker"
    # The table route estimates the same log-linear slope (truth 0.04) with less information:
    # agreement within two table SEs, and an information ratio below 1.
    assert abs(route["table_estimate"] - route["individual_estimate"]) < 2 * route["table_se"]
    assert 0.3 < route["information_ratio"] < 1.0


def test_hamling_for_a_case_control_table_with_controls_only_and_odds_of_participants() -> None:
    # Case-control table: only the controls per group and the total cases are reported; the
    # effective counts match the controls' shares and the case:control ratio (brute force
    # from the table whose crude odds ratios and Woolf variances are the inputs).
    lr = np.log(CASES[1:] * CONTROLS[0] / (CASES[0] * CONTROLS[1:]))
    v = 1 / CASES[1:] + 1 / CONTROLS[1:] + 1 / CASES[0] + 1 / CONTROLS[0]
    sc = study_covariance("odds", lr, v, group_sizes=CONTROLS, total_cases=CASES.sum(),
                          sizes_of="other")
    assert sc.method == "hamling"
    assert sc.cases == pytest.approx(CASES, rel=1e-6)
    assert sc.cov[0, 1] == pytest.approx(1 / CASES[0] + 1 / CONTROLS[0], rel=1e-6)


def test_pooling_identical_contributors_gives_their_curve_back() -> None:
    # Hand computation: identical coefficient vectors give Q = 0, no between-study variance,
    # so the pooled curve is the common one with covariance (sum S_i^-1)^-1.
    import pandas as pd

    from unbin.published.spec import published_studies
    from unbin.published.tables import prepare, published_tables

    raw = _spec_with({"studies": [_study(), _study(name="copy")]})
    studies = published_studies(raw)
    got = published_tables(studies, pd.DataFrame(), pd.DataFrame(), {"visits_bmi": None},
                           {"visits_bmi": 3})
    cur = got["published_curves"]
    one = cur[(cur["curve"] == "tideford") & (cur["form"] == "spline")].sort_values("x")
    pooled = cur[cur["curve"] == "pooled: all contributors"].sort_values("x")
    assert pooled["estimate"].to_numpy() == pytest.approx(one["estimate"].to_numpy(), abs=1e-10)
    # two identical studies: half the covariance, so SE / sqrt(2)
    assert pooled["se"].to_numpy() == pytest.approx(one["se"].to_numpy() / np.sqrt(2), rel=1e-8)
    fits = got["published_fits"]
    row = fits[fits["study"] == "pooled: all contributors"].iloc[0]
    assert row["gof_q"] == pytest.approx(0.0, abs=1e-10) and row["evidence"] == "pooled"
    assert prepare(studies[0]).covariance.method == "greenland_longnecker"


@pytest.mark.workflow
def test_demo_pooled_curve_with_published_studies_covers_the_truth(demo_out: Path) -> None:
    # The demo's visits_bmi curve pooled over its three cohorts and two published-only tables
    # against the simulated truth, log rate ratio 0.04 per kg/m² (unbin.demo): the 95% band
    # holds the truth along the grid (measured: every grid point on the seeded demo).
    import pandas as pd

    from unbin.demo import TRUE_VISITS_PER_BMI

    cur = pd.read_parquet(demo_out / "tables" / "published_curves.parquet")
    for adj in ("legacy", "continuous"):
        c = cur[(cur["analysis"] == "visits_bmi") & (cur["adjustment"] == adj)
                & (cur["curve"] == "pooled: all contributors")]
        truth = TRUE_VISITS_PER_BMI * (c["x"] - c["x_reference"])
        inside = (c["lower"] <= truth) & (truth <= c["upper"])
        assert inside.mean() >= 0.95
    fits = pd.read_parquet(demo_out / "tables" / "published_fits.parquet")
    pooled = fits[fits["study"] == "pooled: all contributors"]
    assert set(pooled["k"]) == {5}
    assert set(fits["evidence"]) == {"published table", "individual data", "pooled"}


@pytest.mark.parametrize("reference", [0, 2])
def test_rate_table_slope_equals_weighted_least_squares_on_log_rates(reference: int) -> None:
    # Brute force: with crude rate ratios, log rate_j has variance 1/a_j and the groups are
    # independent, so the GLS slope of the correlated log ratios against any reference group is
    # the weighted least-squares slope of log(a_j / T_j) on x_j with an intercept, weights a_j.
    from unbin.published.spec import PublishedGroup, PublishedStudy
    from unbin.published.tables import prepare

    a = np.array([40.0, 75.0, 120.0, 95.0, 60.0])
    T = np.array([900.0, 1200.0, 1500.0, 900.0, 450.0])
    x = np.array([1.0, 3.0, 5.5, 8.0, 11.0])
    rate = a / T
    se = np.sqrt(1 / a + 1 / a[reference])
    groups = []
    for j in range(5):
        r = rate[j] / rate[reference]
        groups.append(PublishedGroup(None, None, float(x[j]), None, float(a[j]), float(T[j]),
                                     1.0 if j == reference else float(r),
                                     None if j == reference else float(r * np.exp(-Z95 * se[j])),
                                     None if j == reference else float(r * np.exp(Z95 * se[j]))))
    study = PublishedStudy("s", "an", "", "RR", "cohort_person_time", tuple(groups), reference,
                           None, "adjacent_width")
    p = prepare(study)
    fit = fit_trend("linear", p.exposures, p.log_ratios, p.covariance.cov)
    W = np.diag(a)
    X = np.column_stack([np.ones(5), x])
    cov = np.linalg.inv(X.T @ W @ X)
    beta = cov @ X.T @ W @ np.log(rate)
    assert fit.coef[0] == pytest.approx(beta[1], rel=1e-9)
    assert fit.cov[0, 0] == pytest.approx(cov[1, 1], rel=1e-9)
