"""Meta-analysis of share-safe cohort summaries: the statistical core, on numpy arrays only.

Four entry points:

* :func:`pool_univariate` — one effect per cohort: fixed-effect (inverse variance) and
  random-effects pooling, Cochran's Q, I² and tau². tau² by DerSimonian–Laird (``"dl"``, the
  default), Paule–Mandel (``"pm"``) or restricted maximum likelihood (``"reml"``); besides the
  normal-theory interval, the Hartung–Knapp–Sidik–Jonkman interval (IntHout, Ioannidis & Borm
  2014, BMC Med Res Methodol 14:25) and the prediction interval (Higgins, Thompson &
  Spiegelhalter 2009, JRSS A 172:137), which keep their coverage with few cohorts.
* :func:`pool_pointwise` — the same, vectorised over a grid of exposure values (curves
  relative to a common reference value, pooled point by point; Sauerbrei & Royston 2011).
  A cohort missing at a grid point (NaN estimate) is left out at that point only.
* :func:`pool_multivariate` — coefficient vectors with within-cohort covariance matrices:
  the multivariate method of moments of Jackson, White & Thompson (2010, Stat Med 29:1282),
  the matrix generalisation of DerSimonian–Laird.
* :func:`pooled_curve` — a pooled curve f(x) - f(x_ref) with delta-method standard errors.

Conventions shared by all functions
-----------------------------------
* Variances, not standard errors, go in.
* HKSJ: with w*_i = 1/(v_i + tau²) and the random-effects mean mu,
  q = sum w*_i (y_i - mu)² / (k - 1) and SE_HKSJ = sqrt(q / sum w*_i); the interval is
  mu ± t_{k-1} SE_HKSJ (k >= 2). Prediction interval: mu ± t_{k-2} sqrt(tau² + SE²) with the
  usual SE² = 1 / sum w*_i (k >= 3; NaN below).
* tau² (and the between-cohort covariance Psi) are truncated at zero (at positive
  semi-definiteness); I² is reported as a fraction in [0, 1], truncated at 0.
* With a single cohort there is no heterogeneity to estimate: tau² = 0 (Psi = 0), Q = 0 on
  0 degrees of freedom, the Q p-value is NaN and I² is NaN (undefined, not 0), and the
  random-effects result equals the fixed-effect one. With two or more cohorts and Q <= df,
  I² is 0.
* Invalid input (non-finite estimates, variances that are not positive and finite,
  covariance matrices that are not symmetric positive definite, shape mismatches) raises
  :class:`PoolingInputError`, a ``ValueError`` that names the cohort and the problem.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from unbin.errors import UnbinError

__all__ = [
    "MultivariatePooled",
    "PointwisePooled",
    "PooledEstimate",
    "PoolingInputError",
    "pool_multivariate",
    "pool_pointwise",
    "pool_univariate",
    "pooled_curve",
    "TAU2_METHODS",
]

TAU2_METHODS = ("dl", "pm", "reml")


class PoolingInputError(UnbinError, ValueError):
    """Estimates or (co)variances handed to the pooling functions cannot be pooled."""


# --------------------------------------------------------------------------- results


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


@dataclass(frozen=True)
class MultivariatePooled:
    """Multivariate pooled coefficient vector (arrays are read-only).

    ``fe_mean``/``fe_cov``: fixed effect, (sum S_i^-1)^-1 sum S_i^-1 y_i and (sum S_i^-1)^-1.
    ``re_mean``/``re_cov``: the same with S_i + ``psi``.
    ``psi``: between-cohort covariance, the method-of-moments solution made positive
    semi-definite by setting its negative eigenvalues to zero; ``psi_unconstrained`` is the
    symmetrised solution before that step (an unbiased estimator of Psi) and
    ``n_truncated`` the number of eigenvalues that were set to zero.
    ``q``: multivariate Q = sum_i (y_i - fe_mean)' S_i^-1 (y_i - fe_mean) on
    ``q_df = p (k - 1)`` degrees of freedom; ``i2`` = max(0, (Q - df)/Q).
    """

    k: int
    p: int
    fe_mean: np.ndarray
    fe_cov: np.ndarray
    re_mean: np.ndarray
    re_cov: np.ndarray
    psi: np.ndarray
    psi_unconstrained: np.ndarray
    n_truncated: int
    q: float
    q_df: int
    q_pvalue: float
    i2: float

    @property
    def fe_se(self) -> np.ndarray:
        return np.sqrt(np.diag(self.fe_cov))

    @property
    def re_se(self) -> np.ndarray:
        return np.sqrt(np.diag(self.re_cov))


# --------------------------------------------------------------------------- helpers


def _z_crit(level: float) -> float:
    if not 0.0 < level < 1.0:
        raise PoolingInputError(f"confidence level {level!r} must lie strictly between 0 and 1")
    return float(stats.norm.ppf(0.5 + level / 2.0))


def _frozen(a: np.ndarray) -> np.ndarray:
    a = np.array(a, copy=True)
    a.setflags(write=False)
    return a


def _as_float(name: str, value: object, ndim: int) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError) as exc:
        raise PoolingInputError(f"{name} must be numeric: {exc}") from None
    if arr.ndim != ndim:
        raise PoolingInputError(
            f"{name} must be a {ndim}-dimensional array, got shape {arr.shape}"
        )
    return arr


def _bad_variance_message(name: str, value: float, where: str) -> str:
    what = "not a number" if np.isnan(value) else "infinite" if np.isinf(value) else "not positive"
    return (
        f"{name} {where} is {value!r} ({what}); variances must be positive and finite "
        "— pass squared standard errors, and leave out cohorts whose estimate is unavailable"
    )


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


def _dl_columns(y: np.ndarray, v: np.ndarray, present: np.ndarray,
                tau2_method: str = "dl") -> dict[str, np.ndarray]:
    """Fixed and random effects on every column of (k, g) arrays, using only ``present``
    cells (the name is historical: tau² is DerSimonian–Laird unless ``tau2_method`` says
    ``"pm"`` or ``"reml"``). Cells that are not present may hold anything (weight zero).
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


