"""The exposure's effect by follow-up window: episode splitting at the windows' cuts and the Cox
fits with one exposure block per window.

Each row (at risk at t when entry < t <= time) becomes one episode per window it is at risk in:
the window (lo, hi] gives the episode (max(entry, lo), min(time, hi)], with the row's event only
in the episode that holds its time. The episodes' risk sets are the rows' (the engine's delayed
entry), so a model without window terms fitted on them is the unsplit model, likelihood and all.
The window model gives the exposure's columns one block per window (columns times the window's
indicator; a function of time alone needs no column, the baseline hazard absorbs it), the
adjusters one coefficient for all of follow-up; its likelihood-ratio test against the common
model, on (windows - 1) x columns df, asks whether the exposure's curve changes over follow-up."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..distributions import stats
from ..models.cox import fit_cox, prepare_layout


@dataclass(frozen=True)
class Episodes:
    """The split sample: for each episode its source ``row``, ``start`` (entry), ``stop`` (exit
    time), ``event`` and ``window`` index."""

    row: np.ndarray
    start: np.ndarray
    stop: np.ndarray
    event: np.ndarray
    window: np.ndarray


def window_labels(cuts: tuple[float, ...] | list[float]) -> list[str]:
    """"0-1", "1-3", "3+" for cuts [1, 3] (in the time variable's unit)."""
    edges = ["0", *(f"{c:g}" for c in cuts)]
    return [f"{a}-{b}" for a, b in zip(edges[:-1], edges[1:], strict=True)] + [f"{edges[-1]}+"]


def split_episodes(time: np.ndarray, event: np.ndarray, entry: np.ndarray | None,
                   cuts: tuple[float, ...] | list[float]) -> Episodes:
    """One episode per row and window the row is at risk in (see the module's notes). Rows
    without ``entry`` are at risk from before the first time; their first episode starts one
    unit below every time given (any value below all event times gives the same risk sets)."""
    t = np.asarray(time, dtype=float)
    e = np.asarray(event, dtype=float)
    origin = float(min(t.min(), entry.min() if entry is not None else t.min())) - 1.0
    en = np.full(t.shape, origin) if entry is None else np.asarray(entry, dtype=float)
    lows = np.r_[origin, np.asarray(cuts, dtype=float)]
    highs = np.r_[np.asarray(cuts, dtype=float), np.inf]
    parts = []
    for w, (lo, hi) in enumerate(zip(lows, highs, strict=True)):
        start = np.maximum(en, lo)
        stop = np.minimum(t, hi)
        keep = np.flatnonzero(stop > start)
        ev = e[keep] * (t[keep] <= hi)
        parts.append((keep, start[keep], stop[keep], ev, np.full(keep.size, w)))
    row, start, stop, ev, win = (np.concatenate(c) for c in zip(*parts, strict=True))
    return Episodes(row, start, stop, ev, win)


@dataclass(frozen=True)
class WindowFit:
    """The window model's exposure blocks (``coef[w]``, ``cov[w]``), the change-over-time LR
    test, and the (unweighted) events per window. ``message`` is "" when both fits are fine."""

    coef: list[np.ndarray]
    cov: list[np.ndarray]
    loglik: float
    loglik_common: float
    lr: float
    df: int
    p: float
    events: np.ndarray
    message: str


def fit_windows(E: np.ndarray, A: np.ndarray, time: np.ndarray, event: np.ndarray,
                entry: np.ndarray | None, strata: np.ndarray | None,
                weights: np.ndarray | None, cuts: tuple[float, ...] | list[float]) -> WindowFit:
    """Fit the common and the window model (Efron ties) of exposure columns ``E`` and adjuster
    columns ``A`` (rows of the sample) on the episodes split at ``cuts``."""
    ep = split_episodes(time, event, entry, cuts)
    W = len(cuts) + 1
    k = E.shape[1]
    events = np.bincount(ep.window[ep.event == 1], minlength=W)
    nan = float("nan")
    empty = [np.full(k, np.nan)] * W, [np.full((k, k), np.nan)] * W

    def failed(msg: str) -> WindowFit:
        return WindowFit(*empty, nan, nan, nan, (W - 1) * k, nan, events, msg)

    if (events == 0).any():
        labels = window_labels(cuts)
        none = [labels[w] for w in np.flatnonzero(events == 0)]
        return failed(f"no events in follow-up window(s) {none}; choose cuts within the "
                      "follow-up (outcome.follow_up_windows)")
    Ee, Ae = E[ep.row], A[ep.row]
    blocks = np.zeros((ep.row.size, W * k))
    for w in range(W):
        on = ep.window == w
        blocks[on, w * k:(w + 1) * k] = Ee[on]
    layout = prepare_layout(ep.stop, ep.event, entry=ep.start,
                            strata=None if strata is None else np.asarray(strata)[ep.row],
                            weights=None if weights is None else np.asarray(weights)[ep.row])
    common = fit_cox(np.column_stack([Ee, Ae]), None, None, layout=layout)
    if not common.converged:
        return failed(f"the model without windows did not fit: {common.message}")
    full = fit_cox(np.column_stack([blocks, Ae]), None, None, layout=layout)
    if not full.converged:
        return failed(f"the model with one exposure block per window did not fit: "
                      f"{full.message}")
    lr = float(2.0 * (full.loglik - common.loglik))
    df = (W - 1) * k
    coef = [full.coef[w * k:(w + 1) * k] for w in range(W)]
    cov = [full.cov[w * k:(w + 1) * k, w * k:(w + 1) * k] for w in range(W)]
    return WindowFit(coef, cov, float(full.loglik), float(common.loglik), lr, df,
                     float(stats.chi2.sf(max(lr, 0.0), df)), events, "")
