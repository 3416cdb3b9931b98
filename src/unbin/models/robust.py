"""Robust (sandwich) and cluster-robust variances, computed from a fitted result.

Every model here is fitted by maximising a (weighted) log-likelihood, sum_i w_i l_i(theta). Its
model-based covariance is the inverse information H^-1 (the "bread"). When the rows are a
weighted sample of a population (sampling weights: survey, inverse-probability or case-control
sampling weights) or are not independent (several rows of one centre, family or person), that
covariance is wrong; the sandwich

    V = H^-1 M H^-1,   M = sum_g s_g s_g',   s_g = sum_{i in cluster g} w_i U_i

is not (Huber 1967; White 1980; Lin & Wei 1989 for the Cox model), where ``U_i`` is row i's
contribution to the score. Without a cluster every row is its own cluster (HC0). With G
clusters M is multiplied by G / (G - 1), the usual small-sample factor (Cameron & Miller 2015);
with few clusters (under about 30) the intervals can still be too narrow.

The score contributions
-----------------------
* Linear, logistic, Poisson (canonical links): U_i = z_i (y_i - mu_i), z_i = (1, x_i); the bread
  is (sum_i w_i v(mu_i) z_i z_i')^-1 (v: 1, mu (1 - mu), mu). For the linear model the residual
  variance cancels between bread and meat.
* Negative binomial (NB2): the joint score of (beta, alpha) and the joint observed information
  (``unbin.models.negbin``); the sandwich is formed jointly and its beta block kept.
* Cox: the score residuals (Therneau & Grambsch 2000, sec. 4.6),
  U_i = delta_i (x_i - xbar(t_i)) - sum over event times t at which i is at risk of
  exp(eta_i) (x_i - xbar(t)) dLambda0(t), with Breslow or Efron ties, strata and delayed entry
  (at risk at t when entry < t <= time). With Efron ties each tied event time is split into d
  steps l = 0..d-1 with risk-set sums S - (l/d) T (T: the tied events' sums), each carrying
  the tied events' mean weight; a tied event is at risk at step l with the fraction 1 - l/d.
  These U_i are exactly the derivatives of the weighted total score with respect to row i's
  weight, so sum_i w_i U_i is the score (zero at the estimate). The bread is the engine's
  inverse observed information.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
from scipy import special

from ._glm import back_transform, gram, standardise
from .base import FitResult, Outcome


def needs_robust(outcome: Outcome) -> bool:
    """Sampling weights or a cluster: the model-based variance does not hold."""
    return outcome.weight_kind == "sampling" or outcome.cluster is not None


def meat(scores: np.ndarray, cluster: np.ndarray | None) -> tuple[np.ndarray, int]:
    """``sum_g s_g s_g'`` over clusters (rows when ``cluster`` is None), with the G / (G - 1)
    factor when clustered; also returns G (0 without a cluster)."""
    if cluster is None:
        return scores.T @ scores, 0
    codes, inverse = np.unique(cluster, return_inverse=True)
    G = len(codes)
    sums = np.zeros((G, scores.shape[1]))
    np.add.at(sums, inverse, scores)
    M = sums.T @ sums
    return (M * (G / (G - 1.0)) if G > 1 else M), G


def sandwich(bread: np.ndarray, scores: np.ndarray,
             cluster: np.ndarray | None = None) -> tuple[np.ndarray, int]:
    """``bread M bread`` (symmetrised), and the number of clusters (0 without)."""
    M, G = meat(scores, cluster)
    V = bread @ M @ bread
    return (V + V.T) / 2.0, G


def glm_scores(res: FitResult, X: np.ndarray, outcome: Outcome
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Weighted score contributions ``w_i z_i (y_i - mu_i)`` on the standardised design, the
    standardised bread, and the column means and scales that map them back
    (``unbin.models._glm.back_transform``). ``res`` is a linear, logistic or Poisson fit of
    ``X`` (without the intercept column) on ``outcome``."""
    assert res.linear_predictor is not None
    eta = res.linear_predictor + float(res.extra["intercept"])
    if outcome.offset is not None:
        eta = eta + outcome.offset
    y = np.asarray(outcome.y, dtype=float)
    if res.family == "binary":
        mu = special.expit(eta)
        v = mu * (1.0 - mu)
    elif res.family == "count":
        mu = np.exp(eta)
        v = mu
    else:
        mu, v = eta, np.ones_like(eta)
    w = np.ones_like(y) if outcome.weights is None else np.asarray(outcome.weights, float)
    Z, mean, sd = standardise(np.asarray(X, dtype=float).reshape(outcome.n, -1))
    bread = np.linalg.inv(gram(Z, w * v))
    return Z * (w * (y - mu))[:, None], bread, mean, sd


