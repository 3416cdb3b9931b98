"""The rows of a block scaled by a weight each, ``out[i, j] = Zb[i, j] * v[i]`` (the left
factor of a weighted cross-product ``Zb' diag(v) Zb``, ``unbin.models._glm.gram``), as one
compiled loop: the same products as numpy's broadcast ``Zb * v[:, None]``, which runs one short
inner loop (the block's few columns) per row and took about as long as the matrix product it
feeds."""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["scaled_rows"]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def scaled_rows(Zb: np.ndarray, v: np.ndarray, out: np.ndarray) -> None:  # pragma: no cover
    nb, k = Zb.shape
    for i in range(nb):
        w = v[i]
        for j in range(k):
            out[i, j] = Zb[i, j] * w
