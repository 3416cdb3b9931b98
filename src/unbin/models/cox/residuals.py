"""Schoenfeld and scaled Schoenfeld residuals of a fitted Cox model, and the Grambsch-Therneau
test of proportional hazards per term (the joint test of a term's columns) and globally.

What it computes
----------------
The Schoenfeld residual of an event i at event time t_k is ``x_i - m_k``, where ``m_k`` is the
risk-set mean of x at t_k under the fitted coefficients: ``S1_k / S0_k`` with Breslow ties, and
with Efron ties the mean over the d_k tied events of ``(S1_k - (l/d_k) T1_k) / (S0_k - (l/d_k)
T0_k)``, l = 0 .. d_k - 1 (T: the sums over the tied events), so that the weighted sum of the
residuals is the score the engine maximises, zero at the estimate. Risk sets are the engine's
(``layout``): per stratum, from each row's entry on (delayed entry), with case weights.

The scaled residuals are ``D V r_i`` (+ beta, so that their smooth against time estimates
beta(t)), with V the inverse information and D the (weighted) number of events: the
approximation of Grambsch & Therneau (1994) that the per-event-time information is about its
average, I / D. Regressing them on a transform g of time estimates the slopes theta of
``beta(t) = beta + theta (g(t) - mean g)``; with ``U = sum_i w_i (g_i - gbar) r_i`` and
``S = sum_i w_i (g_i - gbar)^2``, ``theta = D V U / S`` with covariance ``D V / S``. The test of
a set J of columns (one term: its spline basis, legacy group indicators or FP powers) is the
Wald statistic ``theta_J' (D V_JJ / S)^-1 theta_J`` on |J| df; for one column it is the
per-column statistic ``D (V U)_j^2 / (V_jj S)``, and for all columns the global statistic
``D U' V U / S`` (Grambsch & Therneau 1994, Biometrika 81:515-526; lifelines
0.30's ``proportional_hazard_test`` computes the per-column one the same way and has no joint
or global test).

Time transforms (g at an event time t): ``km`` (default) 1 - the Kaplan-Meier estimate at t
(pooled over strata, weighted, risk sets from entry on; bounded, so that a few late events do
not dominate the test: our default); ``rank`` the mid-rank of t among the
events (tied events share it; lifelines numbers tied events consecutively instead, so the two
agree where no event times are tied); ``identity`` t; ``log`` log t.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import linalg

from ...distributions import stats
from .inputs import _check_finite, _design
from .layout import Layout, _given_layout, _prepare, _risk_sums, _scaled, _shifted_eta

TIME_TRANSFORMS = ("km", "rank", "identity", "log")
DEFAULT_TRANSFORM = "km"


@dataclass(frozen=True)
class Schoenfeld:
    """Schoenfeld residuals, one row per event (ordered by stratum, then time).

    ``resid`` (events x p) ``x_i - m_k``; ``time`` the event time; ``stratum`` the stratum code;
    ``weight`` the event's case weight (ones without weights); ``row`` the event's row in the
    X given.
    """

    resid: np.ndarray
    time: np.ndarray
    stratum: np.ndarray
    weight: np.ndarray
    row: np.ndarray

    @property
    def events(self) -> float:
        """The (weighted) number of events D."""
        return float(self.weight.sum())

    def scaled(self, coef: Any, cov: Any) -> np.ndarray:
        """Scaled Schoenfeld residuals ``D V r_i + beta`` (events x p)."""
        beta = np.asarray(coef, dtype=float)
        V = np.asarray(cov, dtype=float)
        return self.events * self.resid @ V + beta


@dataclass(frozen=True)
class PHTest:
    """One Grambsch-Therneau test: chi-square ``statistic`` on ``df`` degrees of freedom."""

    statistic: float
    df: int
    p: float


def schoenfeld(
    X: Any,
    coef: Any,
    time: Any = None,
    event: Any = None,
    *,
    entry: Any | None = None,
    strata: Any | None = None,
    weights: Any | None = None,
    ties: str = "efron",
    layout: Layout | None = None,
) -> Schoenfeld:
    """Schoenfeld residuals of the Cox model with coefficients ``coef`` (log hazard ratios per
    unit of X's columns, e.g. ``fit_cox(...).coef``). The sample arguments mean what they mean
    for ``fit_cox``; with ``layout`` (from ``prepare_layout`` on the same rows) they are not
    read. ``ties`` must be the fit's ("efron" or "breslow")."""
    if ties not in ("efron", "breslow"):
        raise ValueError(f"ties must be 'efron' or 'breslow', got {ties!r}")
    Xa = _design(X)
    _check_finite("X", Xa)
    L = _prepare(Xa.shape[0], time, event, entry, strata, weights) if layout is None else (
        _given_layout(layout, Xa.shape[0]))
    p = Xa.shape[1]
    beta = np.asarray(coef, dtype=float).reshape(-1)
    if beta.shape[0] != p:
        raise ValueError(f"coef has {beta.shape[0]} values but X has {p} columns")
    if not np.isfinite(beta).all():
        raise ValueError("coef has missing or infinite values; residuals need a fitted model")
    xs = np.take(Xa, L.order, axis=0)
    if xs.shape[0]:
        xs = xs - xs.mean(axis=0)  # the residuals do not change; the sums keep their digits
    X1 = np.empty((xs.shape[0], 1 + p))
    X1[:, 0] = 1.0
    X1[:, 1:] = xs
    eta = _shifted_eta(L, xs @ beta)
    r = np.exp(eta) * L.w
    sums = _risk_sums(L, _scaled(L, L.risk_op, r) @ X1)  # (1 + p, K)
    mean = sums[1:] / sums[0]  # (p, K)
    if ties == "efron" and L.ties:
        tied = _scaled(L, L.tie_op, r) @ X1  # (T, 1 + p)
        tk = L.tie_k[L.tie_grp]
        num = sums[1:, tk] - L.tie_f * tied[L.tie_grp, 1:].T
        den = sums[0, tk] - L.tie_f * tied[L.tie_grp, 0]
        per_event = num / den  # one mean per tied event (its l / d)
        d = np.bincount(L.tie_grp, minlength=L.tie_k.size)
        for j in range(p):
            mean[j, L.tie_k] = np.bincount(L.tie_grp, weights=per_event[j],
                                           minlength=L.tie_k.size) / d
    event_k = L.b_idx[L.ev] - 1
    resid = xs[L.ev] - mean[:, event_k].T
    stratum = L.k_stratum[event_k]
    return Schoenfeld(resid, L.k_time[event_k], stratum, L.w[L.ev].copy(), L.order[L.ev])


def time_transform(name: str, res: Schoenfeld, time: Any, event: Any, *,
                   entry: Any | None = None, weights: Any | None = None) -> np.ndarray:
    """g(t) at each event of ``res`` (see the module's notes for the transforms). ``time``,
    ``event``, ``entry`` and ``weights`` are the whole sample's (all rows, all strata: the
    Kaplan-Meier estimate of ``km`` is pooled over strata)."""
    t = res.time
    if name == "identity":
        return t.astype(float)
    if name == "log":
        if (t <= 0).any():
            raise ValueError("time transform 'log' needs positive event times; some are <= 0. "
                             "Use 'km' or 'rank'.")
        return np.log(t)
    if name == "rank":
        u, inv = np.unique(t, return_inverse=True)
        w_u = np.bincount(inv, weights=res.weight, minlength=u.size)
        before = np.cumsum(w_u) - w_u
        return (before + (w_u + 1.0) / 2.0)[inv]
    if name == "km":
        tt = np.asarray(time, dtype=float)
        ee = np.asarray(event, dtype=float) == 1
        ww = np.ones(tt.shape) if weights is None else np.asarray(weights, dtype=float)
        en = None if entry is None else np.asarray(entry, dtype=float)
        return 1.0 - _kaplan_meier(tt, ee, en, ww, t)
    raise ValueError(f"time transform must be one of {', '.join(TIME_TRANSFORMS)}, got {name!r}")


def _kaplan_meier(t: np.ndarray, e: np.ndarray, entry: np.ndarray | None, w: np.ndarray,
                  at: np.ndarray) -> np.ndarray:
    """The weighted Kaplan-Meier estimate of all rows (pooled over strata), with delayed entry
    (at risk at u when entry < u <= time), right-continuous, at the event times ``at``."""
    if not (t.shape == e.shape == w.shape) or (entry is not None and entry.shape != t.shape):
        raise ValueError("time, event, entry and weights must have one value per row of the "
                         "sample the residuals come from")
    u = np.unique(t[e])
    ts = np.argsort(t, kind="stable")
    t_sorted, w_by_t = t[ts], w[ts]
    cw = np.r_[0.0, np.cumsum(w_by_t)]
    out_before = cw[np.searchsorted(t_sorted, u, side="left")]  # left before u
    n_risk = cw[-1] - out_before
    if entry is not None:
        es = np.argsort(entry, kind="stable")
        cwe = np.r_[0.0, np.cumsum(w[es])]
        n_risk -= cwe[-1] - cwe[np.searchsorted(entry[es], u, side="left")]  # entry >= u
    d = np.bincount(np.searchsorted(u, t[e]), weights=w[e], minlength=u.size)
    surv = np.cumprod(1.0 - d / n_risk)
    return surv[np.searchsorted(u, at)]


def ph_tests(
    res: Schoenfeld,
    cov: Any,
    g: np.ndarray,
    groups: dict[str, list[int]] | None = None,
) -> tuple[dict[str, PHTest], PHTest]:
    """Grambsch-Therneau tests for the time transform ``g`` (one value per event of ``res``):
    the joint test of each group of columns (name -> column indices; default one group per
    column) and the global test of all columns. ``cov`` is the fit's covariance (inverse
    information)."""
    V = np.asarray(cov, dtype=float)
    p = res.resid.shape[1]
    if V.shape != (p, p) or not np.isfinite(V).all():
        raise ValueError("cov must be the fit's finite p x p covariance matrix")
    w = res.weight
    D = res.events
    gbar = float(w @ g) / D
    gc = np.asarray(g, dtype=float) - gbar
    S = float(w @ gc**2)
    if not S > 0:
        raise ValueError("the time transform takes a single value at every event: the events "
                         "all happen at one time, so proportional hazards cannot be tested")
    U = (w * gc) @ res.resid  # (p,)
    VU = V @ U
    if groups is None:
        groups = {str(j): [j] for j in range(p)}
    out = {}
    for name, cols in groups.items():
        idx = np.asarray(cols, dtype=int)
        out[name] = _wald(D * VU[idx] / S, D * V[np.ix_(idx, idx)] / S)
    return out, _wald(D * VU / S, D * V / S)


def _wald(theta: np.ndarray, cov: np.ndarray) -> PHTest:
    k = theta.size
    try:
        factor = linalg.cho_factor(cov, check_finite=False)
        stat = float(theta @ linalg.cho_solve(factor, theta, check_finite=False))
    except linalg.LinAlgError:  # a singular block (e.g. collinear columns): its generalised inverse
        stat = float(theta @ np.linalg.pinv(cov) @ theta)
    return PHTest(stat, k, float(stats.chi2.sf(max(stat, 0.0), k)) if k else float("nan"))
