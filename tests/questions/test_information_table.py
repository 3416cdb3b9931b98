"""The information table (unbin.questions.information) column by column against statsmodels
refits of designs written out here (tests/reference/tablerefs.py): the tests on the fixed-knot
test spline, the C-indices, the AIC of each form, the robust Wald statistics under sampling
weights and the quasi-Poisson scaling. test_information.py checks the share kept against its
published large-sample values."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from reference.tablerefs import auc_pairs, fp_columns, group_index, rcs_columns
from unbin.questions.information import information_table

# Harrell (Regression Modeling Strategies, 2nd ed. 2015, sec. 2.4.6): default knot quantiles.
QUANTILES = {3: [0.10, 0.50, 0.90], 4: [0.05, 0.35, 0.65, 0.95]}


def _binary_frame(seed: int, n: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.normal(50.0, 10.0, n)
    y = (rng.random(n) < 1 / (1 + np.exp(-(-1.0 + 0.002 * (x - 50.0) ** 2)))).astype(float)
    return pd.DataFrame({"x": x, "y": y, "w": rng.uniform(0.5, 2.0, n)})


def _logit(y: np.ndarray, X: np.ndarray, w: np.ndarray | None = None) -> Any:
    Xc = sm.add_constant(X, has_constant="add") if X.size else np.ones((len(y), 1))
    if w is None:
        return sm.GLM(y, Xc, family=sm.families.Binomial()).fit(tol=1e-12)
    return sm.GLM(y, Xc, family=sm.families.Binomial(), var_weights=w).fit(cov_type="HC0",
                                                                            tol=1e-12)


def test_plain_row_against_statsmodels(refit_frame: Any, one_analysis: Any) -> None:
    # Reference library: statsmodels GLM Binomial on the designs rebuilt here (groups by
    # counting cuts, Harrell's spline at his default quantiles, the recorded FP powers);
    # LR = 2 (llf - llf_null), p-values with scipy's chi-square, C = AUC by counting pairs
    # (Hanley & McNeil 1982), AIC = statsmodels' aic.
    df = _binary_frame(5, 600)
    raw = one_analysis({"type": "binary", "event": "y"}, "x", {"cuts": [45.0, 55.0]},
                       continuous={"forms": ["linear", "spline", "fp"], "spline_knots": [3]})
    spec, r = refit_frame(df, raw)
    row = information_table(r, spec).set_index("adjustment").loc["legacy"]
    x, y = df["x"].to_numpy(), df["y"].to_numpy()
    test_knots = list(np.quantile(x, QUANTILES[4]))
    fits = {
        "null": _logit(y, np.zeros((len(y), 0))),
        "legacy": _logit(y, np.eye(3)[group_index(x, [45.0, 55.0], "right")][:, 1:]),
        "linear": _logit(y, x[:, None]),
        "spline": _logit(y, rcs_columns(x, list(np.quantile(x, QUANTILES[3])))),
        "test": _logit(y, rcs_columns(x, test_knots)),
    }
    fp = r.get("fp", "legacy").exposure_terms[0]
    fits["fp"] = _logit(y, fp_columns(x, list(fp.powers), fp.shift, fp.scale))

    def lr(a: str, b: str) -> float:
        return float(2 * (fits[a].llf - fits[b].llf))

    assert row["statistic"] == "likelihood ratio"
    assert row["lr_test_spline"] == pytest.approx(lr("test", "null"), rel=1e-7)
    assert row["df_test_spline"] == 3
    assert row["test_detail"].startswith("restricted cubic spline, 4 fixed knots at "
                                         f"{test_knots[0]:.3g}")
    assert row["nonlinearity_lr"] == pytest.approx(lr("test", "linear"), rel=1e-7)
    assert row["nonlinearity_df"] == 2
    assert row["nonlinearity_p"] == pytest.approx(stats.chi2.sf(lr("test", "linear"), 2),
                                                  rel=1e-6)
    for form in ("linear", "spline", "fp"):
        assert row[f"c_{form}"] == pytest.approx(auc_pairs(y, fits[form].fittedvalues),
                                                 rel=1e-9), form
    # An FP's powers count as estimated parameters (Royston & Sauerbrei 2008, from memory;
    # README: FP1 spends 2 df), so its AIC is statsmodels' plus 2 per power.
    aic = {form: fits[form].aic for form in ("legacy", "linear", "spline")}
    aic["fp"] = fits["fp"].aic + 2 * len(fp.powers)
    for form, value in aic.items():
        assert row[f"aic_{form}"] == pytest.approx(value, rel=1e-9), form
    assert row["best_form"] == min(aic, key=lambda f: aic[f])


def _wald(fit: Any, idx: list[int]) -> float:
    b = fit.params[idx]
    return float(b @ np.linalg.solve(fit.cov_params()[np.ix_(idx, idx)], b))


def test_sampling_weights_give_robust_wald_statistics(refit_frame: Any,
                                                      one_analysis: Any) -> None:
    # Reference library: statsmodels GLM Binomial with var_weights and cov_type="HC0" (the
    # sandwich unbin uses under sampling weights, tests/models/test_robust.py); Wald =
    # b' V^-1 b of the named coefficients (invariant to the spline's column scaling). No FP
    # form is requested, so its column stays empty.
    df = _binary_frame(8, 500)
    raw = one_analysis({"type": "binary", "event": "y"}, "x", {"cuts": [50.0]},
                       continuous={"forms": ["linear", "spline"], "spline_knots": [3]})
    raw["analyses"][0]["weights"] = {"column": "w", "kind": "sampling"}
    spec, r = refit_frame(df, raw)
    row = information_table(r, spec).set_index("adjustment").loc["none"]
    x, y, w = df["x"].to_numpy(), df["y"].to_numpy(), df["w"].to_numpy()
    test = _logit(y, rcs_columns(x, list(np.quantile(x, QUANTILES[4]))), w)
    linear = _logit(y, x[:, None], w)
    assert row["statistic"].startswith("robust Wald")
    assert row["lr_linear"] == pytest.approx(_wald(linear, [1]), rel=1e-5)
    assert row["lr_test_spline"] == pytest.approx(_wald(test, [1, 2, 3]), rel=1e-5)
    assert row["nonlinearity_lr"] == pytest.approx(_wald(test, [2, 3]), rel=1e-5)
    assert row["nonlinearity_p"] == pytest.approx(stats.chi2.sf(_wald(test, [2, 3]), 2),
                                                  rel=1e-4)
    assert np.isnan(row["lr_fp"]) and np.isnan(row["aic_fp"])


def test_quasi_poisson_divides_every_statistic_by_the_pearson_scale(refit_frame: Any,
                                                                    one_analysis: Any) -> None:
    # Reference library: statsmodels GLM Poisson with the log person-time offset; the
    # quasi-likelihood test (McCullagh & Nelder 1989, sec. 4.5) divides each LR by the Pearson
    # chi-square / df of the coding's largest model (groups + test spline).
    rng = np.random.default_rng(26)
    n = 800
    x = rng.normal(size=n)
    t = rng.uniform(0.5, 2.0, n)
    y = rng.poisson(np.exp(0.3 * x + 0.2 * x**2) * rng.gamma(2.0, 0.5, n) * t).astype(float)
    df = pd.DataFrame({"x": x, "visits": y, "pyears": t})
    raw = one_analysis({"type": "count", "count": "visits", "persontime": "pyears",
                        "count_model": "quasi-poisson"}, "x", {"cuts": [0.0]},
                       continuous={"forms": ["linear"], "spline_knots": [3]})
    spec, r = refit_frame(df, raw)
    row = information_table(r, spec).set_index("adjustment").loc["none"]
    off = np.log(t)

    def glm(X: np.ndarray) -> Any:
        Xc = sm.add_constant(X, has_constant="add") if X.size else np.ones((n, 1))
        return sm.GLM(y, Xc, family=sm.families.Poisson(), offset=off).fit(tol=1e-12)

    spline = rcs_columns(x, list(np.quantile(x, QUANTILES[4])))
    groups = (x > 0.0).astype(float)[:, None]
    big, test, legacy, linear = (glm(np.column_stack([groups, spline])), glm(spline),
                                 glm(groups), glm(x[:, None]))
    phi = big.pearson_chi2 / big.df_resid
    assert phi > 1.3  # the gamma frailty makes the counts overdispersed
    assert row["added_lr"] == pytest.approx(2 * (big.llf - legacy.llf) / phi, rel=1e-6)
    assert row["nonlinearity_lr"] == pytest.approx(2 * (test.llf - linear.llf) / phi, rel=1e-6)


def test_interaction_with_the_levels_of_a_modifier(refit_frame: Any, one_analysis: Any) -> None:
    # Reference library: statsmodels GLM Binomial. The LR test of spline x level: the
    # fixed-knot spline (Harrell's 4 default quantiles) with the level main effect, with and
    # without the spline's products with the level (3 df); scipy's chi-square for p.
    df = _binary_frame(11, 800)
    rng = np.random.default_rng(12)
    df["g"] = (rng.random(len(df)) < 0.5).astype(float)
    raw = one_analysis({"type": "binary", "event": "y"}, "x", {"cuts": [50.0]},
                       continuous={"forms": ["linear"], "spline_knots": [3]})
    raw["analyses"][0]["by"] = "g"
    spec, r = refit_frame(df, raw)
    table = information_table(r, spec).set_index("adjustment")
    x, y, g = df["x"].to_numpy(), df["y"].to_numpy(), df["g"].to_numpy()
    s = rcs_columns(x, list(np.quantile(x, QUANTILES[4])))
    main = _logit(y, np.column_stack([g, s]))
    full = _logit(y, np.column_stack([g, s, s * g[:, None]]))
    lr = 2 * (full.llf - main.llf)
    for coding in ("legacy", "continuous"):
        row = table.loc[coding]
        assert row["interaction_lr"] == pytest.approx(lr, rel=1e-6), coding
        assert row["interaction_df"] == 3
        assert row["interaction_p"] == pytest.approx(stats.chi2.sf(lr, 3), rel=1e-5)
    assert np.isnan(table.loc["none", "interaction_lr"])
    assert table.loc["none", "interaction_detail"] == "no adjustment, so no level main effects"
