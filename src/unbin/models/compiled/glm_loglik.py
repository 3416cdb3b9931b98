"""The frequency-weighted log-likelihood sums of the logistic and Poisson bootstrap refits
(``unbin.questions.kept.glm_logliks``, the information bootstrap) over a block of
(replicates x rows), in one compiled pass.

The predictor ``eta`` (C x rows) stays BLAS's product; per replicate ``c`` and row ``i``
(``r0 + i`` of the sample) with refit weight ``w = counts[c, r0 + i] * scale[r0 + i]``
(``scale`` empty: 1) the pass adds ``w (y_i eta - b(eta))`` to ``out[c]``, with
``b(eta) = log1p(exp(-|eta|)) + max(eta, 0)`` (logistic: ``log(1 + e^eta)`` exactly in
floating point) or ``exp(min(eta, 700))`` (Poisson). ``exp`` and ``log1p`` are the C
library's, as numpy's float64 ``exp`` and ``log1p`` are on the machines this runs on (the same
terms bit for bit, ``tests/questions/test_glm_loglik_sums.py``). A row that a replicate did
not draw (``w = 0``) adds nothing and is skipped, so its exponential and logarithm are not
taken: about a third of the cells of a bootstrap replicate (e^-1). numpy formed the terms in
about eight passes over the block and summed them with ``einsum``; the sums here run in row
order, so they differ from numpy's by rounding (a few units in the last place of a
log-likelihood).
"""

from __future__ import annotations

import math

import numba
import numpy as np

__all__ = ["loglik_sums"]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def loglik_sums(eta: np.ndarray, y: np.ndarray, counts: np.ndarray, r0: int,
                scale: np.ndarray, logistic: bool,
                out: np.ndarray) -> None:  # pragma: no cover - compiled
    C, nb = eta.shape
    scaled = scale.shape[0] > 0
    for c in range(C):
        s = 0.0
        for i in range(nb):
            w = float(counts[c, r0 + i])
            if scaled:
                w *= scale[r0 + i]
            if w == 0.0:
                continue
            e = eta[c, i]
            if logistic:
                b = math.log1p(math.exp(-abs(e))) + (e if e > 0.0 else 0.0)
            else:
                b = math.exp(e if e < 700.0 else 700.0)
            s += w * (y[i] * e - b)
        out[c] += s
