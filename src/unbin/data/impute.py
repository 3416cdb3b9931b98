"""Multiple imputation by chained equations (fully conditional specification) on the raw
analysis variables.

Each incomplete variable is imputed in turn from all the others and from the outcome
(van Buuren 2018, ch. 4): numeric columns by local residual draws (Morris, White & Royston
2014: the regression coefficients drawn from their approximate posterior, each missing value
its own predicted mean plus the residual of one of the ``donors`` observed rows whose predicted
means are closest, kept inside the observed range; predictive mean matching, which imputes the
donor's value itself, on request), and categorical ones (two or more levels) by a multinomial logistic model whose coefficients are
drawn from their approximate (normal) posterior. The outcome enters every imputation model as
the ``auxiliary`` columns the caller passes (White & Royston 2009: the event indicator and the
Nelson–Aalen cumulative hazard for survival; see :func:`outcome_auxiliaries`). Splines, legacy
groups and FP powers are built afterwards from the imputed raw values (impute, then transform).

Everything is drawn from the numpy Generator passed in: the same seed gives the same sets.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

# Donors per missing value. With 5, the rows crowded at one end share the same few donors in
# every set, a common part of their imputations that no set-to-set variation shows: the
# imputed-slope interval covered 93.1% in the README's check (1,000 replicates), 94.7% with 10.
DONORS = 10
NUMERIC = ("residual", "matching")  # how numeric columns are drawn (see _numeric)
RIDGE = 1e-4  # relative ridge on the imputation models' information (stability under separation)


@dataclass(frozen=True)
class Target:
    """One column to impute: ``numeric`` (local residual draws) or ``categorical``
    (multinomial logistic draws over its observed levels)."""

    column: str
    kind: str


def nelson_aalen(time: np.ndarray, event: np.ndarray, entry: np.ndarray | None = None
                 ) -> np.ndarray:
    """The Nelson–Aalen cumulative hazard at each row's own time (risk set at t: entry < t <=
    time), the survival outcome's summary in imputation models (White & Royston 2009)."""
    time = np.asarray(time, float)
    event = np.asarray(event, float) > 0
    start = np.zeros_like(time) if entry is None else np.asarray(entry, float)
    times = np.unique(time[event])
    if times.size == 0:
        return np.zeros_like(time)
    deaths = np.bincount(np.searchsorted(times, time[event]), minlength=times.size)
    # at risk at t_k: time >= t_k minus entry >= t_k
    at_risk = (time.size - np.searchsorted(np.sort(time), times, side="left")
               - (start.size - np.searchsorted(np.sort(start), times, side="left")))
    cum = np.cumsum(deaths / np.maximum(at_risk, 1))
    pos = np.searchsorted(times, time, side="right") - 1
    return np.where(pos >= 0, cum[np.clip(pos, 0, None)], 0.0)


def _design(frame: pd.DataFrame, columns: Sequence[Target], skip: str,
            auxiliary: np.ndarray) -> np.ndarray:
    """Intercept, every other target (numeric standardised; categorical as indicators of its
    levels but the first) and the auxiliary columns."""
    parts = [np.ones((len(frame), 1)), auxiliary]
    for t in columns:
        if t.column == skip:
            continue
        s = frame[t.column]
        if t.kind == "numeric":
            v = s.to_numpy(float)
            sd = v.std()
            parts.append(((v - v.mean()) / (sd if sd > 0 else 1.0))[:, None])
        else:
            cats = pd.Categorical(s)
            codes = cats.codes
            k = len(cats.categories)
            if k > 1:
                parts.append((codes[:, None] == np.arange(1, k)[None, :]).astype(float))
    return np.hstack(parts)


