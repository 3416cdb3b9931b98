"""Poisson regression with a log person-time offset on numpy arrays, by unbin's Newton solver."""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from ._glm import run_glm
from .base import FitResult, Outcome


def _zero_rate(eta: np.ndarray) -> str:
    # A group (or a region of a curve) with no counts at all has a rate ratio of 0: its log
    # runs to -inf and Newton stops where the log-likelihood no longer moves, near -25 or
    # below. A fitted rate e^20 (5e8) times below the typical row's is not a real estimate.
    if eta.size and float(np.min(eta)) < float(np.median(eta)) - 20:
        return ("some rows have a fitted rate of practically 0 (a group or range without any "
                "counts?); the rate ratio is 0 and its logarithm is -infinite. Merge sparse "
                "groups or use a continuous form.")
    return ""


def pearson_dispersion(res: FitResult, outcome: Outcome) -> float:
    """Pearson chi-square / residual df of a Poisson fit: sum f (y - mu)^2 / mu over
    (sum f - p) with frequency weights (a row counts f times), over (n - p) otherwise."""
    assert res.linear_predictor is not None
    y = np.asarray(outcome.y, dtype=float)
    eta = res.linear_predictor + res.extra["intercept"]
    mu = np.exp(eta + outcome.offset) if outcome.offset is not None else np.exp(eta)
    f = np.ones_like(y) if outcome.weights is None else np.asarray(outcome.weights, float)
    rows = float(f.sum()) if outcome.weight_kind == "frequency" else float(y.size)
    df_resid = max(rows - len(res.names), 1.0)
    return float(f @ ((y - mu) ** 2 / mu) / df_resid)


def fit_count(X: np.ndarray, outcome: Outcome, names: tuple[str, ...]) -> FitResult:
    """Poisson (``outcome.dispersion`` "poisson"), quasi-Poisson (the Poisson estimates, the
    covariance times the Pearson dispersion; Wedderburn 1974, McCullagh & Nelder 1989 sec. 4.5)
    or negative binomial NB2 (unbin.models.negbin). The Pearson dispersion of the Poisson fit is
    in ``extra["dispersion"]`` for the first two."""
    if outcome.dispersion == "negative-binomial":
        from .negbin import fit_negbin

        return fit_negbin(X, outcome, names)
    y = outcome.y.astype(float)
    res = run_glm("count", X, names, outcome, int(y.sum()), separation_check=_zero_rate)
    if res.ok:
        # Pearson dispersion: > 1 signals overdispersion (the Poisson SEs are then too small).
        disp = pearson_dispersion(res, outcome)
        res.extra["dispersion"] = disp
        if outcome.dispersion == "quasi-poisson":
            res = replace(res, cov=res.cov * disp,
                          extra={**res.extra, "variance": f"quasi-Poisson (scale {disp:.3g})"})
        elif disp > 1.5:
            res = replace(res, warnings=(*res.warnings, (
                f"Pearson dispersion {disp:.2f} > 1.5: the counts are overdispersed, so the "
                "Poisson standard errors are too small; set outcome.overdispersion to "
                "quasi-poisson or negative-binomial.")))
    return res
