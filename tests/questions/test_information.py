"""Information kept by a legacy grouping (unbin.refit.analysis + unbin.questions.information) against the published
large-sample efficiency of splitting a normal predictor (Cohen 1983; MacCallum et al. 2002).

Tolerances come from the noncentrality. In the local regime LR_linear ~ (Z1 + sqrt(lam))^2 and
LR_legacy ~ (Z2 + sqrt(c lam))^2, with c the share kept and corr(Z1, Z2) = corr(x, group) =
sqrt(c), so by the delta method

    sd(log(LR_legacy / LR_linear)) = 2 sqrt((1/c - 1) / lam).

lam is estimated by LR_linear - 1 (the mean of a chi-square on 1 df with noncentrality lam is
1 + lam). The tests allow 4 such sds (a seeded run fails by chance with probability ~6e-5), plus
the known departure from the local limit where it is computable.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from scipy import stats

N = 200_000
TWO_OVER_PI = 2.0 / np.pi


def _information(refit_frame: Any, one_analysis: Any, frame: pd.DataFrame, outcome: dict[str, Any],
                 grouping: dict[str, Any]) -> pd.Series:
    """The information row of the unadjusted fits (linear and spline only: FP is not needed)."""
    from unbin.questions.information import information_table

    raw = one_analysis(outcome, "x", grouping, continuous={"forms": ["linear"],
                                                            "spline_knots": [3]})
    _, r = refit_frame(frame, raw)
    info = information_table(r)
    row = info[info["adjustment"] == "none"].iloc[0]
    assert row["df_legacy"] == len(r.legacy.cuts) and row["df_linear"] == 1
    return row


def _sd_log_ratio(c: float, lr_linear: float) -> float:
    return float(2.0 * np.sqrt((1.0 / c - 1.0) / (lr_linear - 1.0)))


def _linear_model_frame(seed: int, slope: float) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=N)
    return pd.DataFrame({"x": x, "y": slope * x + rng.normal(size=N)})


def test_shares_kept_from_the_formula_match_the_published_values() -> None:
    # Cohen 1983; MacCallum et al. 2002: a split leaving share p shrinks r by phi(z_p)/sqrt(p(1-p)); median -> sqrt(2/pi)
    # (Cohen 1983; MacCallum et al. 2002), p = 0.25 -> 0.7339, p = 0.10 -> 0.5850.
    def shrink(p: float) -> float:
        return float(stats.norm.pdf(stats.norm.ppf(p)) / np.sqrt(p * (1 - p)))

    assert shrink(0.5) ** 2 == pytest.approx(TWO_OVER_PI, rel=1e-12)
    assert shrink(0.25) == pytest.approx(0.7339, abs=5e-5)
    assert shrink(0.10) == pytest.approx(0.5850, abs=5e-5)


def test_median_split_keeps_two_over_pi_of_a_linear_models_information(refit_frame: Any,
                                                                       one_analysis: Any) -> None:
    # Cohen 1983; MacCallum, Zhang, Preacher & Rucker 2002: a median split of a
    # normal predictor keeps 2/pi = 0.6366 of the explained variance, hence (small R^2) of the LR
    # chi-square. Linear model y = 0.15 x + e, e ~ N(0, 1): R^2 = 0.022, lam ~ 4500 per run.
    # Away from the local limit LR = -n log(1 - R^2) gives the exact population ratio
    # log(1 - c R^2) / log(1 - R^2), 0.4% below c here: added to the tolerance.
    slope, seeds = 0.15, range(20240, 20244)
    r2 = slope**2 / (1 + slope**2)
    bias = abs(np.log(np.log1p(-TWO_OVER_PI * r2) / np.log1p(-r2) / TWO_OVER_PI))
    logs, variances, kept = [], [], []
    for seed in seeds:  # four replicates halve the sampling error of a single run
        row = _information(refit_frame, one_analysis, _linear_model_frame(seed, slope),
                           {"type": "continuous", "value": "y"}, {"quantiles": 2})
        logs.append(np.log(row["lr_legacy"] / row["lr_linear"]))
        variances.append(_sd_log_ratio(TWO_OVER_PI, row["lr_linear"]) ** 2)
        kept.append(row["info_kept"])
    sd = np.sqrt(np.sum(variances)) / len(logs)  # ~0.011 on the log scale
    assert abs(np.mean(logs) - np.log(TWO_OVER_PI)) < 4 * sd + bias
    # The reported share (LR legacy / LR legacy + spline) tends to the same value under a linear
    # truth; the test spline (4 knots) adds 3 df of noise (LR of order 3 against ~4500), well
    # inside 1 sd.
    assert abs(np.log(np.mean(kept)) - np.log(TWO_OVER_PI)) < 4 * sd + bias + 0.002


def test_median_split_keeps_two_over_pi_in_a_logistic_model(refit_frame: Any,
                                                            one_analysis: Any) -> None:
    # Same published value (Cohen 1983; MacCallum et al. 2002) through the logistic fitter, with
    # the cut given as the sample median ({cuts: [median]}). Local regime: log OR 0.3 per SD,
    # risk 0.5 at x = 0, so the linear predictor stays in the nearly linear part of the logit
    # and LR ~ score statistic ~ n corr(y, x)^2 (lam ~ 4300). One run; tolerance 4 sd (~0.09 on
    # the log scale) from the noncentrality above.
    rng = np.random.default_rng(1983)
    x = rng.normal(size=N)
    y = (rng.random(N) < 1.0 / (1.0 + np.exp(-0.3 * x))).astype(float)
    row = _information(refit_frame, one_analysis, pd.DataFrame({"x": x, "y": y}),
                       {"type": "binary", "event": "y"}, {"cuts": [float(np.median(x))]})
    sd = _sd_log_ratio(TWO_OVER_PI, row["lr_linear"])
    assert abs(np.log(row["lr_legacy"] / row["lr_linear"]) - np.log(TWO_OVER_PI)) < 4 * sd


def test_quarter_split_keeps_phi_squared_over_p_q(refit_frame: Any, one_analysis: Any) -> None:
    # From the published formula (MacCallum et al. 2002): a 25%/75% split keeps phi(z_p)^2 / (p (1 - p)) = 0.7339^2 = 0.5386 of
    # the information (here: cut at the normal 25th percentile, so p = 0.25 in the population).
    p = 0.25
    z = float(stats.norm.ppf(p))
    c = float(stats.norm.pdf(z) ** 2 / (p * (1 - p)))
    assert np.sqrt(c) == pytest.approx(0.7339, abs=5e-5)
    slope, seeds = 0.15, range(25, 29)
    r2 = slope**2 / (1 + slope**2)
    bias = abs(np.log(np.log1p(-c * r2) / np.log1p(-r2) / c))
    logs, variances = [], []
    for seed in seeds:
        row = _information(refit_frame, one_analysis, _linear_model_frame(seed, slope),
                           {"type": "continuous", "value": "y"}, {"cuts": [z]})
        logs.append(np.log(row["lr_legacy"] / row["lr_linear"]))
        variances.append(_sd_log_ratio(c, row["lr_linear"]) ** 2)
    sd = np.sqrt(np.sum(variances)) / len(logs)
    assert abs(np.mean(logs) - np.log(c)) < 4 * sd + bias
    # ... and it is clearly below the median split's 2/pi (the test can tell the two apart).
    assert np.mean(logs) < np.log(TWO_OVER_PI) - 4 * sd