def _numeric(X: np.ndarray, y: np.ndarray, miss: np.ndarray, rng: np.random.Generator,
             donors: int, how: str) -> np.ndarray:
    """One numeric column's missing values, drawn near their predicted means.

    The normal linear model of the column on ``X`` is fitted to the observed rows; its
    coefficients are drawn from their posterior (flat prior) and predict the missing rows,
    while the observed rows are predicted with the estimates (type-1 matching; van Buuren 2018,
    sec. 3.4). Each missing row then takes one of its ``donors`` observed rows nearest in
    predicted mean, at random, and

    - ``"matching"`` (predictive mean matching; Morris, White & Royston 2014) imputes the
      donor's observed value;
    - ``"residual"`` (local residual draws; Morris, White & Royston 2014) imputes the row's
      own predicted mean plus the donor's residual (observed minus predicted), kept inside
      the observed range. Where the missing rows' predicted means lie beyond most observed
      ones (missingness tied to an extreme outcome), the nearest donors sit on the centre
      side and matching pulls the imputed values towards the centre; the residual keeps the
      row's own mean and borrows only the donor's deviation from it.
    """
    Xo, yo = X[~miss], y[~miss]
    n, p = Xo.shape
    gram = Xo.T @ Xo
    gram += np.eye(p) * RIDGE * max(np.trace(gram) / p, 1e-12)
    chol = np.linalg.cholesky(gram)
    beta = np.linalg.solve(gram, Xo.T @ yo)
    resid = yo - Xo @ beta
    sigma2 = float(resid @ resid) / rng.chisquare(max(n - p, 1))
    # beta* = beta + sigma * L^-T z has covariance sigma^2 (X'X)^-1
    draw = beta + np.sqrt(sigma2) * np.linalg.solve(chol.T, rng.standard_normal(p))
    pred_obs = Xo @ beta
    pred_mis = X[miss] @ draw
    order = np.argsort(pred_obs, kind="stable")
    sorted_pred = pred_obs[order]
    k = min(donors, n)
    at = np.searchsorted(sorted_pred, pred_mis)
    lo = np.clip(at - k, 0, max(n - 2 * k, 0))
    window = lo[:, None] + np.arange(min(2 * k, n))[None, :]
    dist = np.abs(sorted_pred[window] - pred_mis[:, None])
    nearest = np.argsort(dist, axis=1, kind="stable")[:, :k]
    pick = nearest[np.arange(len(pred_mis)), rng.integers(0, k, len(pred_mis))]
    donor = order[window[np.arange(len(pred_mis)), pick]]
    if how == "matching":
        return yo[donor]
    return np.clip(pred_mis + resid[donor], yo.min(), yo.max())


