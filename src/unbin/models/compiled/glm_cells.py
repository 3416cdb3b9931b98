"""The per-cell work of one pass of the large-sample GLM bootstrap refits
(``unbin.models.weighted._chord``) over a block of (replicates x rows), in one compiled loop.

numpy's exponential is vectorised and stays outside (``e`` holds ``exp(-eta)`` for the logistic
model, ``exp(min(eta, 700))`` for the Poisson one); from it, per replicate ``c`` of the block (draw-count row
``act[c]``) and row ``i`` (``r0 + i`` of the sample) with refit weight
``w = counts[act[c], r0 + i] * scale[r0 + i]`` (``scale`` empty: 1), the mean ``mu``
(logistic ``1 / (1 + e)``, Poisson ``e``), the weighted residual ``r[c, i] = w (y_i - mu)`` and,
with ``want_v``, the weighted variance ``wv[c, i] = w mu (1 - mu)`` (Poisson ``w mu``). numpy
takes about eight passes over the block (the weights in float64 and scaled, the reciprocal,
1 - mu, two products, the residual, two products by the weights); here one.

With ``e_min`` and ``e_max`` of length C (else empty), each replicate's smallest and largest
``e`` over the block's rows are folded into them (a NaN ``e`` makes ``e_max`` infinite): the
range of the linear predictor over the rows at the point evaluated, which the logistic
refits' final check reads instead of a pass of its own. Over every row, not only the drawn
ones (a wider range, so a valid bound for the drawn rows): a test of the draw count per cell
is a branch the processor mispredicts about every other cell (at 1,000,000 rows that made the
confounding table's refits slower than the pass it saved); these comparisons are almost
never true after a block's first rows, so they cost next to nothing.
"""

from __future__ import annotations

import numba
import numpy as np


@numba.njit(cache=True, nogil=True, error_model="numpy")
def glm_cells(e: np.ndarray, y: np.ndarray, counts: np.ndarray, act: np.ndarray, r0: int,
              scale: np.ndarray, logistic: bool, want_v: bool, r: np.ndarray,
              wv: np.ndarray, e_min: np.ndarray,
              e_max: np.ndarray) -> None:  # pragma: no cover - compiled
    C, nb = e.shape
    scaled = scale.shape[0] > 0
    track = e_min.shape[0] > 0
    for c in range(C):
        row = act[c]
        lo = np.inf
        hi = -np.inf
        for i in range(nb):
            w = float(counts[row, r0 + i])
            if scaled:
                w *= scale[r0 + i]
            ec = e[c, i]
            if track:
                if ec < lo:
                    lo = ec
                if ec > hi:
                    hi = ec
                if ec != ec:  # NaN: no range to bound the predictor by
                    hi = np.inf
            if logistic:
                mu = 1.0 / (1.0 + ec)
                var = mu * (1.0 - mu)
            else:
                mu = ec
                var = mu
            r[c, i] = w * (y[i] - mu)
            if want_v:
                wv[c, i] = w * var
        if track:
            if lo < e_min[c]:
                e_min[c] = lo
            if hi > e_max[c]:
                e_max[c] = hi
