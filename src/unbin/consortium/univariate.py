"""Pooling one effect, or one effect at every point of a grid, across cohorts: fixed-effect
(inverse variance) and random-effects means, Cochran's Q, I², tau² by DerSimonian–Laird,
Paule–Mandel or REML, and the normal-theory, Hartung–Knapp–Sidik–Jonkman and prediction
intervals (conventions: :mod:`unbin.consortium.meta_analysis`)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .pooling_base import (
    PoolingInputError,
    _as_float,
    _bad_variance_message,
    _frozen,
    _z_crit,
)

TAU2_METHODS = ("dl", "pm", "reml")


@dataclass(frozen=True)
class PooledEstimate:
    """One pooled effect.

    ``fe_*``: fixed effect (inverse-variance weights 1/v_i). ``re_*``: DerSimonian–Laird
    random effects (weights 1/(v_i + tau2)). ``q`` is Cochran's Q on ``q_df = k - 1``
    degrees of freedom with its chi-squared upper-tail ``q_pvalue``; ``i2`` is
    max(0, (Q - df)/Q) as a fraction. See the module docstring for k = 1.
    """

    k: int
    fe_mean: float
    fe_se: float
    re_mean: float
    re_se: float
    tau2: float
    q: float
    q_df: int
    q_pvalue: float
    i2: float
    tau2_method: str = "dl"
    hksj_se: float = float("nan")

    def ci(self, level: float = 0.95, random: bool = True) -> tuple[float, float]:
        """Normal-theory confidence interval of the random-effects (or fixed-effect) mean."""
        z = _z_crit(level)
        mean, se = (self.re_mean, self.re_se) if random else (self.fe_mean, self.fe_se)
        return mean - z * se, mean + z * se

    def ci_hksj(self, level: float = 0.95) -> tuple[float, float]:
        """Hartung–Knapp–Sidik–Jonkman interval of the random-effects mean: t on k - 1 df
        (NaN for k = 1)."""
        _z_crit(level)
        if self.k < 2:
            return float("nan"), float("nan")
        t = float(stats.t.ppf(0.5 + level / 2.0, self.k - 1))
        return self.re_mean - t * self.hksj_se, self.re_mean + t * self.hksj_se

    def prediction_interval(self, level: float = 0.95) -> tuple[float, float]:
        """Where the effect of a new cohort is expected: mean ± t_{k-2} sqrt(tau² + SE²)
        (Higgins, Thompson & Spiegelhalter 2009); NaN for k < 3."""
        _z_crit(level)
        if self.k < 3:
            return float("nan"), float("nan")
        t = float(stats.t.ppf(0.5 + level / 2.0, self.k - 2))
        half = t * float(np.sqrt(self.tau2 + self.re_se**2))
        return self.re_mean - half, self.re_mean + half


@dataclass(frozen=True)
class PointwisePooled:
    """Pooled estimates at every grid point; every array has shape (g,) and is read-only.

    ``k`` counts the cohorts present at each point. Points with no cohort are NaN throughout;
    points with one cohort follow the k = 1 convention of the module docstring.
    ``fe_*``/``re_*`` ``_lower``/``_upper`` are normal-theory limits at ``level``;
    ``hksj_*`` the HKSJ interval of the random-effects mean (NaN for k < 2) and ``pi_*`` the
    prediction interval (NaN for k < 3). ``tau2`` is estimated by ``tau2_method``.
    """

    level: float
    k: np.ndarray
    fe_mean: np.ndarray
    fe_se: np.ndarray
    fe_lower: np.ndarray
    fe_upper: np.ndarray
    re_mean: np.ndarray
    re_se: np.ndarray
    re_lower: np.ndarray
    re_upper: np.ndarray
    tau2: np.ndarray
    i2: np.ndarray
    q: np.ndarray
    q_df: np.ndarray
    q_pvalue: np.ndarray
    tau2_method: str
    hksj_se: np.ndarray
    hksj_lower: np.ndarray
    hksj_upper: np.ndarray
    pi_lower: np.ndarray
    pi_upper: np.ndarray


def _tau2_pm(y0: np.ndarray, v: np.ndarray, present: np.ndarray, q0: np.ndarray,
             df: np.ndarray, several: np.ndarray) -> np.ndarray:
    """Paule–Mandel tau² per column: the root of Q(tau²) = k - 1, where
    Q(tau²) = sum w_i(tau²) (y_i - mu(tau²))² with w_i = 1/(v_i + tau²) (Paule & Mandel 1982;
    DerSimonian & Kacker 2007). Q decreases in tau²; Q(0) <= k - 1 gives 0. The root lies
    below sum (y_i - ybar)² / (k - 1) (there Q <= k - 1), so bisection on that bracket,
    refined to machine precision, finds it."""
    k = present.sum(axis=0)
    kk = np.maximum(k, 1)
    ybar = y0.sum(axis=0) / kk
    ss = np.where(present, (y0 - ybar) ** 2, 0.0).sum(axis=0)
    lo = np.zeros(y0.shape[1])
    hi = np.where(several, ss / np.maximum(df, 1), 0.0)
    need = several & (q0 > df)

    def q_at(t2: np.ndarray) -> np.ndarray:
        w = np.where(present, 1.0 / (np.where(present, v, 1.0) + t2), 0.0)
        mu = (w * y0).sum(axis=0) / np.where(k > 0, w.sum(axis=0), 1.0)
        return np.asarray((w * np.where(present, y0 - mu, 0.0) ** 2).sum(axis=0))

    for _ in range(200):
        mid = 0.5 * (lo + hi)
        above = q_at(mid) > df
        lo = np.where(above, mid, lo)
        hi = np.where(above, hi, mid)
        if np.all(hi - lo <= 4 * np.finfo(float).eps * np.maximum(hi, 1e-300)):
            break
    return np.where(need, 0.5 * (lo + hi), 0.0)


def _tau2_reml(y0: np.ndarray, v: np.ndarray, present: np.ndarray, start: np.ndarray,
               several: np.ndarray) -> np.ndarray:
    """REML tau² per column by the fixed-point iteration of Viechtbauer (2005, J Educ Behav Stat
    30:261): tau² <- max(0, sum w² ((y - mu)² - v) / sum w² + 1 / sum w), w = 1/(v + tau²),
    from the DerSimonian–Laird value, until it moves by less than 1e-12 (relative)."""
    t2 = np.where(several, start, 0.0)
    vv = np.where(present, v, 1.0)
    for _ in range(1000):
        w = np.where(present, 1.0 / (vv + t2), 0.0)
        sw = np.where(several, w.sum(axis=0), 1.0)
        mu = (w * y0).sum(axis=0) / sw
        r2 = np.where(present, (y0 - mu) ** 2 - vv, 0.0)
        sw2 = np.where(several, (w**2).sum(axis=0), 1.0)
        new = np.where(several, np.maximum((w**2 * r2).sum(axis=0) / sw2 + 1.0 / sw, 0.0), 0.0)
        done = np.abs(new - t2) <= 1e-12 * np.maximum(new, 1e-12)
        t2 = new
        if done.all():
            break
    return np.asarray(t2)


def _pool_columns(y: np.ndarray, v: np.ndarray, present: np.ndarray,
                tau2_method: str = "dl") -> dict[str, np.ndarray]:
    """Fixed and random effects on every column of (k, g) arrays, using only ``present``
    cells (tau² by DerSimonian–Laird unless ``tau2_method`` says ``"pm"`` or ``"reml"``).
    Cells that are not present may hold anything (weight zero).
    """
    if tau2_method not in TAU2_METHODS:
        raise PoolingInputError(f"tau2 method {tau2_method!r} is not one of {TAU2_METHODS}")
    w = np.where(present, 1.0 / np.where(present, v, 1.0), 0.0)
    y0 = np.where(present, y, 0.0)
    k = present.sum(axis=0)
    has = k >= 1
    several = k >= 2

    sw = w.sum(axis=0)
    safe_sw = np.where(has, sw, 1.0)
    fe = np.where(has, (w * y0).sum(axis=0) / safe_sw, np.nan)
    fe_var = np.where(has, 1.0 / safe_sw, np.nan)

    resid = np.where(present, y0 - np.where(has, fe, 0.0), 0.0)
    q = np.where(several, (w * resid**2).sum(axis=0), np.where(has, 0.0, np.nan))
    df = np.maximum(k - 1, 0)
    c = sw - (w**2).sum(axis=0) / safe_sw  # > 0 whenever k >= 2
    tau2_raw = np.where(several, (q - df) / np.where(several, c, 1.0), 0.0)
    tau2_dl = np.maximum(tau2_raw, 0.0)
    if tau2_method == "pm":
        tau2_est = _tau2_pm(y0, v, present, np.where(several, q, 0.0), df, several)
    elif tau2_method == "reml":
        tau2_est = _tau2_reml(y0, v, present, tau2_dl, several)
    else:
        tau2_est = tau2_dl
    tau2 = np.where(has, tau2_est, np.nan)

    w_re = np.where(present, 1.0 / (np.where(present, v, 1.0) + np.where(has, tau2, 0.0)), 0.0)
    sw_re = np.where(has, w_re.sum(axis=0), 1.0)
    re = np.where(has, (w_re * y0).sum(axis=0) / sw_re, np.nan)
    re_var = np.where(has, 1.0 / sw_re, np.nan)
    resid_re = np.where(present, y0 - np.where(has, re, 0.0), 0.0)
    q_hk = (w_re * resid_re**2).sum(axis=0) / np.maximum(df, 1)
    hksj_se = np.where(several, np.sqrt(q_hk / sw_re), np.nan)

    q_pos = several & (q > 0)
    i2 = np.where(q_pos, np.maximum((q - df) / np.where(q_pos, q, 1.0), 0.0), 0.0)
    i2 = np.where(several, i2, np.nan)
    pval = np.full(q.shape, np.nan)
    pval[several] = stats.chi2.sf(q[several], df[several])

    return {
        "k": k,
        "fe_mean": fe,
        "fe_se": np.sqrt(fe_var),
        "re_mean": re,
        "re_se": np.sqrt(re_var),
        "tau2": tau2,
        "q": q,
        "q_df": df,
        "q_pvalue": pval,
        "i2": i2,
        "hksj_se": hksj_se,
    }


def _t_crit(level: float, df: np.ndarray) -> np.ndarray:
    """t quantiles for each column's df (NaN where df < 1)."""
    out = np.full(np.shape(df), np.nan)
    ok = np.asarray(df) >= 1
    out[ok] = stats.t.ppf(0.5 + level / 2.0, np.asarray(df)[ok])
    return out


