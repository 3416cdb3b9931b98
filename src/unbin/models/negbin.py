"""Negative binomial (NB2) regression by maximum likelihood: log link, a log person-time offset,
Var(y) = mu + alpha mu^2 (Cameron & Trivedi 2013, ch. 3).

Per row, with theta = 1 / alpha,

    l_i = lgamma(y + theta) - lgamma(theta) - lgamma(y + 1) - theta log(1 + alpha mu)
          + y (log(alpha mu) - log(1 + alpha mu)).

Newton's method runs on (beta, log alpha) jointly, from the Poisson estimate and the moment
estimate of alpha, with step halving; the derivatives are analytic. The covariance is the
inverse of the joint observed information; its beta block is the result's ``cov`` (the same
block whichever scale alpha is taken on, at the maximum), and alpha with its standard error is
in ``extra`` (``nb_alpha``, ``nb_alpha_se``). ``n_params`` counts alpha. When alpha runs to 0
(no overdispersion) the Poisson fit is returned with alpha = 0, still counted in ``n_params``.
Weights multiply each row's log-likelihood (frequency weights; sampling weights add the
sandwich, unbin.models.robust).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
from scipy import special

from ._glm import INTERCEPT, MAX_ITER, back_transform, run_glm, standardise
from .base import FitResult, Outcome, failed_fit

_ALPHA_FLOOR = np.exp(-15.0)


def _derivatives(eta: np.ndarray, y: np.ndarray, alpha: float
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray,
                            np.ndarray]:
    """Per row: l, dl/deta, dl/dalpha, d2l/deta2, d2l/deta dalpha, d2l/dalpha2."""
    mu = np.exp(eta)
    th = 1.0 / alpha
    am = alpha * mu
    lam = np.log1p(am)
    ll = (special.gammaln(y + th) - special.gammaln(th) - special.gammaln(y + 1.0) - th * lam
          + y * (np.log(alpha) + eta - lam))
    g_eta = (y - mu) / (1.0 + am)
    h_eta = -mu * (1.0 + alpha * y) / (1.0 + am) ** 2
    h_eta_a = -mu * (y - mu) / (1.0 + am) ** 2
    d_th = special.digamma(y + th) - special.digamma(th) - lam + (mu - y) / (th + mu)
    d2_th = (special.polygamma(1, y + th) - special.polygamma(1, th) + 1.0 / th
             - 1.0 / (th + mu) - (mu - y) / (th + mu) ** 2)
    g_a = -th * th * d_th
    h_a = th ** 4 * d2_th + 2.0 * th ** 3 * d_th
    return ll, g_eta, g_a, h_eta, h_eta_a, h_a


def _pieces(Z: np.ndarray, eta: np.ndarray, y: np.ndarray, alpha: float, f: np.ndarray
            ) -> tuple[float, np.ndarray, np.ndarray]:
    """Weighted log-likelihood, score and Hessian in (coefficients of Z, log alpha)."""
    ll, g_eta, g_a, h_eta, h_eta_a, h_a = _derivatives(eta, y, alpha)
    k = Z.shape[1]
    score = np.empty(k + 1)
    score[:k] = Z.T @ (f * g_eta)
    ga = float(f @ g_a)
    score[k] = alpha * ga
    H = np.empty((k + 1, k + 1))
    H[:k, :k] = (Z * (f * h_eta)[:, None]).T @ Z
    H[:k, k] = H[k, :k] = alpha * (Z.T @ (f * h_eta_a))
    H[k, k] = alpha * alpha * float(f @ h_a) + alpha * ga
    return float(f @ ll), score, H


def fit_negbin(X: np.ndarray, outcome: Outcome, names: tuple[str, ...]) -> FitResult:
    y = np.asarray(outcome.y, dtype=float)
    events = int(y.sum())
    pois = run_glm("count", X, names, replace(outcome, dispersion="poisson", cache={}), events)
    if not pois.ok:
        return pois
    all_names = (INTERCEPT, *names)
    n = outcome.n
    f = np.ones(n) if outcome.weights is None else np.asarray(outcome.weights, dtype=float)
    off = np.zeros(n) if outcome.offset is None else np.asarray(outcome.offset, dtype=float)
    Z, mean, sd = standardise(X)
    # start: the Poisson fit mapped to the standardised scale, alpha by moments
    A_inv = np.zeros((Z.shape[1], Z.shape[1]))
    A_inv[0, 0] = 1.0
    A_inv[0, 1:] = mean
    A_inv[1:, 1:] = np.diag(sd)
    theta = A_inv @ pois.coef
    mu = np.exp(Z @ theta + off)
    alpha0 = float(f @ (((y - mu) ** 2 - y) / mu ** 2) / f.sum()) if y.size else 0.0
    params = np.append(theta, np.log(max(alpha0, 0.05)))
    k = Z.shape[1]

    def evaluate(par: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        return _pieces(Z, Z @ par[:k] + off, y, float(np.exp(par[k])), f)

    ll, score, H = evaluate(params)
    it = 0
    for _ in range(MAX_ITER):
        it += 1
        try:
            step = np.linalg.solve(-H, score)
        except np.linalg.LinAlgError:
            step = np.full(k + 1, np.nan)
        if not np.all(np.isfinite(step)) or float(score @ step) <= 0:
            step = score / max(float(np.abs(np.diag(H)).max()), 1.0)  # ascent fallback
        new = params + step
        ll_new, s_new, H_new = evaluate(new)
        halvings = 0
        while not (np.isfinite(ll_new) and ll_new >= ll - 1e-10) and halvings < 30:
            step /= 2.0
            new = params + step
            ll_new, s_new, H_new = evaluate(new)
            halvings += 1
        if halvings == 30:
            break
        params, ll_prev, ll, score, H = new, ll, ll_new, s_new, H_new
        if float(np.max(np.abs(step))) < 1e-10 or abs(ll - ll_prev) <= 1e-13 * abs(ll):
            break
        if params[k] < np.log(_ALPHA_FLOOR):
            break
    if params[k] < np.log(_ALPHA_FLOOR) + 1.0:
        # no overdispersion: NB2 degenerates to the Poisson model (alpha -> 0)
        # alpha was estimated (at its boundary): counted, so AIC compares across forms
        return replace(pois, n_params=pois.n_params + 1, warnings=(*pois.warnings, (
            "the negative binomial dispersion alpha tends to 0 (no overdispersion): the "
            "Poisson fit is reported.")), extra={**pois.extra, "nb_alpha": 0.0,
                                                 "nb_alpha_se": float("nan"),
                                                 "nb_degenerate": True})
    try:
        cov_s = np.linalg.inv(-H)
    except np.linalg.LinAlgError:
        return failed_fit("count", all_names, n, events, "the negative binomial information "
                          "matrix is singular; check the design.")
    if not (np.all(np.isfinite(cov_s)) and np.all(np.diag(cov_s) > 0) and np.isfinite(ll)):
        return failed_fit("count", all_names, n, events, "the negative binomial fit did not "
                          "converge; check for sparse groups or extreme values.")
    coef, cov = back_transform(params[:k], cov_s[:k, :k], mean, sd)
    alpha = float(np.exp(params[k]))
    return FitResult(
        family="count", names=all_names, coef=coef, cov=cov, loglik=ll, n=n, events=events,
        n_params=k + 1, converged=True, iterations=it, linear_predictor=X @ coef[1:],
        warnings=pois.warnings,
        extra={"intercept": float(coef[0]), "nb_alpha": alpha,
               "nb_alpha_se": float(alpha * np.sqrt(cov_s[k, k]))},
    )


def nb_scores_information(res: FitResult, X: np.ndarray, outcome: Outcome
                          ) -> tuple[np.ndarray, np.ndarray]:
    """Per-row weighted scores of (intercept, coefficients, alpha) and the joint observed
    information at a negative binomial fit (for the sandwich, unbin.models.robust)."""
    assert res.linear_predictor is not None
    n = outcome.n
    y = np.asarray(outcome.y, dtype=float)
    f = np.ones(n) if outcome.weights is None else np.asarray(outcome.weights, dtype=float)
    eta = res.linear_predictor + float(res.extra["intercept"])
    if outcome.offset is not None:
        eta = eta + outcome.offset
    alpha = float(res.extra["nb_alpha"])
    Z = np.column_stack([np.ones(n), np.asarray(X, dtype=float).reshape(n, -1)])
    _, g_eta, g_a, h_eta, h_eta_a, h_a = _derivatives(eta, y, alpha)
    scores = np.column_stack([Z * (f * g_eta)[:, None], f * g_a])
    k = Z.shape[1]
    H = np.empty((k + 1, k + 1))
    H[:k, :k] = (Z * (f * h_eta)[:, None]).T @ Z
    H[:k, k] = H[k, :k] = Z.T @ (f * h_eta_a)
    H[k, k] = float(f @ h_a)
    return scores, -H
