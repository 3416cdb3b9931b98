"""The binary AUC's pair counts of several count vectors in one compiled pass over the rows in
score order (the numpy path: ``models/discrimination.py``, ``count_aucs``, which this module
stands in for from ``AUC_FROM_ROWS`` rows).

Walking the rows by ascending score, the runs of equal scores are the groups of tied rows; per
count vector the pass sums each run's event and non-event copies and keeps the non-event
copies of the runs before it, adding ev (2 below + tied non-events) per run: twice the
Mann-Whitney count of (event, non-event) pairs, in int64 (the same integers the numpy path
sums)."""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["auc_pairs"]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def auc_pairs(ranked: np.ndarray, event: np.ndarray, weights: np.ndarray
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(event copies, non-event copies, twice the pairs with the event scoring higher plus
    the tied pairs), one value per column of ``weights``.

    ``ranked`` (n,) the scores ascending; ``event`` (n,) bool and ``weights`` (n, K)
    non-negative whole-number copies (int64) of the rows in that order (gathered by the
    caller: a numpy gather is cheaper than one row at a time here)."""
    n = ranked.shape[0]
    n_k = weights.shape[1]
    n1 = np.zeros(n_k, dtype=np.int64)
    n0 = np.zeros(n_k, dtype=np.int64)
    twice = np.zeros(n_k, dtype=np.int64)
    ev_g = np.zeros(n_k, dtype=np.int64)  # the current run's event copies
    ot_g = np.zeros(n_k, dtype=np.int64)  # ... and non-event copies
    for i in range(n):
        if i > 0 and ranked[i] != ranked[i - 1]:  # a new run: close the last one
            for c in range(n_k):
                twice[c] += ev_g[c] * (2 * n0[c] + ot_g[c])
                n1[c] += ev_g[c]
                n0[c] += ot_g[c]
                ev_g[c] = 0
                ot_g[c] = 0
        if event[i]:
            for c in range(n_k):
                ev_g[c] += weights[i, c]
        else:
            for c in range(n_k):
                ot_g[c] += weights[i, c]
    for c in range(n_k):
        twice[c] += ev_g[c] * (2 * n0[c] + ot_g[c])
        n1[c] += ev_g[c]
        n0[c] += ot_g[c]
    return n1, n0, twice
