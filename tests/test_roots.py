"""unbin.roots.brentq against scipy.optimize.brentq (reference library): the same root, to the
bit, on smooth, steep, flat, tiny-valued and risk-curve-like functions, and the same errors."""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
import pytest
from scipy import optimize

from unbin.roots import brentq


def _functions() -> list[tuple[str, Callable[[float], float], float, float]]:
    rng = np.random.default_rng(20261204)
    out: list[tuple[str, Callable[[float], float], float, float]] = [
        ("cubic", lambda x: x**3 - 2 * x - 5, 2.0, 3.0),
        ("cosine", lambda x: math.cos(x) - x, 0.0, 1.0),
        ("steep", lambda x: math.exp(40 * (x - 0.3)) - 1, -1.0, 1.0),
        ("flat near the root", lambda x: (x - 0.7) ** 5, 0.0, 1.0),
        ("tiny values", lambda x: 1e-300 * (x - 0.25), 0.0, 1.0),
        ("root at a", lambda x: x - 1.0, 1.0, 2.0),
        ("root at b", lambda x: x - 2.0, 1.0, 2.0),
        ("decreasing", lambda x: 0.5 - x**2, 0.0, 1.0),
    ]
    for i in range(40):  # logistic risk curves crossing a threshold, as crossings() sees them
        b0, b1, b2 = rng.normal(-2, 1), rng.normal(0, 0.1), rng.normal(0, 0.002)
        t = float(rng.uniform(0.05, 0.5))

        def risk(x: float, b0: float = b0, b1: float = b1, b2: float = b2, t: float = t) -> float:
            return 1 / (1 + math.exp(-(b0 + b1 * (x - 140) + b2 * (x - 140) ** 2))) - t

        grid = np.linspace(110, 170, 400)
        h = np.array([risk(v) for v in grid])
        for j in np.flatnonzero((h[1:] >= 0) != (h[:-1] >= 0)):
            out.append((f"risk {i}", risk, float(grid[j]), float(grid[j + 1])))
    return out


@pytest.mark.parametrize("xtol,rtol", [(1e-13, 4 * np.finfo(float).eps), (2e-12, 1e-10),
                                       (1e-13, 8.9e-16), (1e-6, 4 * np.finfo(float).eps)])
def test_roots_match_scipy_to_the_bit(xtol: float, rtol: float) -> None:
    cases = _functions()
    assert len(cases) > 30
    for name, f, a, b in cases:
        ours = brentq(f, a, b, xtol=xtol, rtol=rtol, maxiter=500)
        ref = optimize.brentq(f, a, b, xtol=xtol, rtol=rtol, maxiter=500)
        assert ours == ref, (name, ours, ref)


def test_errors_match_scipy() -> None:
    for bad in ((lambda x: x * x + 1, -1.0, 1.0), (lambda x: math.nan, 0.0, 1.0)):
        with pytest.raises(ValueError):
            optimize.brentq(*bad)
        with pytest.raises(ValueError):
            brentq(*bad)
    with pytest.raises(RuntimeError):
        optimize.brentq(lambda x: math.cos(x) - x, 0.0, 1.0, maxiter=2)
    with pytest.raises(RuntimeError):
        brentq(lambda x: math.cos(x) - x, 0.0, 1.0, maxiter=2)
    with pytest.raises(ValueError):
        brentq(lambda x: x, -1.0, 1.0, xtol=0.0)
