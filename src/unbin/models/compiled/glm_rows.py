"""The per-row work of one block of a logistic or Poisson likelihood pass
(``unbin.models._glm._Family.evaluate``) in one compiled loop.

numpy's vectorised exponential and ``log1p`` stay outside (numba's scalar ones cost more than
everything below together): ``e`` holds ``exp(-|eta|)`` for the logistic model and
``exp(min(eta, 700))`` for the Poisson one, ``lg`` (logistic only) ``log1p(e)``. From them, per
row ``i`` with frequency weight ``f`` (``freq`` empty: none), what the numpy path computes in
about ten passes over the block, with the same operations in the same order (so the same
values): the log-likelihood term ``terms[i]`` (logistic ``y eta - (max(eta, 0) + lg)``,
Poisson ``y eta - mu``), the residual ``resid[i] = y - mu`` (logistic ``mu = 1 / (1 + e)``
for ``eta >= 0``, else ``e / (1 + e)`` as ``e * (1 / (1 + e))``), each times ``f``, and the
block's rows scaled by the variance, ``Zv[i, j] = Zb[i, j] * v`` (logistic
``v = e (1 / (1 + e))^2``, Poisson ``mu``, times ``f``): the information's left factor. The
sums (``terms.sum()``, ``Zb' resid``, ``Zv' Zb``) stay numpy's and BLAS's."""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["glm_rows"]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def glm_rows(eta: np.ndarray, e: np.ndarray, lg: np.ndarray, y: np.ndarray,
             freq: np.ndarray, Zb: np.ndarray, logistic: bool, terms: np.ndarray,
             resid: np.ndarray, Zv: np.ndarray) -> None:  # pragma: no cover - compiled
    nb, k = Zb.shape
    weighted = freq.shape[0] > 0
    for i in range(nb):
        x = eta[i]
        if logistic:
            inv = 1.0 / (1.0 + e[i])
            ei = e[i] * inv
            mu = inv if x >= 0 else ei
            v = ei * inv
            t = y[i] * x - ((x if x > 0.0 else 0.0) + lg[i])
        else:
            mu = e[i]
            v = mu
            t = y[i] * x - mu
        r = y[i] - mu
        if weighted:
            f = freq[i]
            t = f * t
            r = f * r
            v = f * v
        terms[i] = t
        resid[i] = r
        for j in range(k):
            Zv[i, j] = Zb[i, j] * v