def _estimates_and_variances(
    estimates: object, variances: object, ndim: int
) -> tuple[np.ndarray, np.ndarray]:
    """Estimates and variances as float arrays of one shape: (k,) for one effect (``y``,
    ``v``), (k cohorts, g grid points) for a grid (``Y``, ``V``)."""
    y_name, v_name = ("y", "v") if ndim == 1 else ("Y", "V")
    ya = _as_float(f"estimates {y_name}", estimates, ndim)
    va = _as_float(f"variances {v_name}", variances, ndim)
    if ya.shape == va.shape:
        return ya, va
    if ndim == 1:
        raise PoolingInputError(
            f"estimates y ({ya.size} values) and variances v ({va.size} values) "
            "must have the same length"
        )
    raise PoolingInputError(
        f"estimates Y {ya.shape} and variances V {va.shape} must have the same shape "
        "(cohorts x grid points)"
    )


def pool_univariate(y: object, v: object, tau2_method: str = "dl") -> PooledEstimate:
    """Fixed-effect and random-effects pooling of one effect.

    ``y``: the k cohort estimates; ``v``: their variances (squared standard errors).
    Formulas (DerSimonian & Laird 1986): w_i = 1/v_i, Q = sum w_i (y_i - y_FE)^2,
    C = sum w - sum w^2 / sum w, tau^2 = max(0, (Q - (k-1))/C), I^2 = max(0, (Q-(k-1))/Q).
    ``tau2_method`` ``"pm"`` (Paule–Mandel) or ``"reml"`` replace that tau²; Q and I² stay
    the fixed-effect ones.
    """
    ya, va = _estimates_and_variances(y, v, 1)
    if ya.size == 0:
        raise PoolingInputError("nothing to pool: y and v are empty")
    for i in range(ya.size):
        if not np.isfinite(ya[i]):
            raise PoolingInputError(f"estimate y of cohort {i} is {float(ya[i])!r}; it must be finite")
        if not (np.isfinite(va[i]) and va[i] > 0):
            raise PoolingInputError(_bad_variance_message("variance v", float(va[i]), f"of cohort {i}"))
    res = _pool_columns(ya[:, None], va[:, None], np.ones((ya.size, 1), dtype=bool), tau2_method)
    return PooledEstimate(
        k=int(res["k"][0]),
        fe_mean=float(res["fe_mean"][0]),
        fe_se=float(res["fe_se"][0]),
        re_mean=float(res["re_mean"][0]),
        re_se=float(res["re_se"][0]),
        tau2=float(res["tau2"][0]),
        q=float(res["q"][0]),
        q_df=int(res["q_df"][0]),
        q_pvalue=float(res["q_pvalue"][0]),
        i2=float(res["i2"][0]),
        tau2_method=tau2_method,
        hksj_se=float(res["hksj_se"][0]),
    )


