"""Contrasts of a fitted exposure form between exposure values, with delta-method intervals.

For a form with basis B and exposure coefficients b (covariance V), the contrast between x1 and
x0 is (B(x1) - B(x0)) b, with variance d V d' for d = B(x1) - B(x0). Exact for every linear
predictor scale; ratios are exp() of it. Outside a form's domain (a fractional polynomial below
its origin, e.g. on a grid shared with cohorts whose exposure reaches lower) it is NaN."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..distributions import stats
from ..models import RATIO_FAMILIES
from .analysis import FormFit

Z95 = float(stats.norm.ppf(0.975))


def contrast(f: FormFit, x1: np.ndarray, x0: float | np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    x1 = np.atleast_1d(np.asarray(x1, dtype=float))
    x0a = np.broadcast_to(np.atleast_1d(np.asarray(x0, dtype=float)), x1.shape)
    if not f.result.ok:
        return np.full(x1.shape, np.nan), np.full(x1.shape, np.nan)
    b, V = f.exposure_coef()
    if b.size == 0:
        return np.zeros(x1.shape), np.zeros(x1.shape)
    ok = domain(f, x1) & domain(f, x0a)
    est, se = np.full(x1.shape, np.nan), np.full(x1.shape, np.nan)
    if ok.any():
        D = f.exposure_basis(x1[ok]) - f.exposure_basis(x0a[ok])
        est[ok] = D @ b
        var = np.einsum("ij,jk,ik->i", D, V, D)
        se[ok] = np.sqrt(np.clip(var, 0.0, None))
    return est, se


def domain(f: FormFit, x: np.ndarray) -> np.ndarray:
    """Where every exposure term of ``f`` is defined (a fractional polynomial only above its
    origin); a contrast involving a value outside is missing (NaN), not an error."""
    ok = np.ones(np.shape(x), dtype=bool)
    for t in f.exposure_terms:
        in_domain = getattr(t, "in_domain", None)
        if in_domain is not None:
            ok &= in_domain(x)
    return ok


def with_interval(df: pd.DataFrame, family: str, prefix: str = "") -> pd.DataFrame:
    """Add lower/upper on the model scale and effect/effect_lower/effect_upper on the reported
    scale (exp for ratio families)."""
    est, se = df[f"{prefix}estimate"], df[f"{prefix}se"]
    lo, hi = est - Z95 * se, est + Z95 * se
    df[f"{prefix}lower"], df[f"{prefix}upper"] = lo, hi
    tr = np.exp if family in RATIO_FAMILIES else (lambda v: v)
    df[f"{prefix}effect"] = tr(est)
    df[f"{prefix}effect_lower"] = tr(lo)
    df[f"{prefix}effect_upper"] = tr(hi)
    return df
