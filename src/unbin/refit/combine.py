"""Combining the analyses of M imputed data sets.

- :func:`rubin`: Rubin's rules (Rubin 1987) for scalar estimates, with the degrees of freedom of
  Barnard & Rubin (1999) and the fraction of missing information.
- :func:`d1`: the multivariate Wald test of several coefficients combined over imputations (D1;
  Li, Raghunathan & Rubin 1991; van Buuren 2018, sec. 5.3.3), with its denominator degrees of
  freedom and fraction of missing information.
- :func:`d2`: chi-square statistics combined (D2; Li, Meng, Raghunathan & Rubin 1991).
- :func:`d3`: likelihood-ratio tests combined (D3; Meng & Rubin 1992), from each set's
  likelihood-ratio statistic and the same statistic re-evaluated at the pooled estimates.
- :func:`combine_tables`: one question's per-imputation tables, row by row, into one table.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..distributions import stats

Z = 0.975  # two-sided 95% intervals


@dataclass(frozen=True)
class Pooled:
    """Rubin's rules, elementwise: the pooled estimate, within, between and total variance,
    the degrees of freedom, lambda = (1 + 1/M) B / T and the fraction of missing information
    (Rubin 1987, eq. 3.1.10; van Buuren 2018, eq. 2.24)."""

    estimate: np.ndarray
    within: np.ndarray
    between: np.ndarray
    total: np.ndarray
    df: np.ndarray
    lam: np.ndarray
    fmi: np.ndarray

    @property
    def se(self) -> np.ndarray:
        return np.sqrt(self.total)

    def interval(self, level: float = Z) -> tuple[np.ndarray, np.ndarray]:
        t = stats.t.ppf(level, np.where(np.isfinite(self.df), self.df, 1e12))
        return self.estimate - t * self.se, self.estimate + t * self.se


def rubin(estimates: np.ndarray, ses: np.ndarray, df_complete: float = np.inf) -> Pooled:
    """Rubin's rules over the first axis (imputations) of ``estimates`` and ``ses``.

    Degrees of freedom: Barnard & Rubin (1999) with the complete-data ``df_complete`` (infinite
    by default: then Rubin's 1987 (M - 1) / lambda^2); infinite when nothing varies between
    imputations beyond floating-point rounding (a between-set standard deviation of at most 64
    units in the last place of the largest estimate counts as none)."""
    q = np.asarray(estimates, float)
    u = np.asarray(ses, float) ** 2
    m = q.shape[0]
    if m < 2:
        raise ValueError("Rubin's rules need at least two imputations")
    qbar = q.mean(axis=0)
    w = u.mean(axis=0)
    b = q.var(axis=0, ddof=1)
    # A spread between the sets at the level of floating-point rounding (the same estimate
    # computed from sets that agree, e.g. a point with no imputed rows in its neighbourhood) is no
    # between-set variance: without this, such points read df = inf in one run and ~1e53 in
    # another. The bound: a standard deviation of 64 units in the last place of the largest
    # estimate.
    rounding = (64 * np.finfo(float).eps * np.abs(q).max(axis=0, initial=0.0)) ** 2
    b = np.where(b <= rounding, 0.0, b)
    total = w + (1 + 1 / m) * b
    with np.errstate(divide="ignore", invalid="ignore"):
        lam = np.where(total > 0, (1 + 1 / m) * b / total, 0.0)
        df_old = np.where(lam > 0, (m - 1) / lam**2, np.inf)
        if np.isfinite(df_complete):
            df_obs = (df_complete + 1) / (df_complete + 3) * df_complete * (1 - lam)
            df = np.where(np.isfinite(df_old), df_old * df_obs / (df_old + df_obs), df_obs)
        else:
            df = df_old
        r = np.where(w > 0, (1 + 1 / m) * b / w, 0.0)
        fmi = np.where(np.isfinite(df), (r + 2 / (df + 3)) / (1 + r), lam)
    return Pooled(qbar, w, b, total, df, lam, fmi)


@dataclass(frozen=True)
class CombinedTest:
    """A test combined over imputed sets: F statistic on (k, df) degrees of freedom, its
    p-value, the relative increase in variance r and the fraction of missing information
    r / (1 + r)."""

    statistic: float
    k: int
    df: float
    p: float
    r: float

    @property
    def chi2(self) -> float:
        """k x F, the statistic on the chi-square scale of the other information columns."""
        return self.k * self.statistic

    @property
    def fmi(self) -> float:
        return self.r / (1 + self.r)


class D1(CombinedTest):
    """The combined Wald test (D1)."""


def _df_d1_d3(k: int, m: int, r: float) -> float:
    """The denominator degrees of freedom of D1 and D3 (Li, Raghunathan & Rubin 1991; Meng &
    Rubin 1992): t = k (M - 1); 4 + (t - 4) (1 + (1 - 2/t) / r)^2 when t > 4, else
    t (1 + 1/k) (1 + r)^2 / 2; infinite when r = 0 (nothing varies between the sets)."""
    t = k * (m - 1)
    if r <= 0:
        return np.inf
    if t > 4:
        return 4 + (t - 4) * (1 + (1 - 2 / t) / r) ** 2
    return t * (1 + 1 / k) * (1 + r) ** 2 / 2


def d1(coefs: Sequence[np.ndarray], covs: Sequence[np.ndarray]) -> D1:
    """D1 of H0: theta = 0 for k coefficients, from their estimates and covariances in M
    imputed sets (Li, Raghunathan & Rubin 1991; van Buuren 2018, eqs. 5.4-5.7)."""
    q = np.asarray(coefs, float)
    if q.ndim == 1:
        q = q[:, None]
    m, k = q.shape
    ubar = np.mean(np.asarray(covs, float).reshape(m, k, k), axis=0)
    qbar = q.mean(axis=0)
    b = np.atleast_2d(np.cov(q.T, ddof=1))
    r = float((1 + 1 / m) * np.trace(b @ np.linalg.inv(ubar)) / k)
    stat = float(qbar @ np.linalg.solve(ubar, qbar) / (k * (1 + r)))
    df = _df_d1_d3(k, m, r)
    p = float(stats.f.sf(stat, k, df)) if np.isfinite(df) else float(stats.chi2.sf(stat * k, k))
    return D1(stat, k, float(df), p, r)


class D2(CombinedTest):
    """Chi-square statistics combined over imputations (D2; Li, Meng, Raghunathan & Rubin
    1991; van Buuren 2018, sec. 5.3.4): F on (k, df), p and the relative increase in variance."""


def d2(chi2: Sequence[float], k: int) -> D2:
    """D2 from M chi-square statistics on ``k`` df each (for tests whose coefficients are not
    comparable across the imputed sets, or whose statistic is all that is kept)."""
    d = np.asarray(chi2, float)
    m = d.size
    if m < 2 or k < 1 or not np.isfinite(d).all():
        return D2(np.nan, k, np.nan, np.nan, np.nan)
    root = np.sqrt(np.maximum(d, 0.0))
    r = float((1 + 1 / m) * root.var(ddof=1))
    stat = float((d.mean() / k - (m + 1) / (m - 1) * r) / (1 + r))
    stat = max(stat, 0.0)
    df = float(k ** (-3 / m) * (m - 1) * (1 + 1 / r) ** 2) if r > 0 else np.inf
    p = float(stats.f.sf(stat, k, df)) if np.isfinite(df) else float(stats.chi2.sf(stat * k, k))
    return D2(stat, k, df, p, r)


class D3(CombinedTest):
    """Likelihood-ratio tests combined over imputations (D3; Meng & Rubin 1992; van Buuren
    2018, sec. 5.3)."""


def d3(lr: Sequence[float], lr_pooled: Sequence[float], k: int) -> D3:
    """D3 of a likelihood-ratio test on ``k`` df from its M imputed sets.

    ``lr``: each set's likelihood-ratio statistic at its own estimates, 2 (l1_m(theta1_m) -
    l0_m(theta0_m)); ``lr_pooled``: the same statistic of each set evaluated at the estimates
    pooled over the sets (the means of theta1_m and of theta0_m), 2 (l1_m(theta1) -
    l0_m(theta0)). With d = mean(lr) and d~ = mean(lr_pooled): r3 = (M + 1) / (k (M - 1))
    (d - d~), truncated at 0 (it can fall below in a finite sample); D3 = d~ / (k (1 + r3)) on
    F(k, v), v as for D1 with r3 (Meng & Rubin 1992, from memory)."""
    d = np.asarray(lr, float)
    dp = np.asarray(lr_pooled, float)
    m = d.size
    if m < 2 or dp.size != m or k < 1 or not (np.isfinite(d).all() and np.isfinite(dp).all()):
        return D3(np.nan, k, np.nan, np.nan, np.nan)
    r = max(float((m + 1) / (k * (m - 1)) * (d.mean() - dp.mean())), 0.0)
    stat = max(float(dp.mean() / (k * (1 + r))), 0.0)
    df = float(_df_d1_d3(k, m, r))
    p = float(stats.f.sf(stat, k, df)) if np.isfinite(df) else float(stats.chi2.sf(stat * k, k))
    return D3(stat, k, df, p, r)


# Text (and flag) columns that describe a basis built from each imputed set's own values (knots
# at its quantiles, FP shift and scale), a row's range flags, or explain a row: the first set's
# are kept.
VARYING_TEXT = ("detail", "test_detail", "exposure_basis", "adjustment_terms", "fp_detail",
                "interaction_detail", "basis", "message", "warnings", "reason", "note",
                "variance", "status", "in_range", "covers_untrimmed", "extrapolated",
                "best_form")


def _is_p(column: str) -> bool:
    return column == "p" or column.startswith("p_") or column.endswith("_p")


def _same(values: list[pd.Series]) -> bool:
    first = values[0].astype(str).to_numpy()
    return all(np.array_equal(first, v.astype(str).to_numpy()) for v in values[1:])


def combine_tables(tables: Sequence[pd.DataFrame], effect_transform: bool = True
                   ) -> tuple[pd.DataFrame, str]:
    """Combine one question's tables from M imputed sets into one.

    The tables must match row for row in every text column (the same forms, contrasts, grid
    positions); otherwise the first set's table is returned with a message. ``estimate`` and
    ``se`` are combined by Rubin's rules; ``lower``/``upper`` become t intervals on Barnard-Rubin
    degrees of freedom and, with ``effect`` columns, the effects are the exponentiated ones when
    the first set's effects were (ratio scales); ``fmi`` and ``df_imputation`` are added. A
    table with ``statistic``, ``df`` and ``p`` columns (a chi-square test per row) gets them
    combined by D2; other p-value columns are set missing (p-values are not averaged). Any other
    numeric column is averaged over the sets (descriptive values such as group medians of the
    imputed exposure; counts are rounded back to integers). Text columns in ``VARYING_TEXT``
    keep the first set's text. Returns the table and a message ("" when combined)."""
    first = tables[0]
    if len(tables) == 1 or first.empty:
        return first.copy(), ""
    if any(len(t) != len(first) or list(t.columns) != list(first.columns) for t in tables[1:]):
        return first.copy(), ("the imputed sets gave tables of different shapes; the first "
                              "imputed set's table is shown, not combined")
    text = [c for c in first.columns if not pd.api.types.is_numeric_dtype(first[c])
            or pd.api.types.is_bool_dtype(first[c])]
    differing = [c for c in text if c not in VARYING_TEXT and not _same([t[c] for t in tables])]
    if differing:
        where = ", ".join(c.replace("_", " ") for c in differing)  # read in the report too
        return first.copy(), (f"the imputed sets gave tables whose rows differ (in {where}); "
                              "the first imputed set's table is shown, not combined")
    out = first.copy()
    numeric = [c for c in first.columns if c not in text]
    tested = {"statistic", "df", "p"} <= set(first.columns)
    if tested:
        for i in range(len(first)):
            k = first["df"].iloc[i]
            if np.isfinite(k) and k >= 1:
                res = d2([t["statistic"].iloc[i] for t in tables], int(k))
                out.loc[out.index[i], "statistic"] = res.chi2
                out.loc[out.index[i], "p"] = res.p
            else:
                out.loc[out.index[i], ["statistic", "p"]] = np.nan
        numeric = [c for c in numeric if c not in ("statistic", "p", "df")]
    for c in [c for c in numeric if _is_p(c)]:
        out[c] = np.nan  # p-values are not averaged; the tests are combined in information
    numeric = [c for c in numeric if not _is_p(c)]
    for c in numeric:
        stack = np.vstack([t[c].to_numpy(float, na_value=np.nan) for t in tables])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # all-missing columns stay missing
            mean = np.nanmean(stack, axis=0)
        if pd.api.types.is_integer_dtype(first[c]):
            rounded = pd.Series(np.round(mean), index=out.index)
            if rounded.notna().all() or pd.api.types.is_extension_array_dtype(first[c]):
                out[c] = rounded.astype(first[c].dtype)
            else:
                out[c] = rounded
        else:
            out[c] = mean
    if "estimate" in first.columns and "se" in first.columns:
        est = np.vstack([t["estimate"].to_numpy(float) for t in tables])
        se = np.vstack([t["se"].to_numpy(float) for t in tables])
        with np.errstate(invalid="ignore", divide="ignore"):
            pooled = rubin(est, se)
            lo, hi = pooled.interval()
        out["estimate"], out["se"] = pooled.estimate, pooled.se
        if "lower" in out.columns and "upper" in out.columns:
            out["lower"], out["upper"] = lo, hi
        if effect_transform and "effect" in out.columns:
            ratio = np.allclose(first["effect"].to_numpy(float),
                                np.exp(first["estimate"].to_numpy(float)), equal_nan=True)
            f = np.exp if ratio else (lambda v: v)
            out["effect"] = f(pooled.estimate)
            if "effect_lower" in out.columns:
                out["effect_lower"], out["effect_upper"] = f(lo), f(hi)
        out["fmi"] = pooled.fmi
        out["df_imputation"] = pooled.df
    return out, ""


