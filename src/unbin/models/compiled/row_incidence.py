"""Each row's product-limit cumulative incidence of cause 1 (``unbin.refit.incidence_sum``'s
``row_incidence``) as one loop per row over the event times.

The numpy path forms, per block of rows, the (rows x event times) factors ``1 - sum_c r_c
dL_c(t)`` by a matrix product, clips them at 0, takes their cumulative products along the times
and a second matrix product with cause 1's increments: four passes over a block larger than the
processor's caches. Here a row's running product and its sum stay in registers, one pass over
the (small) increments per row. The sums are the same terms added in time order, where the
matrix products add them in the library's own order: the incidences agree to a few units in the
last place (``tests/refit/test_incidence_sum.py``)."""

from __future__ import annotations

import math

import numba
import numpy as np

__all__ = ["row_incidence"]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def row_incidence(log_risk, D):  # pragma: no cover
    """``F_i = r_i1 sum_t S_i(t-) dL_1(t)``, ``S_i(t-)`` the product of ``max(0, 1 - sum_c
    r_ic dL_c(s))`` over the event times s before t, for every row i of ``log_risk`` (rows x
    causes; ``D``: causes x event times)."""
    m, C = log_risk.shape
    K = D.shape[1]
    out = np.empty(m)
    risk = np.empty(C)
    for i in range(m):
        for c in range(C):
            risk[c] = math.exp(log_risk[i, c])
        surv = 1.0
        acc = 0.0
        for k in range(K):
            acc += surv * D[0, k]
            f = 1.0
            for c in range(C):
                f -= risk[c] * D[c, k]
            if not f > 0.0:  # numpy's maximum(factor, 0) keeps a NaN
                f = f if f != f else 0.0
            surv *= f
        out[i] = risk[0] * acc
    return out