# --------------------------------------------------------------------------- univariate


def pool_univariate(y: object, v: object, tau2_method: str = "dl") -> PooledEstimate:
    """Fixed-effect and random-effects pooling of one effect.

    ``y``: the k cohort estimates; ``v``: their variances (squared standard errors).
    Formulas (DerSimonian & Laird 1986): w_i = 1/v_i, Q = sum w_i (y_i - y_FE)^2,
    C = sum w - sum w^2 / sum w, tau^2 = max(0, (Q - (k-1))/C), I^2 = max(0, (Q-(k-1))/Q).
    ``tau2_method`` ``"pm"`` (Paule–Mandel) or ``"reml"`` replace that tau²; Q and I² stay
    the fixed-effect ones.
    """
    ya = _as_float("estimates y", y, 1)
    va = _as_float("variances v", v, 1)
    if ya.shape != va.shape:
        raise PoolingInputError(
            f"estimates y ({ya.size} values) and variances v ({va.size} values) "
            "must have the same length"
        )
    if ya.size == 0:
        raise PoolingInputError("nothing to pool: y and v are empty")
    for i in range(ya.size):
        if not np.isfinite(ya[i]):
            raise PoolingInputError(f"estimate y of cohort {i} is {ya[i]!r}; it must be finite")
        if not (np.isfinite(va[i]) and va[i] > 0):
            raise PoolingInputError(_bad_variance_message("variance v", va[i], f"of cohort {i}"))
    res = _dl_columns(ya[:, None], va[:, None], np.ones((ya.size, 1), dtype=bool), tau2_method)
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


# --------------------------------------------------------------------------- pointwise


def pool_pointwise(Y: object, V: object, level: float = 0.95,
                   tau2_method: str = "dl") -> PointwisePooled:
    """Pool cohort curves point by point over a common grid.

    ``Y`` and ``V`` have shape (k cohorts, g grid points): estimates (e.g. f_j(x) - f_j(x_ref))
    and their variances. A NaN estimate marks the cohort as missing at that point (its
    variance is then ignored); every present estimate needs a positive, finite variance.
    At the reference value itself, where every variance is typically zero, leave the
    point off the grid (or mark it missing): the contrast there is 0 by construction.
    """
    ya = _as_float("estimates Y", Y, 2)
    va = _as_float("variances V", V, 2)
    if ya.shape != va.shape:
        raise PoolingInputError(
            f"estimates Y {ya.shape} and variances V {va.shape} must have the same shape "
            "(cohorts x grid points)"
        )
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
    res = _dl_columns(ya, va, present, tau2_method)
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


