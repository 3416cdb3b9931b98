"""The few distribution functions the fit, resampling and figure jobs use, from ``scipy.special``
— the functions ``scipy.stats`` itself evaluates for these distributions — with the argument
rules of ``scipy.stats`` (NaN for a parameter <= 0 or a NaN argument; the support's ends at
probabilities 0 and 1; 1 and 0 at the ends of the support for survival functions), so that
every value is the one ``scipy.stats`` returns (tests/test_distributions.py compares them,
edge cases included). Importing ``scipy.stats`` costs each workflow job about half a second of
CPU, most of it spent rewriting docstrings; these jobs need only this.

Use as ``from unbin.distributions import stats``: ``stats.chi2.sf(x, df)``,
``stats.chi2.ppf(q, df)``, ``stats.f.sf(x, dfn, dfd)``, ``stats.t.ppf(q, df)``,
``stats.norm.ppf(q)``, ``stats.norm.isf(q)``, ``stats.norm.pdf(x)``, ``stats.rankdata(a)``
(average ranks of the flattened array; all NaN when it holds a NaN).
"""

from __future__ import annotations

from collections.abc import Callable
from types import SimpleNamespace
from typing import Any

import numpy as np
from scipy import special

_NORM_PDF_C = np.sqrt(2 * np.pi)


def _prepare(x: Any, shapes: tuple[Any, ...]) -> tuple[np.ndarray, list[np.ndarray], np.ndarray]:
    x = np.asarray(x)
    x = np.asarray(x, dtype=np.promote_types(x.dtype, np.float64))
    arrays = np.broadcast_arrays(x, *(np.asarray(s) for s in shapes))
    ok = np.ones(arrays[0].shape, dtype=bool)
    for s in arrays[1:]:
        ok &= s > 0
    return arrays[0], list(arrays[1:]), ok


def _done(out: np.ndarray) -> Any:
    return out[()] if out.ndim == 0 else out


def _sf_positive(fn: Callable[..., Any]) -> Callable[..., Any]:
    """The survival function of a distribution on [0, inf) whose shape parameters are > 0."""
    def sf(x: Any, *shapes: Any) -> Any:
        x, s, ok = _prepare(x, shapes)
        out = np.zeros(x.shape, dtype=x.dtype)
        out[~ok | np.isnan(x)] = np.nan
        out[ok & (x <= 0)] = 1.0
        good = ok & (x > 0) & (x < np.inf)
        if good.any():
            out[good] = fn(*(a[good] for a in s), x[good])
        return _done(out)
    return sf


def _ppf(fn: Callable[..., Any], low: float, high: float) -> Callable[..., Any]:
    """The quantile function of a distribution on (low, high) whose shape parameters are > 0."""
    def ppf(q: Any, *shapes: Any) -> Any:
        q, s, ok = _prepare(q, shapes)
        out = np.full(q.shape, np.nan)
        out[ok & (q == 0)] = low
        out[ok & (q == 1)] = high
        good = ok & (q > 0) & (q < 1)
        if good.any():
            out[good] = fn(*(a[good] for a in s), q[good])
        return _done(out)
    return ppf


def _norm_isf(q: Any) -> Any:
    q, _, ok = _prepare(q, ())
    out = np.full(q.shape, np.nan)
    out[ok & (q == 0)] = np.inf
    out[ok & (q == 1)] = -np.inf
    good = ok & (q > 0) & (q < 1)
    if good.any():
        out[good] = -special.ndtri(q[good])
    return _done(out)


def _norm_pdf(x: Any) -> Any:
    x, _, _ = _prepare(x, ())
    out = np.exp(-x**2 / 2.0) / _NORM_PDF_C
    return _done(np.asarray(out, dtype=x.dtype))


def _rankdata(a: Any) -> np.ndarray:
    x = np.asarray(a).ravel()
    if x.dtype.kind == "f" and np.isnan(x).any():
        return np.full(x.size, np.nan)
    order = np.argsort(x, kind="mergesort")
    y = x[order]
    first = np.r_[True, y[1:] != y[:-1]]
    start = np.flatnonzero(first)
    count = np.diff(np.r_[start, x.size])
    average = start + (count + 1) / 2.0  # ranks start + 1 .. start + count
    ranks = np.empty(x.size)
    ranks[order] = np.repeat(average, count)
    return ranks


stats = SimpleNamespace(
    chi2=SimpleNamespace(sf=_sf_positive(special.chdtrc),
                         ppf=_ppf(lambda df, q: 2 * special.gammaincinv(df / 2, q), 0.0, np.inf)),
    f=SimpleNamespace(sf=_sf_positive(special.fdtrc)),
    t=SimpleNamespace(ppf=_ppf(special.stdtrit, -np.inf, np.inf)),
    norm=SimpleNamespace(ppf=_ppf(special.ndtri, -np.inf, np.inf), isf=_norm_isf, pdf=_norm_pdf),
    rankdata=_rankdata,
)
