"""The Breslow baseline cumulative hazard per stratum and the absolute risk by a horizon."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from .inputs import _as_1d, _check_finite, _design
from .layout import Layout, _design_and_layout, _forward_cum, _risk_sums, _shifted_eta


def baseline_cumhaz(
    X: Any,
    time: Any,
    event: Any,
    coef: Any,
    *,
    entry: Any | None = None,
    strata: Any | None = None,
    weights: Any | None = None,
    layout: Layout | None = None,
) -> pd.DataFrame:
    """Breslow estimate of the baseline cumulative hazard, per stratum.

    Returns a long table with columns ``stratum`` (the strata labels; 0 without strata),
    ``time`` (each distinct event time of the stratum, increasing) and ``cumhaz``:
    H0(t) = sum over event times t_k <= t of (summed event weights at t_k) /
    (sum over the risk set at t_k of w_i exp(x_i coef)), with the risk set honouring delayed
    entry. The baseline is at covariates = 0 on the scale of X (NOT at the covariate means),
    so ``H(t | x) = H0(t) exp(x coef)``. The Breslow form is used whichever ties method fitted
    ``coef``. If x = 0 is far outside the data, H0 may underflow: centre X first.
    ``layout`` is as for :func:`fit_cox`.
    """
    stratum, times, cum = baseline_steps(X, time, event, coef, entry=entry, strata=strata,
                                         weights=weights, layout=layout)
    return pd.DataFrame({"stratum": stratum, "time": times, "cumhaz": cum})


def baseline_steps(
    X: Any,
    time: Any,
    event: Any,
    coef: Any,
    *,
    entry: Any | None = None,
    strata: Any | None = None,
    weights: Any | None = None,
    layout: Layout | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The columns of :func:`baseline_cumhaz` as arrays (stratum, time, cumhaz), for callers
    that need many baselines (a bootstrap) and no table."""
    Xa, L = _design_and_layout(X, layout, time, event, entry, strata, weights)
    p = Xa.shape[1]
    b = _as_1d("coef", coef, None)
    if b.shape[0] != p:
        raise ValueError(f"coef has {b.shape[0]} values but X has {p} columns")
    _check_finite("coef", b)
    eta = Xa[L.order] @ b if p else np.zeros(L.order.size)
    shifted = _shifted_eta(L, eta.copy())
    s0 = _risk_sums(L, np.asarray(L.risk_op @ (L.w * np.exp(shifted)))[:, None])[0]
    K = L.wsum.size
    if K == 0:
        return L.labels[:0], np.zeros(0), np.zeros(0)
    # undo the per-stratum shift of eta: H0 = sum(W / S0_shifted) * exp(-shift); the strata
    # with rows at risk are exactly those with event times, in code order
    shift_of_stratum = np.zeros(L.n_strata)
    shift_of_stratum[np.unique(L.k_stratum)] = eta[L.row_starts] - shifted[L.row_starts]
    with np.errstate(over="ignore", under="ignore"):
        hazard = L.wsum / s0 * np.exp(-shift_of_stratum[L.k_stratum])
    cum = _forward_cum(L, hazard)[1:]
    return L.labels[L.k_stratum], L.k_time, cum


def predict_risk(
    X_new: Any,
    coef: Any,
    cumhaz_df: pd.DataFrame,
    horizon: Any,
    strata_new: Any | None = None,
) -> np.ndarray:
    """Absolute risk of the event by ``horizon``: 1 - exp(-H0(horizon) exp(x coef)).

    ``cumhaz_df`` is the output of :func:`baseline_cumhaz`. H0 is the step function through
    its values (0 before the first event time; constant after the last one, so horizons beyond
    the follow-up are not extrapolated). ``horizon`` is a scalar or one value per row.
    ``strata_new`` gives each row's stratum label; it may be omitted when there is one stratum.
    """
    Xa = _design(X_new)
    b = _as_1d("coef", coef, None)
    if b.shape[0] != Xa.shape[1]:
        raise ValueError(f"coef has {b.shape[0]} values but X_new has {Xa.shape[1]} columns")
    m = Xa.shape[0]
    hz = np.broadcast_to(np.asarray(horizon, dtype=float), (m,))
    labels = pd.unique(cumhaz_df["stratum"])
    if strata_new is None:
        if labels.size > 1:
            raise ValueError(
                f"the baseline has {labels.size} strata; give strata_new (one label per row)"
            )
        st = np.zeros(m, dtype=np.int64)
    else:
        s_arr = np.asarray(strata_new)
        if s_arr.shape != (m,):
            raise ValueError(f"strata_new must have one label per row ({m}), got {s_arr.shape}")
        st = pd.Index(labels).get_indexer(s_arr)
        if (st < 0).any():
            unknown = pd.unique(s_arr[st < 0])[:5].tolist()
            raise ValueError(f"strata_new has labels without a baseline: {unknown}")
    h0 = np.zeros(m)
    for j, lab in enumerate(labels):
        rows = st == j
        if not rows.any():
            continue
        part = cumhaz_df[cumhaz_df["stratum"] == lab]
        t = part["time"].to_numpy(dtype=float)
        c = part["cumhaz"].to_numpy(dtype=float)
        pos = np.searchsorted(t, hz[rows], side="right") - 1
        h0[rows] = np.where(pos >= 0, c[np.maximum(pos, 0)], 0.0)
    with np.errstate(over="ignore"):
        cumhaz = h0 * np.exp(Xa @ b)
    return np.asarray(-np.expm1(-cumhaz), dtype=float)