# --------------------------------------------------------------------------- multivariate


def _check_covariances(S: np.ndarray) -> np.ndarray:
    """Validate (k, p, p) covariance matrices; return them exactly symmetrised."""
    for i in range(S.shape[0]):
        s = S[i]
        if not np.isfinite(s).all():
            raise PoolingInputError(
                f"within-cohort covariance S of cohort {i} has non-finite entries"
            )
        scale = float(np.max(np.abs(s))) if s.size else 0.0
        asym = float(np.max(np.abs(s - s.T))) if s.size else 0.0
        if asym > 1e-8 * max(scale, np.finfo(float).tiny):
            raise PoolingInputError(
                f"within-cohort covariance S of cohort {i} is not symmetric "
                f"(largest |S - S'| = {asym:.3g})"
            )
    sym = 0.5 * (S + np.swapaxes(S, 1, 2))
    eig = np.linalg.eigvalsh(sym)
    for i in range(S.shape[0]):
        top = max(float(eig[i, -1]), 0.0)
        if not eig[i, 0] > 1e-12 * top:
            raise PoolingInputError(
                f"within-cohort covariance S of cohort {i} is not positive definite "
                f"(smallest eigenvalue {eig[i, 0]:.3g}, largest {eig[i, -1]:.3g}); "
                "drop coefficients that were not estimable in that cohort"
            )
    return sym


def _inv_spd(M: np.ndarray) -> np.ndarray:
    """Inverse of symmetric positive definite matrices (..., p, p), returned symmetric."""
    eye = np.broadcast_to(np.eye(M.shape[-1]), M.shape)
    inv = np.linalg.solve(M, eye)
    return 0.5 * (inv + np.swapaxes(inv, -1, -2))