def multinomial_fit(X: np.ndarray, codes: np.ndarray, k: int, max_iter: int = 50
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Multinomial logistic regression (first level the reference) by Newton's method with a
    small ridge: the coefficients (p x (k - 1)) and their covariance (p(k-1) square, the
    inverse of the penalised information; coefficients stacked level by level)."""
    n, p = X.shape
    q = k - 1
    Y = (codes[:, None] == np.arange(1, k)[None, :]).astype(float)
    beta = np.zeros((p, q))
    scale = max(float(np.einsum("ij,ij->", X, X)) / p, 1e-12) * RIDGE
    info = np.eye(p * q)
    for _ in range(max_iter):
        eta = X @ beta
        m = np.maximum(eta.max(axis=1, keepdims=True), 0.0)
        ex = np.exp(eta - m)
        prob = ex / (np.exp(-m) + ex.sum(axis=1, keepdims=True))
        score = (X.T @ (Y - prob)).T.reshape(-1) - scale * beta.T.reshape(-1)
        info = np.empty((p * q, p * q))
        for a in range(q):
            for b in range(a, q):
                w = prob[:, a] * ((a == b) - prob[:, b])
                block = (X * w[:, None]).T @ X
                info[a * p:(a + 1) * p, b * p:(b + 1) * p] = block
                info[b * p:(b + 1) * p, a * p:(a + 1) * p] = block.T
        info += np.eye(p * q) * scale
        step = np.linalg.solve(info, score)
        beta = beta + step.reshape(q, p).T
        if np.max(np.abs(step)) < 1e-8:
            break
    return beta, np.linalg.inv(info)


def _categorical(X: np.ndarray, s: pd.Series, miss: np.ndarray,
                 rng: np.random.Generator) -> np.ndarray:
    """Draw the missing levels from a multinomial logistic model whose coefficients are drawn
    from their approximate normal posterior (van Buuren 2018, sec. 3.6)."""
    levels = pd.unique(s[~miss])
    levels = np.array(sorted(levels, key=lambda v: (str(type(v)), v)), dtype=object)
    k = len(levels)
    if k == 1:
        return np.repeat(levels[:1], int(miss.sum()))
    codes = pd.Categorical(s[~miss], categories=list(levels)).codes
    beta, cov = multinomial_fit(X[~miss], np.asarray(codes), k)
    p, q = beta.shape
    chol = np.linalg.cholesky((cov + cov.T) / 2)
    draw = beta + (chol @ rng.standard_normal(p * q)).reshape(q, p).T
    eta = np.hstack([np.zeros((int(miss.sum()), 1)), X[miss] @ draw])
    eta -= eta.max(axis=1, keepdims=True)
    prob = np.exp(eta)
    prob /= prob.sum(axis=1, keepdims=True)
    u = rng.random(len(prob))[:, None]
    chosen = (np.cumsum(prob, axis=1) < u).sum(axis=1)
    return levels[np.minimum(chosen, k - 1)]


def impute_chained(frame: pd.DataFrame, targets: Sequence[Target], auxiliary: np.ndarray,
                   imputations: int, iterations: int, rng: np.random.Generator,
                   donors: int = DONORS, numeric: str = "residual") -> list[pd.DataFrame]:
    """``imputations`` completed copies of ``frame``: one chain each, ``iterations`` cycles over
    the incomplete targets (fewest missing first), started from random draws of the observed
    values. Columns that are not targets are returned unchanged; ``auxiliary`` (n x a, complete)
    enters every imputation model. ``numeric``: local residual draws (default) or predictive
    mean matching for the numeric targets (:func:`_numeric`)."""
    if numeric not in NUMERIC:
        raise ValueError(f"numeric must be one of {NUMERIC}, got {numeric!r}")
    aux = np.asarray(auxiliary, float).reshape(len(frame), -1)
    if aux.size:
        sd = aux.std(axis=0)
        aux = (aux - aux.mean(axis=0)) / np.where(sd > 0, sd, 1.0)
    masks = {t.column: frame[t.column].isna().to_numpy() for t in targets}
    for t in targets:
        if masks[t.column].all():
            raise ValueError(f"column {t.column!r} is missing in every row; nothing to impute "
                             "from")
    order = sorted((t for t in targets if masks[t.column].any()),
                   key=lambda t: (int(masks[t.column].sum()), t.column))
    out: list[pd.DataFrame] = []
    for _ in range(imputations):
        cur = frame.copy()
        for t in order:
            miss = masks[t.column]
            observed = cur.loc[~miss, t.column].to_numpy()
            cur.loc[miss, t.column] = observed[rng.integers(0, observed.size, int(miss.sum()))]
        for _ in range(iterations):
            for t in order:
                miss = masks[t.column]
                X = _design(cur, targets, t.column, aux)
                if t.kind == "numeric":
                    y = cur[t.column].to_numpy(float)
                    cur.loc[miss, t.column] = _numeric(X, y, miss, rng, donors, numeric)
                else:
                    orig = frame[t.column]
                    s = cur[t.column].where(~miss, orig)
                    drawn = _categorical(X, s, miss, rng)
                    if pd.api.types.is_numeric_dtype(cur[t.column].dtype):
                        drawn = drawn.astype(cur[t.column].dtype)
                    cur.loc[miss, t.column] = drawn
        out.append(cur)
    return out