def pool_pointwise(Y: object, V: object, level: float = 0.95,
                   tau2_method: str = "dl") -> PointwisePooled:
    """Pool cohort curves point by point over a common grid.

    ``Y`` and ``V`` have shape (k cohorts, g grid points): estimates (e.g. f_j(x) - f_j(x_ref))
    and their variances. A NaN estimate marks the cohort as missing at that point (its
    variance is then ignored); every present estimate needs a positive, finite variance.
    At the reference value itself, where every variance is typically zero, leave the
    point off the grid (or mark it missing): the contrast there is 0 by construction.
    """
    ya, va = _estimates_and_variances(Y, V, 2)
    z = _z_crit(level)
    if np.isinf(ya).any():
        i, j = np.argwhere(np.isinf(ya))[0]
        raise PoolingInputError(
            f"estimate Y of cohort {i} at grid point {j} is infinite; use NaN for a missing value"
        )
    present = ~np.isnan(ya)
    bad = present & ~(np.isfinite(va) & (va > 0))
    if bad.any():
        i, j = np.argwhere(bad)[0]
        raise PoolingInputError(
            _bad_variance_message(
                "variance V", float(va[i, j]), f"of cohort {i} at grid point {j}"
            )
            + f" ({int(bad.sum())} such cell(s) in all)"
        )
    res = _pool_columns(ya, va, present, tau2_method)
    out = dict(res)
    out["fe_lower"] = res["fe_mean"] - z * res["fe_se"]
    out["fe_upper"] = res["fe_mean"] + z * res["fe_se"]
    out["re_lower"] = res["re_mean"] - z * res["re_se"]
    out["re_upper"] = res["re_mean"] + z * res["re_se"]
    t = _t_crit(level, res["q_df"])
    out["hksj_lower"] = res["re_mean"] - t * res["hksj_se"]
    out["hksj_upper"] = res["re_mean"] + t * res["hksj_se"]
    half = _t_crit(level, res["k"] - 2) * np.sqrt(res["tau2"] + res["re_se"] ** 2)
    out["pi_lower"] = res["re_mean"] - half
    out["pi_upper"] = res["re_mean"] + half
    return PointwisePooled(level=float(level), tau2_method=tau2_method,
                           **{n: _frozen(a) for n, a in out.items()})
