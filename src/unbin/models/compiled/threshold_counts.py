"""The rows at or above each of several thresholds, by outcome, in one compiled pass (the numpy
path: ``questions/net_benefit.py``, ``threshold_counts``, which this module stands in for from
``THRESHOLD_COUNTS_FROM_ROWS`` rows).

Each row's place among the ascending thresholds (how many of them are at or below its risk) is
first guessed by linear interpolation between the lowest and highest threshold and then moved
up or down by exact comparisons until the threshold below it is at or below the risk and the one
above it is higher (on an evenly spaced grid such as the net benefit's a step at most; any other
ascending thresholds only take more steps); a NaN risk takes the last place, as numpy's
``searchsorted`` gives it. The rows' copies are summed per (place, outcome) in int64: the same
whole numbers as the numpy path's counts."""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["place_counts"]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def place_counts(ranked: np.ndarray, risk: np.ndarray, event: np.ndarray,
                 weights: np.ndarray) -> np.ndarray:
    """(thresholds + 1, 2) int64: the copies of the rows at each place (0: below every
    threshold; j: at or above the j lowest) with outcome 0 (column 0) and 1 (column 1).

    ``ranked`` (T,) the thresholds ascending, T >= 1; ``risk`` (n,) float; ``event`` (n,) bool;
    ``weights`` (n,) int64 copies per row, or an empty array for one copy each."""
    n_t = ranked.shape[0]
    out = np.zeros((n_t + 1, 2), dtype=np.int64)
    lo = ranked[0]
    span = ranked[n_t - 1] - lo
    scale = (n_t - 1) / span if span > 0.0 and span < np.inf else 0.0
    weighted = weights.shape[0] > 0
    for i in range(risk.shape[0]):
        r = risk[i]
        if r != r:  # NaN: after every threshold
            p = n_t
        else:
            g = (r - lo) * scale
            if g >= n_t:
                p = n_t
            elif g > 0.0:
                p = int(g)
            else:  # below the lowest, or NaN (an infinite threshold)
                p = 0
            while p < n_t and ranked[p] <= r:
                p += 1
            while p > 0 and ranked[p - 1] > r:
                p -= 1
        c = weights[i] if weighted else 1
        if event[i]:
            out[p, 1] += c
        else:
            out[p, 0] += c
    return out
