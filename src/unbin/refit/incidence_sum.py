"""The sum over rows of the product-limit cumulative incidence, at registry size.

With cause-specific Cox models of ``C`` causes, row ``i``'s cumulative incidence of cause 1 by
the horizon depends on the row only through its relative hazards ``r_ic = exp(u_ic)``:

    F(u) = sum_t r_1 dL_1(t) prod_{s < t} (1 - sum_c r_c dL_c(s))

over the stratum's ``K`` event times up to the horizon (``dL_c`` the baseline increments).
The standardised incidence needs ``sum_i w_i F(u_i + shift)`` for each exposure value's
``shift``: evaluated row by row that is rows x ``K`` work (:func:`row_incidence`), 10^10 to
10^11 cells at a million rows.

:func:`incidence_sums` instead interpolates ``F(u + shift)`` over the rows' box of ``u`` by a
tensor Chebyshev polynomial (points of the second kind, coefficients by a type-I discrete
cosine transform along each axis; Trefethen 2013, *Approximation Theory and Approximation
Practice*, ch. 3 and 8), evaluated exactly at its nodes (nodes x ``K``), and sums the
polynomial over the rows through their Chebyshev moments ``sum_i w_i prod_c T_jc(x_ic)`` (rows
x nodes, one matrix product for two causes; shared by every exposure value). While every
factor ``1 - sum_c r_c dL_c(s)`` stays positive over the box (checked at its upper corner:
at most :data:`FACTOR_LIMIT`), ``F`` is analytic in ``u`` and its Chebyshev coefficients decay
geometrically; each axis' degree is doubled (nested points: 8, 16, 32, 64 intervals) until the
coefficients in the top quarter of that axis' degrees sum to at most :data:`TAIL` (absolute, on
an incidence between 0 and 1) — the usual a-posteriori criterion of adaptive Chebyshev
interpolation: the interpolation error is of the size of the first neglected coefficients,
far below the top quarter's when they decay geometrically. The tests check the result against
the row-by-row sum to 1e-10. When the box is unsafe, the degree would pass
:data:`MAX_NODES` nodes or a ``u`` is not finite, the caller sums row by row.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import fft

from ..models import compiled

# every factor 1 - sum_c r_c dL_c(s) at the box's upper corner at least 1 - FACTOR_LIMIT, so
# the incidence is analytic over the box (and no factor is set to 0)
FACTOR_LIMIT = 0.5
# the top quarter of an axis' Chebyshev coefficients sums to at most this (absolute)
TAIL = 1e-10
# the most interpolation nodes (product over the axes); beyond: the row-by-row sum
MAX_NODES = 20000
# the width of a box along cause c: r_c times the cause's cumulative baseline hazard by the
# horizon varies by at most this within it
PANEL = 4.0
_FIRST = 9  # nodes per axis to start with (8 intervals)
_CELLS = 1 << 21  # rows x event times held at once (16 MB)


# From this many cells (rows x event times) each row's incidence is one compiled loop over its
# event times (compiled/row_incidence.py; the same terms, added in time order); below it numpy's
# blocks, so small evaluations never import numba.
ROW_INCIDENCE_FROM_CELLS = 1_000_000


def row_incidence(log_risk: np.ndarray, D: np.ndarray) -> np.ndarray:
    """Each row's cumulative incidence of cause 1 (row of ``D``'s first) at log relative
    hazards ``log_risk`` (rows, causes), from the baseline increments ``D`` (causes, event
    times up to the horizon); a factor below 0 is set to 0. Rows are taken a block at a time
    (at most about 2^21 cells), or one at a time compiled from ``ROW_INCIDENCE_FROM_CELLS``."""
    m, K = log_risk.shape[0], D.shape[1]
    if K and compiled.wanted(m * K, ROW_INCIDENCE_FROM_CELLS):
        from ..models.compiled import row_incidence as kernel

        return np.asarray(kernel.row_incidence(np.ascontiguousarray(log_risk, dtype=float),
                                               np.ascontiguousarray(D, dtype=float)))
    out = np.empty(m)
    block = max(1, min(256, _CELLS // max(K, 1)))
    for r0 in range(0, m, block):
        with np.errstate(over="ignore"):
            risk = np.exp(log_risk[r0:r0 + block])  # (rows, causes)
        # S_i(t-) is the product of the factors before t: F_i = sum_t S_i(t-) dL_1i(t)
        factor = 1.0 - risk @ D
        np.maximum(factor, 0.0, out=factor)
        np.cumprod(factor, axis=1, out=factor)
        before_d = D[0, 0] + factor[:, :-1] @ D[0, 1:]
        out[r0:r0 + block] = risk[:, 0] * before_d
    return out


def shifted_sums(u: np.ndarray, w: np.ndarray, shifts: np.ndarray,
                 D: np.ndarray) -> np.ndarray:
    """``sum_i w_i F(u_i + shifts[s])`` for each row ``s`` of ``shifts``, row by row
    (:func:`row_incidence` of every row at every shift in one pass)."""
    m, C = u.shape
    if m == 0:
        return np.zeros(len(shifts))
    stacked = (u[None, :, :] + np.asarray(shifts, dtype=float)[:, None, :]).reshape(-1, C)
    F = row_incidence(stacked, D).reshape(len(shifts), m)
    return np.array([w @ F[j] for j in range(len(shifts))])


def _points(g: int) -> np.ndarray:
    """Chebyshev points of the second kind on [-1, 1], ``x_j = cos(pi j / (g - 1))``."""
    return np.cos(np.pi * np.arange(g) / (g - 1)) if g > 1 else np.zeros(1)


def _coefficients(values: np.ndarray) -> np.ndarray:
    """Chebyshev coefficients of the interpolant through ``values`` at the tensor grid of
    second-kind points (a type-I DCT along each axis with more than one point)."""
    c = values
    for ax, g in enumerate(values.shape):
        if g > 1:
            c = fft.dct(c, type=1, axis=ax) / (g - 1)
            edge = [slice(None)] * c.ndim
            for j in (0, g - 1):
                edge[ax] = slice(j, j + 1)
                c[tuple(edge)] /= 2.0
    return c


def _tails(c: np.ndarray) -> list[float]:
    """Per axis, the sum of |coefficients| whose index on that axis is in its top quarter."""
    out = []
    for ax, g in enumerate(c.shape):
        if g == 1:
            out.append(0.0)
            continue
        top = [slice(None)] * c.ndim
        top[ax] = slice(g - 1 - (g - 1) // 4, g)
        out.append(float(np.abs(c[tuple(top)]).sum()))
    return out


def _moments(x: np.ndarray, w: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
    """``sum_i w_i prod_c T_{j_c}(x_ic)`` for every index tuple ``j`` in ``shape`` (rows in
    blocks; the first axis contracted with the others' row-wise products by a matrix
    product)."""
    C = x.shape[1]
    M = np.zeros((shape[0], math.prod(shape[1:])))
    block = max(1, _CELLS // max(sum(shape), math.prod(shape[1:]), 1))
    for r0 in range(0, x.shape[0], block):
        xs = x[r0:r0 + block]
        bases = []
        for ax in range(C):
            g = shape[ax]
            T = np.empty((xs.shape[0], g))
            T[:, 0] = 1.0
            if g > 1:
                T[:, 1] = xs[:, ax]
            for j in range(2, g):
                T[:, j] = 2.0 * xs[:, ax] * T[:, j - 1] - T[:, j - 2]
            bases.append(T)
        rest = np.ones((xs.shape[0], 1))
        for T in bases[1:]:  # row-wise Kronecker products of the other axes
            rest = (rest[:, :, None] * T[:, None, :]).reshape(xs.shape[0], -1)
        M += (bases[0] * w[r0:r0 + block, None]).T @ rest
    return M.reshape(shape)


def _node_values(nodes: np.ndarray, shape: tuple[int, ...], coarser: list[np.ndarray],
                 shifts: np.ndarray, D: np.ndarray) -> list[np.ndarray]:
    """``F(log node + shift)`` at every node of the tensor grid ``nodes`` (``shape`` + (axes,))
    for each shift; ``coarser``: the values of the previous grid of the same box (empty at the
    first), whose nodes are this grid's nodes of even index along every axis whose degree
    doubled (second-kind points are nested: ``cos(pi 2j / 2m) = cos(pi j / m)``, the same
    floating-point node), so only the new nodes are evaluated."""
    if not coarser:
        flat = np.log(nodes.reshape(-1, len(shape)))
        return [row_incidence(flat + s, D).reshape(shape) for s in shifts]
    old = tuple(slice(None, None, 2) if n != m else slice(None)
                for n, m in zip(shape, coarser[0].shape, strict=True))
    new = np.ones(shape, dtype=bool)
    new[old] = False
    fresh = np.log(nodes[new])
    out = []
    for s, before in zip(shifts, coarser, strict=True):
        v = np.empty(shape)
        v[old] = before
        v[new] = row_incidence(fresh + s, D)
        out.append(v)
    return out


def _box_sums(r: np.ndarray, w: np.ndarray, shifts: np.ndarray, D: np.ndarray,
              budget: int) -> tuple[np.ndarray, int] | None:
    """The sums of one box of relative hazards ``r`` (rows, causes) and the nodes used; None
    when the interpolation does not settle within ``budget`` nodes."""
    lo, hi = r.min(axis=0), r.max(axis=0)
    g = [1 if h == low else _FIRST for low, h in zip(lo, hi, strict=True)]
    used = 0
    values: list[np.ndarray] = []
    while True:
        used += math.prod(g)  # the budget counts every node of every degree tried
        if used > budget:
            return None
        axes = [low + (h - low) * (1.0 + _points(n)) / 2.0
                for low, h, n in zip(lo, hi, g, strict=True)]
        nodes = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1)
        values = _node_values(nodes, tuple(g), values, shifts, D)
        coefs = [_coefficients(v) for v in values]
        tails = np.max([_tails(c) for c in coefs], axis=0)
        if np.all(tails <= TAIL):
            break
        g = [2 * n - 1 if t > TAIL else n for n, t in zip(g, tails, strict=True)]
    span = np.where(hi > lo, hi - lo, 1.0)
    x = np.clip(2.0 * (r - lo) / span - 1.0, -1.0, 1.0)
    M = _moments(x, w, tuple(g))
    return np.array([float(np.sum(c * M)) for c in coefs]), used


def interpolated_sums(u: np.ndarray, w: np.ndarray, shifts: np.ndarray,
                      D: np.ndarray) -> np.ndarray | None:
    """``sum_i w_i F(u_i + shifts[s])`` for each row ``s`` of ``shifts`` (module docstring) by
    tensor Chebyshev interpolation of ``F`` over boxes of the rows' relative hazards; None when
    the boxes are unsafe or the interpolation does not settle within :data:`MAX_NODES` nodes."""
    w = np.asarray(w, dtype=float)
    if u.shape[0] == 0:
        return np.zeros(len(shifts))
    if not np.all(np.isfinite(u)):
        return None
    hi = u.max(axis=0)
    with np.errstate(over="ignore"):
        top = max(float(np.max(np.exp(hi + s) @ D)) for s in shifts)
        r = np.exp(u)
    if not top <= FACTOR_LIMIT or not np.all(np.isfinite(r)):
        return None
    # panels: along cause c, widths of PANEL / (its cumulative baseline hazard at the larger
    # shift), so that r_c L_c varies by at most PANEL within a box
    scale = D.sum(axis=1) * np.exp(shifts.max(axis=0))
    lo = r.min(axis=0)
    idx = np.floor((r - lo) * scale / PANEL).astype(np.int64)
    key = np.ravel_multi_index(idx.T, tuple(idx.max(axis=0) + 1))
    order = np.argsort(key, kind="stable")
    cuts = np.flatnonzero(np.diff(key[order])) + 1
    out = np.zeros(len(shifts))
    budget = MAX_NODES
    for part in np.split(order, cuts):
        got = _box_sums(r[part], w[part], shifts, D, budget)
        if got is None:
            return None
        out += got[0]
        budget -= got[1]
    return out
