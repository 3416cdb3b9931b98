"""The checks of the Cox engine's inputs: each invalid array raises a ``ValueError`` that names
the argument, the problem and the fix."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd


def _as_1d(
    name: str, values: Any, n: int | None, dtype: Any = float, rows_of: str = "X"
) -> np.ndarray:
    arr = np.asarray(values, dtype=dtype)
    if arr.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional, got shape {arr.shape}")
    if n is not None and arr.shape[0] != n:
        raise ValueError(f"{name} has {arr.shape[0]} values but {rows_of} has {n} rows")
    return arr


def _check_finite(name: str, arr: np.ndarray) -> None:
    if arr.size == 0 or np.isfinite(np.add.reduce(arr, axis=None)):
        return  # a finite sum means no NaN or infinity (fast path)
    bad = ~np.isfinite(arr)
    if bad.any():
        first = int(np.flatnonzero(bad.reshape(bad.shape[0], -1).any(axis=1))[0])
        raise ValueError(
            f"{name} has {int(bad.sum())} missing or infinite value(s) (first at row {first}); "
            "drop or impute those rows before fitting"
        )


def _event_array(event: Any, n: int | None) -> np.ndarray:
    raw = np.asarray(event)
    if raw.ndim != 1 or (n is not None and raw.shape[0] != n):
        raise ValueError(f"event must be one-dimensional with {n} values, got shape {raw.shape}")
    if raw.dtype == bool:
        return raw
    num = np.asarray(raw, dtype=float)
    ok = (num == 0) | (num == 1)
    if not ok.all():
        bad = num[~ok][:3]
        raise ValueError(
            f"event must be 0/1 (or boolean); found {int((~ok).sum())} other value(s), "
            f"e.g. {bad.tolist()}"
        )
    return num == 1


def _entry_array(entry: Any, t: np.ndarray) -> np.ndarray:
    """Entry times (delayed entry) checked against the exit times ``t``: one finite value per
    row, each below its row's time (a row is at risk at s when entry < s <= time)."""
    en = _as_1d("entry", entry, t.shape[0], rows_of="time")
    _check_finite("entry", en)
    late = ~(t > en)
    if late.any():
        first = int(np.flatnonzero(late)[0])
        raise ValueError(
            f"time must be greater than entry (delayed entry): {int(late.sum())} row(s) "
            f"have time <= entry, e.g. row {first} with entry={float(en[first])}, "
            f"time={float(t[first])}"
        )
    return en


def _stratum_codes(strata: Any, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Codes 0..S-1 of the strata labels (in sorted label order) and the labels."""
    labels = np.asarray(strata)
    if labels.ndim != 1 or labels.shape[0] != n:
        raise ValueError(f"strata must be one-dimensional with {n} values, got {labels.shape}")
    codes, uniq = pd.factorize(labels, sort=True)
    if (codes < 0).any():
        raise ValueError(f"strata has {int((codes < 0).sum())} missing value(s)")
    return codes, np.asarray(uniq)


def _positive_weights(weights: Any, n: int) -> np.ndarray:
    w = _as_1d("weights", weights, n)
    _check_finite("weights", w)
    if (w <= 0).any():
        raise ValueError(
            f"weights must be positive; {int((w <= 0).sum())} are zero or negative "
            "(drop those rows instead)"
        )
    return w


def _design(X: Any) -> np.ndarray:
    arr = np.asarray(X, dtype=float)
    if arr.ndim != 2:
        raise ValueError(f"X must be a 2-D (n, p) array, got shape {arr.shape}")
    return arr


@dataclass(frozen=True)
class _Sample:
    """One sample's checked arrays, in input order."""

    time: np.ndarray
    event: np.ndarray  # bool
    entry: np.ndarray | None
    weights: np.ndarray | None
    codes: np.ndarray | None  # stratum codes 0..S-1 (None without strata)
    labels: np.ndarray  # stratum labels (index = code); [0] without strata


def _checked_sample(
    n: int, time: Any, event: Any, entry: Any | None, strata: Any | None, weights: Any | None
) -> _Sample:
    """The arrays of one sample, checked: each raises a ``ValueError`` naming the argument, the
    problem and the fix."""
    t = _as_1d("time", time, n)
    _check_finite("time", t)
    e = _event_array(event, n)
    w = None if weights is None else _positive_weights(weights, n)
    en = None if entry is None else _entry_array(entry, t)
    if strata is None:
        return _Sample(t, e, en, w, None, np.array([0]))
    codes, labels = _stratum_codes(strata, n)
    return _Sample(t, e, en, w, codes.astype(np.int64), labels)