def _risk_sum(v: np.ndarray, lo: np.ndarray, hi: np.ndarray, K: int) -> np.ndarray:
    """Sums of ``v`` over the rows at risk at each of the K event times (a difference array over
    each row's range [lo, hi) of event-time indices)."""
    return np.cumsum(np.bincount(lo, v, K + 1) - np.bincount(hi, v, K + 1))[:K]


def _columns(kk: np.ndarray, v: np.ndarray, K: int) -> np.ndarray:
    """Per event time, the sums of each column of ``v`` over the steps or rows ``kk`` maps to it."""
    p = v.shape[1]
    return np.column_stack([np.bincount(kk, v[:, j], K) for j in range(p)]) if p \
        else np.zeros((K, 0))


def _efron_increments(S0: np.ndarray, S1: np.ndarray, r: np.ndarray, x: np.ndarray,
                      ev: np.ndarray, k_ev: np.ndarray, d: np.ndarray, wsum: np.ndarray
                      ) -> tuple[np.ndarray, ...]:
    """Efron ties: per event time the hazard increments ``A`` and ``B`` (= sum of h * xbar),
    the tied events' own shares ``A_ev``, ``B_ev`` and the mean ``xbar`` over the steps."""
    K = S0.size
    T0 = np.bincount(k_ev, r[ev], K)
    T1 = _columns(k_ev, (r[:, None] * x)[ev], K)
    # one step per tied event: (k, l) pairs, l = 0..d_k - 1
    kk = np.repeat(np.arange(K), d.astype(int))
    start = np.concatenate([[0], np.cumsum(d)[:-1]]).astype(int)
    ll = np.arange(kk.size) - start[kk]
    frac = ll / d[kk]
    S0l = S0[kk] - frac * T0[kk]
    xbar = (S1[kk] - frac[:, None] * T1[kk]) / S0l[:, None]
    h = (wsum / d)[kk] / S0l  # the step's hazard increment
    A = np.bincount(kk, h, K)
    B = _columns(kk, h[:, None] * xbar, K)
    own = 1.0 - frac  # a tied event's share of step l
    A_ev = np.bincount(kk, own * h, K)
    B_ev = _columns(kk, (own * h)[:, None] * xbar, K)
    xavg = _columns(kk, xbar, K) / d[:, None]
    return A, B, A_ev, B_ev, xavg


def _breslow_increments(S0: np.ndarray, S1: np.ndarray, wsum: np.ndarray
                        ) -> tuple[np.ndarray, ...]:
    """Breslow ties: the same increments as ``_efron_increments``, tied events fully at risk."""
    A = wsum / S0
    xavg = S1 / S0[:, None]
    B = A[:, None] * xavg
    return A, B, A, B, xavg


def _stratum_scores(x: np.ndarray, t: np.ndarray, ev: np.ndarray, wi: np.ndarray,
                    eta: np.ndarray, entry: np.ndarray | None, efron: bool) -> np.ndarray | None:
    """The weighted score residuals of one stratum's rows, or None when it has no events."""
    p = x.shape[1]
    et = np.unique(t[ev])
    K = et.size
    if K == 0:
        return None
    eta = eta - eta.max()
    e = np.exp(eta)
    r = wi * e
    hi = np.searchsorted(et, t, side="right")  # at risk at event times [lo, hi)
    lo = (np.searchsorted(et, entry, side="right") if entry is not None
          else np.zeros(t.size, dtype=int))
    S0 = _risk_sum(r, lo, hi, K)
    S1 = np.column_stack([_risk_sum(r * x[:, j], lo, hi, K) for j in range(p)]) if p \
        else np.zeros((K, 0))
    k_ev = hi[ev] - 1  # the event time index of each event row
    d = np.bincount(k_ev, minlength=K).astype(float)
    wsum = np.bincount(k_ev, wi[ev], K)
    A, B, A_ev, B_ev, xavg = (_efron_increments(S0, S1, r, x, ev, k_ev, d, wsum) if efron
                              else _breslow_increments(S0, S1, wsum))
    cumA = np.concatenate([[0.0], np.cumsum(A)])
    cumB = np.vstack([np.zeros((1, p)), np.cumsum(B, axis=0)])
    a_i = cumA[hi] - cumA[lo]
    b_i = cumB[hi] - cumB[lo]
    U = -e[:, None] * (x * a_i[:, None] - b_i)
    evi = np.flatnonzero(ev)
    k = k_ev
    U[evi] += x[evi] - xavg[k]
    # a tied event is at risk at its own time only with its Efron fractions
    U[evi] += e[evi, None] * (x[evi] * (A[k] - A_ev[k])[:, None] - (B[k] - B_ev[k]))
    return U * wi[:, None]