def _gls_mean(Y: np.ndarray, W: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(sum W_i)^-1 sum W_i y_i and (sum W_i)^-1."""
    A = W.sum(axis=0)
    cov = _inv_spd(A)
    mean = cov @ np.einsum("ipq,iq->p", W, Y)
    return mean, cov


def pool_multivariate(Y: object, S: object) -> MultivariatePooled:
    """Multivariate random-effects meta-analysis by the method of moments.

    ``Y``: (k, p) coefficient vectors, one row per cohort; ``S``: (k, p, p) within-cohort
    covariance matrices (symmetric positive definite). Every cohort must report all p
    coefficients (same basis, same knots).

    Method (Jackson, White & Thompson 2010, Stat Med 29:1282). With W_i = S_i^-1,
    A = sum W_i and the fixed-effect mean y_FE = A^-1 sum W_i y_i, the p x p matrix
    Q_M = sum_i W_i (y_i - y_FE)(y_i - y_FE)' has expectation (k - 1) I + B Psi under the
    random-effects model y_i ~ N(mu, S_i + Psi), where B = A - sum_i W_i A^-1 W_i. Equating
    Q_M to its expectation gives Psi_U = B^-1 (Q_M - (k - 1) I); it need not be symmetric,
    so (Psi_U + Psi_U')/2 is used (still unbiased for Psi), and it is made positive
    semi-definite by setting its negative eigenvalues to zero (spectral truncation, as in the
    paper). For p = 1 this is exactly DerSimonian–Laird. The pooled mean is then the GLS
    estimate with weights (S_i + Psi)^-1. Q = trace(Q_M) is the multivariate Cochran
    statistic, chi-squared on p (k - 1) degrees of freedom under homogeneity.
    """
    ya = _as_float("coefficients Y", Y, 2)
    sa = _as_float("covariances S", S, 3)
    k, p = ya.shape
    if k == 0 or p == 0:
        raise PoolingInputError(f"nothing to pool: Y has shape {ya.shape}")
    if sa.shape != (k, p, p):
        raise PoolingInputError(
            f"covariances S must have shape (k, p, p) = {(k, p, p)} to match Y {ya.shape}, "
            f"got {sa.shape}"
        )
    if not np.isfinite(ya).all():
        i = int(np.argwhere(~np.isfinite(ya))[0, 0])
        raise PoolingInputError(
            f"coefficients Y of cohort {i} are not all finite; the multivariate method needs "
            "every coefficient in every cohort"
        )
    sa = _check_covariances(sa)

    W = _inv_spd(sa)
    fe_mean, fe_cov = _gls_mean(ya, W)
    resid = ya - fe_mean
    q_mat = np.einsum("ipq,iq,ir->pr", W, resid, resid)
    df = p * (k - 1)

    if k >= 2:
        q = float(np.trace(q_mat))
        A = W.sum(axis=0)
        B = A - np.einsum("ipq,qr,irs->ps", W, fe_cov, W)
        psi_u = np.linalg.solve(B, q_mat - (k - 1) * np.eye(p))
        psi_u = 0.5 * (psi_u + psi_u.T)
        evals, evecs = np.linalg.eigh(psi_u)
        n_trunc = int((evals < 0).sum())
        psi = (evecs * np.maximum(evals, 0.0)) @ evecs.T
        psi = 0.5 * (psi + psi.T)
        q_pvalue = float(stats.chi2.sf(q, df))
        i2 = max(0.0, (q - df) / q) if q > 0 else 0.0
    else:  # one cohort: its residual is zero by definition
        q = 0.0
        psi_u = np.zeros((p, p))
        psi = np.zeros((p, p))
        n_trunc = 0
        q_pvalue = float("nan")
        i2 = float("nan")

    re_mean, re_cov = _gls_mean(ya, _inv_spd(sa + psi))
    return MultivariatePooled(
        k=k,
        p=p,
        fe_mean=_frozen(fe_mean),
        fe_cov=_frozen(fe_cov),
        re_mean=_frozen(re_mean),
        re_cov=_frozen(re_cov),
        psi=_frozen(psi),
        psi_unconstrained=_frozen(psi_u),
        n_truncated=n_trunc,
        q=q,
        q_df=df,
        q_pvalue=q_pvalue,
        i2=float(i2),
    )


# --------------------------------------------------------------------------- curves


def pooled_curve(
    beta: object, cov: object, basis_grid: object, basis_ref: object
) -> tuple[np.ndarray, np.ndarray]:
    """The curve f(x) - f(x_ref) on a grid, with delta-method standard errors.

    ``beta`` (p,) and ``cov`` (p, p): pooled coefficients and their covariance.
    ``basis_grid`` (g, p): the basis evaluated at the grid; ``basis_ref`` (p,): at x_ref.
    With d(x) = B(x) - B(x_ref): estimate d(x)' beta, variance d(x)' V d(x). Returns
    (estimate, se), each of shape (g,).
    """
    b = _as_float("coefficients beta", beta, 1)
    p = b.size
    V = _as_float("covariance cov", cov, 2)
    G = _as_float("basis_grid", basis_grid, 2)
    r = np.asarray(basis_ref, dtype=float).reshape(-1)
    if V.shape != (p, p):
        raise PoolingInputError(f"covariance cov must be {p} x {p} to match beta, got {V.shape}")
    if G.shape[1] != p:
        raise PoolingInputError(
            f"basis_grid must have {p} columns (one per coefficient), got shape {G.shape}"
        )
    if r.size != p:
        raise PoolingInputError(f"basis_ref must hold {p} values, got {r.size}")
    for name, arr in (("beta", b), ("cov", V), ("basis_grid", G), ("basis_ref", r)):
        if not np.isfinite(arr).all():
            raise PoolingInputError(f"{name} has non-finite entries")
    scale = float(np.max(np.abs(V))) if V.size else 0.0
    if np.max(np.abs(V - V.T), initial=0.0) > 1e-8 * max(scale, np.finfo(float).tiny):
        raise PoolingInputError("covariance cov is not symmetric")

    D = G - r
    est = D @ b
    var = np.einsum("gp,pq,gq->g", D, V, D)
    # Rounding can leave tiny negatives where the true variance is ~0 (at x_ref itself);
    # anything beyond rounding means cov is not positive semi-definite.
    tol = 1e-10 * np.einsum("gp,pq,gq->g", np.abs(D), np.abs(V), np.abs(D))
    if (var < -tol).any():
        j = int(np.argmax(var < -tol))
        raise PoolingInputError(
            f"negative variance {var[j]:.3g} at grid point {j}: cov is not positive "
            "semi-definite"
        )
    return est, np.sqrt(np.maximum(var, 0.0))
