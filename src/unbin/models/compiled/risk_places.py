"""A logistic model's risk rules at every threshold in a bootstrap replicate's drawn rows (as
draw counts) and in the full sample, from one compiled pass over its log odds, with an
exponential only for the rare rows near a threshold (the numpy path:
``questions/net_benefit.py``, ``net_benefit_risk`` of ``scipy.special.expit(z)`` with the draw
counts and with one copy per row, which ``logistic_rules_drawn_and_full`` uses below
``RISK_PLACES_FROM_ROWS`` rows or when this kernel declines).

A row's risk is ``expit(z) = 1 / (1 + exp(-z))`` as ``scipy.special.expit`` computes it (the
same number here: both call the C library's ``exp``; tested bit for bit), and it reaches a
threshold t when ``expit(z) >= t``. With c the log odds of t and a margin
m = 1e-7 (1 + |c|): a z at least m above c has an exact risk above t by at least
m t (1 - t) / 2 >= 5e-14 (thresholds with t (1 - t) >= 1e-6), and one m below c below it by as
much, far more than the few units in the last place (about 1e-16) by which the computed risk
and the computed c can be off, so those rows are placed by comparing z with c; a row within
a margin of a cut gets its risk computed and compared with the thresholds, as the numpy path
compares them. The copies are summed per (place, outcome) for both data sets at once, in
int64: the same whole numbers as two calls of ``threshold_counts`` on the risks. The kernel
declines (status 2) when a threshold has t (1 - t) below 1e-6 (or is not a number), and
stops at a NaN z (status 1: the risk is NaN, which the numpy path reports)."""

from __future__ import annotations

import math

import numba
import numpy as np

__all__ = ["risk_place_counts"]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def risk_place_counts(ranked: np.ndarray, z: np.ndarray, event: np.ndarray,
                      counts: np.ndarray) -> tuple[int, np.ndarray]:
    """(status, counts by place): status 0 with (thresholds + 1, 2, 2) int64, the copies of
    the rows at each place (0: below every threshold; j: at or above the j lowest) with
    outcome 0 (``[:, 0]``) and 1 (``[:, 1]``), in the drawn rows (``[..., 0]``, ``counts``
    copies of row i) and in the full sample (``[..., 1]``, one copy each); status 1 (a NaN
    ``z``) or 2 (declined, module docstring) with the counts unfinished.

    ``ranked`` (T,) the thresholds ascending, T >= 1; ``z`` (n,) float the log odds;
    ``event`` (n,) bool; ``counts`` (n,) int64."""
    n_t = ranked.shape[0]
    out = np.zeros((n_t + 1, 2, 2), dtype=np.int64)
    sure = np.empty(n_t)  # at or above: the threshold reached
    near = np.empty(n_t)  # above this (and below ``sure``): the risk decides
    for j in range(n_t):
        t = ranked[j]
        if not (t * (1.0 - t) >= 1e-6):
            return 2, out
        c = math.log(t / (1.0 - t))
        m = 1e-7 * (1.0 + abs(c))
        sure[j] = c + m
        near[j] = c - m
    for i in range(z.shape[0]):
        x = z[i]
        if x != x:
            return 1, out
        p = 0
        while p < n_t and sure[p] <= x:
            p += 1
        if p < n_t and near[p] < x:  # within a margin of a cut: by the risk
            r = 1.0 / (1.0 + math.exp(-x))
            while p < n_t and ranked[p] <= r:
                p += 1
        e = 1 if event[i] else 0
        out[p, e, 0] += counts[i]
        out[p, e, 1] += 1
    return 0, out
