"""The Breslow baseline cumulative hazard per stratum and the absolute risk by a horizon."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from .inputs import _as_1d, _check_finite, _design, _stratum_codes
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


class DrawnHorizon:
    """The Breslow baseline cumulative hazard at one horizon, per stratum, of any draw of one
    sample's rows (a bootstrap replicate: every row repeated as often as drawn, given as draw
    counts per row of the sample), from the sample's own unweighted layout, laid out once.

    A draw's event times are those of the sample holding a drawn event, and a drawn row is at
    risk at the sample's event times t_k with a_i < k <= b_i as in the sample (its entry and
    its time are the row's own), so the draw's risk-set sums are the sample's with each row
    counted as often as drawn: per row and model one ``exp`` and two weighted bincounts over
    the rows in their own order (no sort, no gather by the time order, no sparse operator), a
    reverse cumulative sum over the event times, and H0_s(h) = sum over the event times
    t_k <= h of stratum s of d_k / S0(t_k) (d_k the drawn events at t_k). An event time
    without a drawn event adds 0, so this is :func:`baseline_steps` of the repeated rows
    read at ``horizon`` (0 before a stratum's first drawn event time, held at its last one),
    up to the order of summation."""

    def __init__(self, layout: Layout, horizon: float, strata: Any | None = None):
        L = layout
        if not L.unit_w:
            raise ValueError("DrawnHorizon needs the unweighted layout of the sample")
        if L.n_strata > 1 and strata is None:
            raise ValueError(f"the layout has {L.n_strata} strata: give strata (one label "
                             "per row of the sample)")
        n, K = L.n, int(L.k_time.size)
        self.layout, self.n, self.K, self.horizon = L, n, K, float(horizon)
        b = L.b_idx - 1
        # each row's last event time at risk (K: at risk at no event time, a bin left out)
        self.b_row = np.full(n, K, dtype=np.intp)
        self.b_row[L.order] = b
        late = np.flatnonzero(L.a_idx)  # rows entered after their stratum's first event time
        self.late_rows = L.order[late]
        self.a_late = (L.a_idx[late] - 1).astype(np.intp)
        self.ev_rows = L.order[L.ev]
        self.ev_k = b[L.ev].astype(np.intp)
        self.upto = L.k_time <= self.horizon
        self.codes: np.ndarray | None = None  # each row's stratum code (None: one stratum)
        if L.n_strata > 1:
            codes, labels = _stratum_codes(strata, n)
            if not np.array_equal(labels, L.labels):
                raise ValueError("strata do not match the layout's strata labels")
            self.codes = codes.astype(np.intp)

    def cumhaz(self, eta: np.ndarray, counts: np.ndarray | None = None) -> np.ndarray:
        """H0_s(horizon) per stratum code (the layout's ``labels``) of the draw ``counts``
        (whole numbers, one per row of the sample; None: every row once), at covariates 0 on
        the scale of ``eta`` (one linear predictor per row of the sample; centre it on the
        draw, as :func:`baseline_steps`' callers do, so that ``exp`` neither overflows nor
        underflows)."""
        L, K = self.layout, self.K
        eta = np.asarray(eta, dtype=float)
        c = np.ones(self.n) if counts is None else np.asarray(counts, dtype=float)
        S = L.n_strata
        shift = None
        if eta.size and (eta.max() > 500.0 or eta.min() < -500.0):
            # each stratum by its largest drawn eta (as baseline_steps shifts it)
            drawn = c > 0
            shift = np.full(S, -np.inf)
            np.maximum.at(shift, np.zeros(self.n, dtype=np.intp) if self.codes is None
                          else self.codes, np.where(drawn, eta, -np.inf))
            shift[~np.isfinite(shift)] = 0.0
            r = np.exp(eta - (shift[0] if self.codes is None else shift[self.codes]))
        else:
            r = np.exp(eta)
        r *= c
        contrib = np.bincount(self.b_row, r, minlength=K + 1)[:K]
        if self.late_rows.size:
            contrib -= np.bincount(self.a_late, r[self.late_rows], minlength=K)
        s0 = _risk_sums(L, contrib[:, None])[0]
        d = np.bincount(self.ev_k, c[self.ev_rows], minlength=K)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            hazard = np.where((d > 0) & self.upto, d / s0, 0.0)
            if shift is not None:
                hazard = hazard * np.exp(-shift[L.k_stratum])
        return np.bincount(L.k_stratum, hazard, minlength=S)

    def per_row(self, per_stratum: np.ndarray) -> np.ndarray:
        """A value per stratum code (:meth:`cumhaz`) as one per row of the sample."""
        if self.codes is None:
            return np.full(self.n, per_stratum[0])
        return per_stratum[self.codes]


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
