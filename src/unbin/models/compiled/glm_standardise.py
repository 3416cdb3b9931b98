"""One block of rows of the GLM engine's standardised design (``unbin.models._glm.standardise``)
as a compiled loop: ``Zb[i] = [1, (X[r0 + i] - mean) * inv]``, the same subtraction and
multiplication per element as the numpy path (so the same values). numpy's broadcast
``(X - mean) * inv`` into the standardised array runs one short inner loop per row and per
operation (the row's few columns); here one pass."""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["standardised_rows"]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def standardised_rows(X: np.ndarray, r0: int, mean: np.ndarray, inv: np.ndarray,
                      Zb: np.ndarray) -> None:  # pragma: no cover - compiled
    nb = Zb.shape[0]
    p = mean.shape[0]
    for i in range(nb):
        Zb[i, 0] = 1.0
        for j in range(p):
            Zb[i, j + 1] = (X[r0 + i, j] - mean[j]) * inv[j]
