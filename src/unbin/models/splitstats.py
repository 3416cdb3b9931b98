"""The split statistics behind the cut-point audit (``unbin.questions.cutpoints``), vectorised over
candidate cuts: the survival layout of the (stratified, delayed-entry) log-rank statistic, the
score statistic of a split adjusted for the analysis's adjustment variables with draws from its
asymptotic null (``AdjustedScore.simulate_max``), and the corrected p-values of a maximally
selected statistic (Altman et al. 1994; Miller & Siegmund 1982 / Lausen & Schumacher 1992).

Adjusted split statistic
------------------------
When the legacy analysis adjusted for other variables, the split that a search should find is
the one that adds most to the *adjusted* model. For every candidate cut c, with the indicator
D_c = 1{x in the low group}, the statistic is the score (Rao) chi-square of adding D_c to the
null model: the analysis's adjustment variables in their legacy coding (grouped variables as
their legacy groups, others as they are), plus the strata for Cox, fitted once. At that fit,

    U_c = D_c' (y - mu) / phi,  I_c = D_c' W D_c - D_c' W Z (Z' W Z)^-1 Z' W D_c,  T_c = U_c^2 / I_c,

for the linear, logistic and Poisson models (Z: intercept and adjustment columns; W the
canonical-link weights mu(1 - mu), mu, or 1/phi for the linear model with phi = RSS/n, the
maximum-likelihood variance, so that without adjusters T_c is n R^2 as in the unadjusted
search). I_c is the efficient information of D_c (Rao 1948; the score test of one added
covariate in the presence of nuisance parameters). For Cox models U_c and I_c are the partial
likelihood score and efficient information of D_c at (beta_Z, 0) with Breslow's handling of
tied times (the null model is fitted with Breslow ties too), within strata and with delayed
entry. With risk weights r_i = exp(Z_i beta_Z), at-risk sums S0(t_k), event counts d_k, the
Breslow increments h_k = d_k / S0(t_k), H_i = sum of h_k over i's time at risk, and
p_c(t_k) = the low group's share of S0(t_k):

    U_c = sum_{i in low} (delta_i - r_i H_i)          (martingale residuals),
    I_DD = sum_{i in low} r_i H_i - sum_k d_k p_c(t_k)^2,
    I_DZ = sum_{i in low} r_i H_i Z_i - sum_k d_k p_c(t_k) Zbar(t_k),
    I_ZZ = sum_i r_i H_i Z_i Z_i' - sum_k d_k Zbar(t_k) Zbar(t_k)',

so every candidate costs O(p) from prefix sums over the exposure order, plus one pass over
the event times for the p_c terms (in blocks of candidates, as the log-rank statistic).
Frequency weights (bootstrap replicates) multiply every row's contribution, and the null
model is refitted with them.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import linalg, special

from ..distributions import stats
from . import fit
from .base import Outcome

_CHUNK_CELLS = 4_000_000  # candidates x event times of one block (about 32 MB of float64)


def prefix_at(A: np.ndarray, k: np.ndarray) -> np.ndarray:
    """Sums of the first k[m] rows of A (along axis 0) for every m; k strictly increasing in
    1..len(A) - 1. Shape (len(k),) + A.shape[1:]."""
    if len(k) == 0:
        return np.zeros((0, *A.shape[1:]))
    seg = np.add.reduceat(A, np.r_[0, k], axis=0)[:-1]
    return np.cumsum(seg, axis=0)


@dataclass
class SurvivalLayout:
    """Event times of every stratum indexed k = 0..K-1 (by stratum, then time); per row the
    half-open range [a_i, b_i) of event indices at which it is at risk and, for events, the index
    e_i of its own event time. Rows are in exposure-sorted order."""

    a: np.ndarray
    b: np.ndarray
    e: np.ndarray  # event index for event rows, K (a dummy slot) otherwise
    strata: np.ndarray
    n_times: int

    @property
    def w_unit(self) -> np.ndarray:
        return np.ones(len(self.a))

    @classmethod
    def build(cls, outcome: Outcome, order: np.ndarray) -> SurvivalLayout:
        assert outcome.time is not None
        time = np.asarray(outcome.time, dtype=float)[order]
        event = np.asarray(outcome.y, dtype=float)[order] > 0
        entry = (np.asarray(outcome.entry, dtype=float)[order] if outcome.entry is not None
                 else np.full(len(time), -np.inf))
        strata = (np.asarray(outcome.strata)[order] if outcome.strata is not None
                  else np.zeros(len(time), dtype=np.int64))
        codes = np.unique(strata, return_inverse=True)[1].reshape(-1)
        n = len(time)
        a = np.empty(n, dtype=np.int64)
        b = np.empty(n, dtype=np.int64)
        e = np.empty(n, dtype=np.int64)
        offset = 0
        for s in range(int(codes.max()) + 1 if n else 0):
            rows = np.flatnonzero(codes == s)
            times = np.unique(time[rows][event[rows]])
            a[rows] = offset + np.searchsorted(times, entry[rows], side="right")
            b[rows] = offset + np.searchsorted(times, time[rows], side="right")
            e[rows] = offset + np.searchsorted(times, time[rows], side="left")
            offset += len(times)
        e = np.where(event, e, offset)
        return cls(a, b, e, codes, offset)

    def stratified_permutation(self, rng: np.random.Generator) -> np.ndarray:
        """Row order that shuffles the survival data within strata against the sorted exposure:
        position p receives the outcome of row perm[p], from the same stratum."""
        key = rng.random(len(self.a))
        by_stratum = np.argsort(self.strata, kind="stable")
        shuffled = np.lexsort((key, self.strata))
        perm = np.empty(len(self.a), dtype=np.int64)
        perm[by_stratum] = shuffled
        return perm

    def at_risk(self, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Weighted number at risk and number of events at every event time."""
        K = self.n_times
        n_k = np.cumsum(np.bincount(self.a, w, K + 1) - np.bincount(self.b, w, K + 1))[:K]
        return n_k, np.bincount(self.e, w, K + 1)[:K]

    def low_group(self, k: np.ndarray, w: np.ndarray, a: np.ndarray, b: np.ndarray,
                  e: np.ndarray) -> Iterator[tuple[int, int, np.ndarray, np.ndarray]]:
        """For blocks of candidates m0..m1-1 (low group = the first k[m] rows): the weighted
        number at risk (C x K) and of events (C x K) in the low group at every event time."""
        K = self.n_times
        M = len(k)
        chunk = max(1, _CHUNK_CELLS // (K + 1))
        base_r = np.zeros(K + 1)
        base_d = np.zeros(K + 1)
        start_row = 0
        for m0 in range(0, M, chunk):
            m1 = min(M, m0 + chunk)
            C = m1 - m0
            # rows entering the low group at candidates m0..m1-1: positions k[m-1]..k[m]-1
            stop_row = int(k[m1 - 1])
            rows = slice(start_row, stop_row)
            g = np.searchsorted(k[m0:m1], np.arange(start_row, stop_row), side="right")
            wr = w[rows]
            flat_a = g * (K + 1) + a[rows]
            flat_b = g * (K + 1) + b[rows]
            flat_e = g * (K + 1) + e[rows]
            D: np.ndarray = (np.bincount(flat_a, wr, C * (K + 1))
                             - np.bincount(flat_b, wr, C * (K + 1)))
            D = np.cumsum(D.reshape(C, K + 1), axis=0) + base_r
            Dd: np.ndarray = np.bincount(flat_e, wr, C * (K + 1)).reshape(C, K + 1)
            Dd = np.cumsum(Dd, axis=0) + base_d
            base_r, base_d = D[-1].copy(), Dd[-1].copy()
            yield m0, m1, np.cumsum(D, axis=1)[:, :K], Dd[:, :K]
            start_row = stop_row

    def logrank(self, k: np.ndarray, w: np.ndarray, perm: np.ndarray | None = None) -> np.ndarray:
        """Log-rank chi-square (low group vs the rest) for every candidate (low group = the first
        k[m] rows in exposure order), with frequency weights ``w`` (aligned with the exposure
        order). ``perm`` moves the survival data against the exposure."""
        a, b, e = (self.a, self.b, self.e) if perm is None else \
            (self.a[perm], self.b[perm], self.e[perm])
        K = self.n_times
        if K == 0 or len(k) == 0:
            return np.full(len(k), np.nan)
        n_k = np.cumsum(np.bincount(a, w, K + 1) - np.bincount(b, w, K + 1))[:K]
        d_k = np.bincount(e, w, K + 1)[:K]
        with np.errstate(divide="ignore", invalid="ignore"):
            hyper = np.where(n_k > 1, (n_k - d_k) / (n_k - 1), 0.0)
        U = np.empty(len(k))
        V = np.empty(len(k))
        for m0, m1, n1, d1 in self.low_group(k, w, a, b, e):
            with np.errstate(divide="ignore", invalid="ignore"):
                frac = np.where(n_k > 0, n1 / n_k, 0.0)
            U[m0:m1] = (d1 - d_k * frac).sum(axis=1)
            V[m0:m1] = (d_k * hyper * frac * (1.0 - frac)).sum(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(V > 1e-12, U * U / V, np.nan)


# --------------------------------------------------------------------------- corrected p-values

# Altman, Lausen, Sauerbrei & Schumacher 1994 (JNCI 86:829): P_cor = -a P (1 + b ln P), for
# cuts searched between the given quantiles, valid for about 1e-4 <= P <= 0.1.
ALTMAN_COEFFICIENTS: dict[tuple[float, float], tuple[float, float]] = {
    (0.10, 0.90): (1.63, 2.35),
    (0.05, 0.95): (3.13, 1.65),
}


ALTMAN_P_RANGE = (1e-4, 0.1)


def p_altman(p: float, lower: float = 0.1, upper: float = 0.9) -> float:
    """Altman et al. (1994) corrected p-value of a minimum-p cut search over [lower, upper].

    Published for the 10-90% and 5-95% ranges and for 0.0001 <= p <= 0.1: returns NaN for other
    ranges and p-values (:func:`altman_message` says why); the result is clipped to [p, 1]."""
    if altman_message(p, lower, upper):
        return float("nan")
    a, b = ALTMAN_COEFFICIENTS[(round(lower, 6), round(upper, 6))]
    return float(min(1.0, max(p, -a * p * (1.0 + b * np.log(p)))))


def altman_message(p: float, lower: float = 0.1, upper: float = 0.9) -> str:
    """Why :func:`p_altman` gives no value ("" when it does)."""
    if (round(lower, 6), round(upper, 6)) not in ALTMAN_COEFFICIENTS:
        return (f"search range {100 * lower:g}-{100 * upper:g}% is not one the Altman et al. "
                "1994 formula was published for (10-90%, 5-95%); use p_lausen")
    lo, hi = ALTMAN_P_RANGE
    if not np.isfinite(p):
        return "no naive p-value"
    if not lo <= p <= hi:
        return (f"naive p {p:.3g} is outside {lo:g}-{hi:g}, the range the Altman et al. 1994 "
                "formula was published for; use p_lausen")
    return ""


def p_lausen(p: float, lower: float = 0.1, upper: float = 0.9) -> float:
    """Miller & Siegmund (1982) / Lausen & Schumacher (1992) approximation of the p-value of the
    maximally selected chi-square over cuts with low-group share in [lower, upper]:

        P ~ phi(z) (z - 1/z) ln(upper (1 - lower) / (lower (1 - upper))) + 4 phi(z) / z,

    with z = Phi^-1(1 - p/2). For the symmetric range [eps, 1 - eps] the log term is
    ln((1 - eps)^2 / eps^2). Clipped to [p, 1]."""
    if not np.isfinite(p) or p <= 0:
        return float("nan") if not np.isfinite(p) else 0.0
    if p >= 1:
        return 1.0
    z = float(stats.norm.isf(p / 2.0))
    phi = float(stats.norm.pdf(z))
    span = np.log(upper * (1.0 - lower) / (lower * (1.0 - upper)))
    val = phi * (z - 1.0 / z) * span + 4.0 * phi / z
    return float(min(1.0, max(p, val)))



# --------------------------------------------------------------------------- adjusted score


class NullModelFailed(Exception):
    """The adjusted null model could not be fitted (message says why)."""


@dataclass
class AdjustedScore:
    """The score chi-square of adding a split indicator to the adjusted null model, for every
    candidate (see the module docstring). Arrays are in exposure-sorted order."""

    family: str
    Z: np.ndarray  # adjustment columns (no intercept)
    names: tuple[str, ...]
    y: np.ndarray
    offset: np.ndarray | None = None
    time: np.ndarray | None = None
    entry: np.ndarray | None = None
    strata: np.ndarray | None = None
    surv: SurvivalLayout | None = None
    _full: dict[str, Any] = field(default_factory=dict, repr=False)

    def profile(self, k: np.ndarray, w: np.ndarray | None = None) -> np.ndarray:
        """T_c at the candidates (low group = the first k[m] rows); NaN where I_c vanishes.
        Raises :class:`NullModelFailed` when the null model cannot be fitted."""
        if self.family == "survival":
            return self._cox(k, w)
        return self._glm(k, w)

    # -- linear, logistic, Poisson

    def _glm_null(self, w: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
        """Per-row score contributions (y - mu)/phi and weights v at the null fit."""
        if w is None and "glm" in self._full:
            return self._full["glm"]
        if w is None or "theta" not in self._full:
            out = Outcome(self.family, self.y, offset=self.offset, weights=w)
            res = fit(self.family, self.Z, out, self.names)
            if not res.ok:
                raise NullModelFailed(res.message)
            eta = res.extra["intercept"] + np.asarray(res.linear_predictor)
            if w is None:
                self._full["theta"] = np.r_[res.extra["intercept"], res.coef[1:]]
        else:
            eta = self._refit(w)
        if self.offset is not None:
            eta = eta + self.offset
        if self.family == "binary":
            mu = special.expit(eta)
            r, v = self.y - mu, mu * (1.0 - mu)
        elif self.family == "count":
            mu = np.exp(eta)
            r, v = self.y - mu, mu
        else:
            resid = self.y - eta
            fw = np.ones_like(resid) if w is None else w
            phi = float(fw @ (resid * resid) / fw.sum())
            if not phi > 0:
                raise NullModelFailed("the adjusted null model fits the outcome exactly")
            r, v = resid / phi, np.full(resid.size, 1.0 / phi)
        pieces = (r, v)
        if w is None:
            self._full["glm"] = pieces
        return pieces

    def _refit(self, w: np.ndarray, max_iter: int = 30) -> np.ndarray:
        """The null model's linear predictor (without offset) on frequency weights ``w``, by
        Newton's method from the full-sample estimate (canonical links: score Z' w (y - mu),
        information Z' diag(w v) Z)."""
        Z1 = np.column_stack([np.ones(len(self.y)), self.Z])
        theta = np.asarray(self._full["theta"], dtype=float).copy()
        off = 0.0 if self.offset is None else self.offset
        for _ in range(max_iter):
            eta = Z1 @ theta
            if self.family == "binary":
                mu = special.expit(eta)
                v = mu * (1.0 - mu)
            elif self.family == "count":
                mu = np.exp(eta + off)
                v = mu
            else:
                mu, v = eta, np.ones_like(eta)
            info = Z1.T @ ((w * v)[:, None] * Z1)
            try:
                step = linalg.solve(info, Z1.T @ (w * (self.y - mu)), assume_a="pos")
            except (linalg.LinAlgError, ValueError) as exc:
                raise NullModelFailed("the replicate's null model has a singular information "
                                      "matrix (an adjustment category not drawn?)") from exc
            theta += step
            if not np.all(np.isfinite(theta)):
                break
            if np.max(np.abs(step)) < 1e-10 * (1.0 + np.max(np.abs(theta))):
                eta = Z1 @ theta
                if self.family == "binary" and np.any(np.abs(eta[w > 0]) > 20):
                    raise NullModelFailed("perfect or quasi-complete separation in the "
                                          "replicate's null model")
                return eta
        raise NullModelFailed("the replicate's null model did not converge")

    def _glm(self, k: np.ndarray, w: np.ndarray | None) -> np.ndarray:
        r, v = self._glm_null(w)
        if w is not None:
            r, v = r * w, v * w
        Z1 = np.column_stack([np.ones(len(r)), self.Z])
        vZ = v[:, None] * Z1
        eff, B = _efficient(prefix_at(v, k), prefix_at(vZ, k), Z1.T @ vZ)
        return _chi2(prefix_at(r, k), eff)

    def simulate_max(self, k: np.ndarray, rng: np.random.Generator, draws: int) -> np.ndarray:
        """The maximum over the candidates of T*_c = U*_c^2 / I_c for ``draws`` draws from the
        asymptotic null distribution of the score process, given the design (exposure,
        adjusters, strata and at-risk sets held fixed). Linear, logistic and Poisson models:
        U* = D_c~' W^(1/2) g with g ~ N(0, I_n) and D_c~ the indicator's residual after
        weighted projection on the null model's columns, a Gaussian vector with exactly the
        efficient information as covariance. Cox: multipliers on the events' score
        contributions (Lin, Wei & Ying 1993), U*_c = sum_i g_i (D_ci - p_c(t_i)), projected
        on the adjusters' contributions, whose covariance given the data estimates the
        efficient information. NaN candidates are skipped."""
        if self.family == "survival":
            return self._cox_simulate(k, rng, draws)
        _, v = self._glm_null(None)
        n = len(v)
        Z1 = np.column_stack([np.ones(n), self.Z])
        vZ = v[:, None] * Z1
        eff, B = _efficient(prefix_at(v, k), prefix_at(vZ, k), Z1.T @ vZ)
        sv = np.sqrt(v)
        out = np.empty(draws)
        chunk = max(1, _CHUNK_CELLS // max(n, 1))
        for r0 in range(0, draws, chunk):
            size = min(chunk, draws - r0)
            G = rng.standard_normal((n, size)) * sv[:, None]
            U = prefix_at(G, k) - B @ (Z1.T @ G)
            out[r0:r0 + size] = _max_stat(U, eff)
        return out

    # -- Cox (Breslow)

    def _cox(self, k: np.ndarray, w: np.ndarray | None) -> np.ndarray:
        U, eff, _, _ = self._cox_parts(k, w)
        return _chi2(U, eff)

    def _cox_simulate(self, k: np.ndarray, rng: np.random.Generator, draws: int) -> np.ndarray:
        _, eff, B, pieces = self._cox_parts(k, None)
        v, s0, zbar = pieces
        L = self.surv
        assert L is not None
        ev_rows = np.flatnonzero(L.e < L.n_times)
        e_ev = L.e[ev_rows]
        az = self.Z[ev_rows] - zbar[e_ev]
        E = ev_rows.size
        out = np.empty(draws)
        chunk = max(1, _CHUNK_CELLS // max(E, 1))
        for r0 in range(0, draws, chunk):
            size = min(chunk, draws - r0)
            G = rng.standard_normal((E, size))
            U = np.empty((len(k), size))
            for m0, m1, n1, _ in L.low_group(k, v, L.a, L.b, L.e):
                with np.errstate(divide="ignore", invalid="ignore"):
                    frac = np.where(s0 > 0, n1 / s0, 0.0)
                low = (ev_rows[None, :] < k[m0:m1, None]).astype(float)
                U[m0:m1] = (low - frac[:, e_ev]) @ G
            U -= B @ (az.T @ G)
            out[r0:r0 + size] = _max_stat(U, eff)
        return out

    def _cox_parts(self, k: np.ndarray, w: np.ndarray | None) -> tuple[
            np.ndarray, np.ndarray, np.ndarray, tuple[np.ndarray, np.ndarray, np.ndarray]]:
        """U_c, the efficient information, I_DZ I_ZZ^-1 and (risk weights, at-risk sums,
        at-risk means of Z) of the Cox null model fitted with frequency weights ``w``."""
        from .cox import fit_cox

        assert self.surv is not None and self.time is not None
        L = self.surv
        if w is None and "beta" in self._full:
            beta = self._full["beta"]
        else:
            rows = slice(None) if w is None else w > 0
            sub = (lambda a: None if a is None else a[rows])  # noqa: E731
            fitted = fit_cox(self.Z[rows], self.time[rows], self.y[rows],
                             entry=sub(self.entry), strata=sub(self.strata), weights=sub(w),
                             ties="breslow", init=self._full.get("beta"))
            if not fitted.converged or not np.all(np.isfinite(fitted.coef)):
                raise NullModelFailed(fitted.message or "the Cox null model did not converge")
            beta = np.asarray(fitted.coef)
            if w is None:
                self._full["beta"] = beta
        fw = np.ones(len(self.y)) if w is None else w
        eta = self.Z @ beta
        v = fw * np.exp(eta - eta.max())  # a common factor cancels in every term
        K = L.n_times
        s0, _ = L.at_risk(v)
        d = np.bincount(L.e, fw, K + 1)[:K]  # events (frequency-weighted) at every time
        with np.errstate(divide="ignore", invalid="ignore"):
            haz = np.where(s0 > 0, d / s0, 0.0)
        cum = np.r_[0.0, np.cumsum(haz)]
        vH = v * (cum[L.b] - cum[L.a])
        p = self.Z.shape[1]
        s1 = np.column_stack([np.bincount(L.a, v * self.Z[:, j], K + 1)
                              - np.bincount(L.b, v * self.Z[:, j], K + 1) for j in range(p)])
        with np.errstate(divide="ignore", invalid="ignore"):
            zbar = np.where(s0[:, None] > 0, np.cumsum(s1, axis=0)[:K] / s0[:, None], 0.0)
        events = (L.e < K).astype(float) * fw
        U = prefix_at(events - vH, k)
        vHZ = vH[:, None] * self.Z
        i_zz = self.Z.T @ vHZ - (zbar * d[:, None]).T @ zbar
        i_dd = prefix_at(vH, k)
        i_dz = prefix_at(vHZ, k)
        dz = zbar * d[:, None]
        for m0, m1, n1, _ in L.low_group(k, v, L.a, L.b, L.e):
            with np.errstate(divide="ignore", invalid="ignore"):
                frac = np.where(s0 > 0, n1 / s0, 0.0)
            i_dd[m0:m1] -= (d * frac * frac).sum(axis=1)
            i_dz[m0:m1] -= frac @ dz
        eff, B = _efficient(i_dd, i_dz, i_zz)
        return U, eff, B, (v, s0, zbar)


def _efficient(i_dd: np.ndarray, i_dz: np.ndarray,
               i_zz: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The efficient information I_DD - I_DZ I_ZZ^-1 I_ZD per candidate (NaN where it is not
    positive, relative to I_DD) and B = I_DZ I_ZZ^-1 (candidates x columns)."""
    try:
        factor = linalg.cho_factor(i_zz)
    except linalg.LinAlgError as exc:
        raise NullModelFailed("the adjustment variables' information matrix is singular") \
            from exc
    B = linalg.cho_solve(factor, i_dz.T).T
    eff = i_dd - np.einsum("mj,mj->m", i_dz, B)
    return np.where(eff > 1e-10 * np.maximum(i_dd, 1e-300), eff, np.nan), B


def _chi2(U: np.ndarray, eff: np.ndarray) -> np.ndarray:
    """U^2 / I per candidate (NaN where I is)."""
    return np.asarray(U * U / eff, dtype=float)


def _max_stat(U: np.ndarray, eff: np.ndarray) -> np.ndarray:
    """Per column (draw), the maximum over candidates (rows) of U^2 / I, skipping NaN."""
    ok = np.isfinite(eff)
    if not ok.any():
        return np.full(U.shape[1], np.nan)
    return np.max(U[ok] ** 2 / eff[ok, None], axis=0)
