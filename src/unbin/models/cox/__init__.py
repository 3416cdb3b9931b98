"""The proportional-hazards engine: Cox partial likelihood on numpy arrays (``layout``: the
sorted sample and its risk sets; ``fit``: the likelihood and Newton fit; ``baseline``: baseline
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
The data are sorted once, and the covariates gathered once into a sorted, standardised
(n x (1 + p)) array whose first column is ones. Every event time t_k of every stratum gets an
index k (sorted by stratum, then time), and every row the range of indices ``(a_i, b_i]`` of
the event times at which it is at risk. A sparse (K x n) matrix with +1 at ``b_i`` and -1 at
``a_i``, times that array, followed by a reverse cumulative sum over event times, gives the
risk-set sums of ``w exp(eta)`` and ``w exp(eta) x`` at every event time in one sparse product
(the -1 removes rows that have not yet entered). The second derivatives never need
per-event-time p x p matrices: the sum over event times of ``c_k * sum_{i in R_k} r_i x_i x_i'``
equals ``X' diag(r_i * sum_{k: i in R_k} c_k) X``, one matrix product (in row blocks that stay
in cache; its first row is also the score's varying part), and the ``E[x] E[x]'`` part needs
only the (event times x p) risk-set sums. Memory is therefore a few n x p arrays; nothing of
size n x p x p (or n x p^2) is formed. Efron's tied-event terms touch only the event times
that hold ties (one entry per tied event, ``l/d`` fractions, summed with ``np.bincount``), so
there is no Python loop over event times or strata.

One sample, many models: the sort, the index ranges and the sparse operators depend on time,
event, entry, strata and weights only, never on X. ``prepare_layout`` builds them once; a fit
given that layout starts at gathering X, and its result is bit for bit the one it computes
when it lays the sample out itself. Harrell's C likewise keeps the time order and the tie
counts of (time, event) (``concordance_order``), so each score costs one sort by score and
O(n) passes per bit of n (see ``concordance``).

Few evaluations: with many events, Newton's method starts from a fit to a systematic subsample
(every 4th to 8th row in time order, itself started the same way when large), whose
information, scaled up, serves for the first full-data step; the fit then usually needs two
or three evaluations of the full information (the subsample's layout is kept with the full
one, so the fits that share a prepared layout share it too). It stops when the next Newton
step would change no row's linear predictor by more than ``100 * tol`` (so that no weight
``exp(eta)``, hence no part of the information, changes by more than about that fraction);
that last step is taken without a further evaluation.

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
from .concordance import TimeOrder, concordance, concordance_order
from .fit import CoxFit, fit_cox, refit_near
from .layout import Layout, prepare_layout

__all__ = [
    "CoxFit",
    "Layout",
    "TimeOrder",
    "baseline_cumhaz",
    "concordance",
    "concordance_order",
    "fit_cox",
    "predict_risk",
    "prepare_layout",
    "refit_near",
]
