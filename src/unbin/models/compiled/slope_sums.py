"""The five sums of one Newton step of the logistic calibration slope over a block of rows, in
one compiled pass (the numpy path: ``questions/decision_resampling.py``, ``logistic_slope``,
which calls this from ``SLOPE_SUMS_FROM_ROWS`` rows; numpy's vectorised exponential stays
outside and gives the block's means ``mu``). numpy takes seven passes over the block (1 - mu,
two products, the residual, five reductions); here one, the sums in row order."""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["slope_sums"]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def slope_sums(zc: np.ndarray, y: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """(sum w, sum w z, sum w z^2, sum r, sum r z) with w = mu (1 - mu) and r = y - mu over
    the rows of ``zc`` (the centred predictor), ``y`` (0/1 floats) and ``mu`` (the model's
    means), all (m,)."""
    h00 = h01 = h11 = g0 = g1 = 0.0
    for i in range(zc.shape[0]):
        z = zc[i]
        m = mu[i]
        w = (1.0 - m) * m
        r = y[i] - m
        wz = w * z
        h00 += w
        h01 += wz
        h11 += wz * z
        g0 += r
        g1 += r * z
    out = np.empty(5)
    out[0], out[1], out[2], out[3], out[4] = h00, h01, h11, g0, g1
    return out