def cox_scores(X: np.ndarray, outcome: Outcome, beta: np.ndarray,
               ties: str = "efron") -> np.ndarray:
    """Weighted Cox score residuals ``w_i U_i`` (n x p), rows in the order given.

    Per stratum, vectorised over rows and event times: the risk-set sums at every event time
    come from a difference array over each row's range of event times (entry, time], and each
    row's share of the cumulative hazard terms from cumulative sums over event times. Rows of a
    stratum without events get 0."""
    X = np.asarray(X, dtype=float).reshape(outcome.n, -1)
    n, p = X.shape
    assert outcome.time is not None
    time = np.asarray(outcome.time, dtype=float)
    event = np.asarray(outcome.y, dtype=float) > 0
    entry = None if outcome.entry is None else np.asarray(outcome.entry, dtype=float)
    w = np.ones(n) if outcome.weights is None else np.asarray(outcome.weights, dtype=float)
    strata = np.zeros(n, dtype=int) if outcome.strata is None else np.asarray(outcome.strata)
    Xc = X - X.mean(axis=0)  # residuals are invariant to shifting a column
    eta_all = Xc @ np.asarray(beta, dtype=float) if p else np.zeros(n)
    out = np.zeros((n, p))
    for s in np.unique(strata):
        idx = np.flatnonzero(strata == s)
        U = _stratum_scores(Xc[idx], time[idx], event[idx], w[idx], eta_all[idx],
                            None if entry is None else entry[idx], ties == "efron")
        if U is not None:
            out[idx] = U
    return out


def variance_label(res: FitResult) -> str:
    """The covariance a result carries, for the tables' ``variance`` column: "model",
    "quasi-Poisson (scale s)", "robust" or "cluster-robust (G clusters)"; "" for a failed fit."""
    return str(res.extra.get("variance", "model")) if res.ok else ""


def describe(G: int) -> str:
    """The ``variance`` label of a robust covariance."""
    return f"cluster-robust ({G} clusters)" if G else "robust"


def robust_cov(res: FitResult, X: np.ndarray, outcome: Outcome) -> tuple[np.ndarray, int]:
    """The (cluster-)robust covariance of a fitted result in its own parameter order, and the
    number of clusters (0 without)."""
    X = np.asarray(X, dtype=float).reshape(outcome.n, -1)
    if res.family == "survival":
        scores = cox_scores(X, outcome, res.coef, ties=str(res.extra.get("ties", "efron")))
        return sandwich(res.cov, scores, outcome.cluster)
    if res.extra.get("matched"):  # conditional logistic: the Cox scores at one common time
        timed = replace(outcome, time=np.ones(outcome.n), cache={})
        scores = cox_scores(X, timed, res.coef, ties="breslow")
        return sandwich(res.cov, scores, outcome.cluster)
    if float(res.extra.get("nb_alpha", 0.0)) > 0:
        from .negbin import nb_scores_information

        scores, info = nb_scores_information(res, X, outcome)
        V, G = sandwich(np.linalg.inv(info), scores, outcome.cluster)
        k = len(res.names)
        return V[:k, :k], G
    scores, bread, mean, sd = glm_scores(res, X, outcome)
    V_s, G = sandwich(bread, scores, outcome.cluster)
    return back_transform(np.zeros(V_s.shape[0]), V_s, mean, sd)[1], G


def with_robust_variance(res: FitResult, X: np.ndarray, outcome: Outcome) -> FitResult:
    """The fit with its covariance replaced by the (cluster-)robust one; ``extra["variance"]``
    says which, ``extra["model_cov"]`` keeps the model-based one."""
    if not res.ok:
        return res
    V, G = robust_cov(res, X, outcome)
    if not np.all(np.isfinite(V)):
        return res
    return replace(res, cov=V, extra={**res.extra, "variance": describe(G),
                                      "model_cov": res.cov, "clusters": G})
