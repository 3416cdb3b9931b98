"""The log partial likelihood at a bootstrap replicate's maximum, for the refits whose
likelihood is all that is read (the bootstrap of the information kept,
``unbin.questions.kept``): ``refit_replicate_loglik``.

``fit.refit_replicate`` steps until the next quasi-Newton step ``s = H g`` would change no
row's linear predictor by more than ``30 * tol`` (3e-8), because its coefficients are read.
A log-likelihood is flat at its maximum: the quadratic model's value ``ll + g's / 2`` (the
one ``refit_replicate(..., with_loglik=True)`` reports, ``fit._settled_loglik``) is off by
``g'(I^-1 - H)g / 2`` plus third-order terms (I the information), that is by a fraction of
the predicted gain ``g's / 2`` itself, the fraction being the secant inverse's relative error
along the step, which is also the factor by which successive steps shrink. So these refits
also stop once that gain is at most ``LOGLIK_GAIN`` (1e-6). From the full sample's estimate
with its information scaled, the steps shrink about a hundredfold each (death_egfr at
1,000,000 rows: the largest change of a linear predictor 2e-2, 3e-4, 4e-6, 4e-8, 4e-10), so
the gain is then about 1e-7 and the value reported within about 1e-9 of the maximum (a
likelihood ratio to about 2e-9, a share of two of them to that over the larger ratio), one
or two evaluations (of four or five) before the linear-predictor bound is met. Either stop
ends the refit; everything else (the design copied from the full sample's sorted design,
the first step with the full sample's information, the BFGS updates, when a refit is
declined) is ``refit_replicate``'s.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .fit import (
    _REPLICATE_SETTLE,
    NearStart,
    _settled,
    replicate_first_point,
    secant_update,
)
from .layout import Layout
from .likelihood import _evaluate

# The refit stops once the quasi-Newton step's predicted gain in log partial likelihood,
# ``g's / 2``, is at most this (module docstring); the value reported is then off by the
# secant inverse's relative error (about 1e-2) times the gain.
LOGLIK_GAIN = 1e-6


def refit_replicate_loglik(
    start: NearStart, X: Any, rows: np.ndarray, layout: Layout, *, tol: float = 1e-9,
    max_iter: int = 50, gain: float = LOGLIK_GAIN,
) -> float | None:
    """The log partial likelihood at the maximum of one replicate of ``start``'s sample (its
    drawn rows ``rows`` laid out in ``layout``, as ``fit.refit_replicate`` takes them), by
    ``refit_replicate``'s secant steps stopped also when the next step's predicted gain is at
    most ``gain`` (module docstring), reported as the quadratic model's value there. None
    where ``refit_replicate`` declines (no events, a column constant among the drawn rows,
    a step or likelihood not finite, the likelihood falling, ``max_iter`` steps): the caller
    then fits with ``fit_cox``."""
    first = replicate_first_point(start, X, rows, layout)
    if first is None:
        return None
    L, D, ll, score, H = first
    beta = start.beta
    limit = _REPLICATE_SETTLE * tol
    for _ in range(max_iter):
        step = H @ score
        if not np.isfinite(step).all():
            return None
        ahead = 0.5 * float(score @ step)
        if ahead <= gain or _settled(D, step, tol, limit):
            return float(ll + ahead)
        beta = beta + step
        ll_next, score_next, _ = _evaluate(L, D, beta, start.efron, 1)
        if not np.isfinite(ll_next) or ll_next < ll - tol * max(1.0, abs(ll)):
            return None
        H = secant_update(H, step, score - score_next)
        ll, score = ll_next, score_next
    return None