def combine_log_ratios(tables: Sequence[pd.DataFrame], out: pd.DataFrame, ratio: str,
                       lower: str, upper: str, z: float) -> None:
    """Ratio columns combined by Rubin's rules on the log scale, in place in ``out`` (the
    combined table, row for row the per-set ``tables``): each set's log ratio and its standard
    error, (log upper - log lower) / (2 z), back from its Wald limits exp(b -/+ z se); the
    pooled ratio exp(mean b) with t limits on Barnard-Rubin degrees of freedom (Rubin 1987;
    Barnard & Rubin 1999), as ``effect``, ``effect_lower`` and ``effect_upper`` are combined.
    A row without limits in some set (a reference row, ratio 1) keeps the geometric mean ratio
    and no limits."""
    with np.errstate(divide="ignore", invalid="ignore"):
        est = np.vstack([np.log(t[ratio].to_numpy(float, na_value=np.nan)) for t in tables])
        se = np.vstack([(np.log(t[upper].to_numpy(float, na_value=np.nan))
                         - np.log(t[lower].to_numpy(float, na_value=np.nan))) / (2 * z)
                        for t in tables])
        pooled = rubin(est, se)
        lo, hi = pooled.interval()
    out[ratio] = np.exp(pooled.estimate)
    out[lower], out[upper] = np.exp(lo), np.exp(hi)


def combine_estimates(tables: Sequence[pd.DataFrame], out: pd.DataFrame, estimate: str,
                      se: str) -> None:
    """An estimate and its standard error combined by Rubin's rules, in place in ``out``: the
    mean estimate and the total SE sqrt(W + (1 + 1/M) B) (Rubin 1987)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        pooled = rubin(np.vstack([t[estimate].to_numpy(float, na_value=np.nan) for t in tables]),
                       np.vstack([t[se].to_numpy(float, na_value=np.nan) for t in tables]))
    out[estimate], out[se] = pooled.estimate, pooled.se
