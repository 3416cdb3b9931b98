"""The proportional-hazards engine: Cox partial likelihood on numpy arrays (``inputs``: the
checks of the arrays; ``layout``: the sorted sample and its risk sets; ``likelihood``: the log
partial likelihood, score and information; ``fit``: the Newton fit; ``replicates``: the
refits of many bootstrap replicates at once; ``baseline``: baseline
hazard and absolute risk; ``concordance``: Harrell's C).

What it does
------------
``fit_cox`` maximises the Cox partial likelihood by Newton's method with step halving, with
Efron (default) or Breslow handling of tied event times, strata (a separate baseline hazard
per stratum), delayed entry (left truncation: a row is at risk at event time t when
``entry < t <= time``) and optional case weights. ``baseline_cumhaz`` gives the Breslow
estimate of the baseline cumulative hazard per stratum, ``predict_risk`` the absolute risk by a
horizon, and ``concordance`` Harrell's C in O(n log n). ``prepare_layout`` checks and sorts
one sample once for any number of fits of it (``fit_cox(..., layout=...)``), and
``concordance_order`` does the same for the C-indices of many scores of one sample.

How it is fast
--------------
The sample is sorted and its risk sets laid out once, independently of X (``prepare_layout``),
so one sample's many models share that work; each likelihood evaluation is then one sparse
product, cumulative sums over event times and one blocked Gram product, with memory of a few
n x p arrays and no Python loop over event times; with many events Newton's method starts from
a subsample's estimate. DEVELOPERS.md ("The Cox engine's performance") explains the layout,
the algebra and the starting values.

Numerics
--------
Columns are centred and scaled internally (the partial likelihood is invariant to centring;
estimates are transformed back). The linear predictor is shifted by its maximum within each
stratum before ``exp`` (the partial likelihood is invariant to that too). The cumulative sums
over event times restart at every stratum: by a loop over up to 64 strata, beyond that by
subtracting running totals in extended precision (``np.longdouble``), so that one stratum's
sums do not lose digits to another's.

Failures
--------
Invalid input (event not 0/1, ``time <= entry``, non-finite values, non-positive weights)
raises ``ValueError`` naming the problem. Numerical trouble never raises and never returns a
silent NaN: ``CoxFit.converged`` is False and ``CoxFit.message`` says what happened and what
to try (iteration limit, singular information, diverging coefficient, non-finite likelihood).
"""

from .baseline import baseline_cumhaz, predict_risk
from .concordance import TimeOrder, concordance, concordance_order, weighted_concordance
from .fit import (
    CoxFit,
    NearStart,
    fit_cox,
    near_start,
    refit_near,
    refit_near_loglik,
    refit_replicate,
)
from .layout import Layout, prepare_layout
from .replicates import ReplicateRefits, refit_replicates

__all__ = [
    "CoxFit",
    "Layout",
    "NearStart",
    "TimeOrder",
    "baseline_cumhaz",
    "concordance",
    "concordance_order",
    "weighted_concordance",
    "fit_cox",
    "near_start",
    "predict_risk",
    "prepare_layout",
    "refit_near",
    "refit_near_loglik",
    "refit_replicate",
    "refit_replicates",
    "ReplicateRefits",
]
