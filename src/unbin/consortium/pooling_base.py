"""What every pooling function shares: the error it raises on input that cannot be pooled,
the checks of numeric arrays and variances, the normal critical value and read-only copies."""

from __future__ import annotations

import numpy as np
from scipy import stats

from unbin.errors import UnbinError


class PoolingInputError(UnbinError, ValueError):
    """Estimates or (co)variances handed to the pooling functions cannot be pooled."""


def _z_crit(level: float) -> float:
    if not 0.0 < level < 1.0:
        raise PoolingInputError(f"confidence level {level!r} must lie strictly between 0 and 1")
    return float(stats.norm.ppf(0.5 + level / 2.0))


def _frozen(a: np.ndarray) -> np.ndarray:
    a = np.array(a, copy=True)
    a.setflags(write=False)
    return a


def _as_float(name: str, value: object, ndim: int) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError) as exc:
        raise PoolingInputError(f"{name} must be numeric: {exc}") from None
    if arr.ndim != ndim:
        raise PoolingInputError(
            f"{name} must be a {ndim}-dimensional array, got shape {arr.shape}"
        )
    return arr


def _bad_variance_message(name: str, value: float, where: str) -> str:
    what = "not a number" if np.isnan(value) else "infinite" if np.isinf(value) else "not positive"
    return (
        f"{name} {where} is {value!r} ({what}); variances must be positive and finite "
        "— pass squared standard errors, and leave out cohorts whose estimate is unavailable"
    )
