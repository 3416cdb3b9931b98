"""Decision curves, one table per analysis (``net_benefit``).

Vickers & Elkin 2006, Med Decis Making 26:565, over the threshold probabilities in
:data:`NB_GRID` for treat-all, treat-none, the legacy rules (exposure beyond the legacy cut(s), on
the side away from the reference group) and the risk rules of the fitted models (treat when the predicted risk is at least the threshold). Binary outcomes:
NB = TP/n - FP/n * p_t/(1-p_t). Survival outcomes, at the horizon, with Kaplan-Meier estimates
(Vickers, Cronin, Elkin & Gonen 2008, BMC Med Inform Decis Mak 8:53):
NB = (1 - S(h | positive)) P(positive) - S(h | positive) P(positive) p_t/(1-p_t); the
Kaplan-Meier estimate honours delayed entry and ignores strata. With competing events the
event probability is the Aalen–Johansen cumulative incidence F(h | positive) in place of
1 - S(h | positive) (net benefit under competing risks; Aalen & Johansen 1978 for the estimate).
Count and continuous outcomes
have no event probability, so no net benefit (a row says so). The risk rules are evaluated on
the rows their models were fitted to: apparent net benefit, optimistic for a fitted model.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from ..models.compiled import wanted
from ..refit.analysis import Refit
from ..spec import Spec
from ..terms import GroupedTerm
from .decisions import EVENT_FAMILIES, decision_models, design_not_used, finish

NB_GRID = np.arange(1, 100) / 100.0
APPARENT = ("apparent: the model was fitted to these rows, so its net benefit is optimistic "
            "(no validation)")


def net_benefit_counts(y: np.ndarray, positive: np.ndarray,
                       thresholds: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Binary outcome: (NB, TP/n, FP/n) per threshold, for ``positive`` of shape (n,) (one rule
    at every threshold) or (thresholds, n). Vickers & Elkin 2006."""
    y = np.asarray(y, dtype=float)
    n = len(y)
    positive = np.asarray(positive, dtype=float)
    if positive.ndim == 1:  # one rule at every threshold: its counts once (no thresholds x n
        # matrix; whole numbers, so the same sums as each row of that matrix would give)
        tp = np.full(len(thresholds), positive @ y) / n
        fp = np.full(len(thresholds), positive @ (1.0 - y)) / n
    else:
        pos = np.broadcast_to(positive, (len(thresholds), n))
        tp = pos @ y / n
        fp = pos @ (1.0 - y) / n
    return tp - fp * thresholds / (1.0 - thresholds), tp, fp


# From this many rows the places of :func:`threshold_counts` are counted by one compiled pass
# (``unbin.models.compiled.threshold_counts``) instead of ``searchsorted`` and ``bincount``
# (DEVELOPERS.md, "Compiled kernels").
THRESHOLD_COUNTS_FROM_ROWS = 50_000


def threshold_counts(y: np.ndarray, risk: np.ndarray, thresholds: np.ndarray,
                     counts: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, int]:
    """(events, non-events, n): the rows (or, with ``counts``, the copies of the rows: row i
    repeated ``counts[i]`` times) whose ``risk`` is at or above each threshold, by outcome
    ``y`` (bool), and all the rows (copies). One pass for every threshold: each row's place
    among the sorted thresholds (how many are at or below its risk, a binary search; a risk
    equal to a threshold is at or above it) is counted by outcome, and the rows at or above
    the j-th threshold are those with a place beyond j, a running sum from the top. A risk that
    is not a number (a prediction that overflowed) leaves the rule undefined: every count is
    NaN, so its net benefit is NaN rather than counting that row as treated at every threshold.
    Whole numbers (below 2^53 also as float sums): exact in any order."""
    thresholds = np.asarray(thresholds, dtype=float)
    n_t = thresholds.size
    if np.isnan(risk).any():
        n_rows = int(y.size) if counts is None else int(round(float(np.sum(counts))))
        return np.full(n_t, np.nan), np.full(n_t, np.nan), n_rows
    up = np.argsort(thresholds, kind="stable")
    c = None if counts is None else np.asarray(counts)
    n = int(y.size) if c is None else int(round(float(c.sum())))
    if n_t and wanted(y.size, THRESHOLD_COUNTS_FROM_ROWS) and (c is None or c.dtype.kind in "iu"):
        from ..models.compiled.threshold_counts import place_counts

        weights = np.zeros(0, dtype=np.int64) if c is None else c.astype(np.int64, copy=False)
        hist = place_counts(np.ascontiguousarray(thresholds[up]), risk, y, weights)
    else:
        place = np.searchsorted(thresholds[up], risk, side="right")
        key = 2 * place + y  # (place, outcome) -> one bin
        hist = np.bincount(key, weights=c, minlength=2 * (n_t + 1)).reshape(n_t + 1, 2)
    events, others = _at_or_above(hist, up)
    return events, others, n


def _at_or_above(hist: np.ndarray, up: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(events, non-events) at or above each threshold (in the given order; ``up`` sorts the
    thresholds) from the copies at each place among the sorted thresholds (``hist``
    (thresholds + 1, 2), by outcome): a running sum from the top."""
    n_t = up.size
    at_or_above = np.cumsum(hist[::-1], axis=0)[::-1]  # the rows at places >= b
    events = np.empty(n_t, dtype=float)
    others = np.empty(n_t, dtype=float)
    events[up] = at_or_above[1:, 1]
    others[up] = at_or_above[1:, 0]
    return events, others


def net_benefit_risk(y: np.ndarray, risk: np.ndarray, thresholds: np.ndarray,
                     counts: np.ndarray | None = None,
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``net_benefit_counts`` of the rules "treat when risk >= p_t" at every threshold, from
    :func:`threshold_counts` (no thresholds x n matrix, no sort of the risks).
    ``counts``: the data set in which row i is repeated ``counts[i]`` times (a bootstrap
    replicate's drawn rows), the same numbers as on the repeated rows, without repeating
    them."""
    y = np.asarray(y, dtype=float) > 0
    risk = np.asarray(risk, dtype=float)
    thresholds = np.asarray(thresholds, dtype=float)
    events, others, n = threshold_counts(y, risk, thresholds, counts)
    tp = events / n
    fp = others / n
    return tp - fp * thresholds / (1.0 - thresholds), tp, fp


# From this many rows :func:`logistic_rules_drawn_and_full` is one compiled pass
# (``unbin.models.compiled.risk_places``) instead of the risks and two ``threshold_counts``.
RISK_PLACES_FROM_ROWS = 50_000


def logistic_rules_drawn_and_full(y: np.ndarray, z: np.ndarray, thresholds: np.ndarray,
                                  counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The net benefits (:func:`net_benefit_risk`'s first array) of the rules "treat when
    ``expit(z)`` >= p_t" (``z`` the log odds of a logistic model) in the data set in which row
    i is repeated ``counts[i]`` times (a bootstrap replicate's drawn rows, whole numbers) and
    in the rows as they are: the same numbers as ``net_benefit_risk`` of
    ``scipy.special.expit(z)`` with ``counts`` and without. From ``RISK_PLACES_FROM_ROWS``
    rows one compiled pass for both (``unbin.models.compiled.risk_places``: the log odds
    compared with each threshold's, the risk computed only near one)."""
    y = np.asarray(y)
    y = y if y.dtype == np.bool_ else y > 0
    z = np.asarray(z, dtype=float)
    thresholds = np.asarray(thresholds, dtype=float)
    c = np.asarray(counts)
    if thresholds.size and wanted(z.size, RISK_PLACES_FROM_ROWS) and c.dtype.kind in "iu":
        from ..models.compiled.risk_places import risk_place_counts

        up = np.argsort(thresholds, kind="stable")
        status, hist = risk_place_counts(np.ascontiguousarray(thresholds[up]),
                                         np.ascontiguousarray(z), y,
                                         c.astype(np.int64, copy=False))
        if status == 0:
            out = []
            for k, n in ((0, int(c.sum())), (1, int(z.size))):
                events, others = _at_or_above(hist[:, :, k], up)
                tp, fp = events / n, others / n
                out.append(tp - fp * thresholds / (1.0 - thresholds))
            return out[0], out[1]
    from scipy import special

    risk = np.asarray(special.expit(z))
    return (net_benefit_risk(y, risk, thresholds, c)[0],
            net_benefit_risk(y, risk, thresholds)[0])


def reweighted(tp: np.ndarray, fp: np.ndarray, y: np.ndarray, prevalence: float,
               thresholds: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A case-control extract's (NB, TP/n, FP/n) in the population: the true-positive fraction
    is sensitivity x prevalence and the false-positive one (1 - specificity) x (1 - prevalence)
    (the sample's TP/n and FP/n rescaled from its own case fraction)."""
    ybar = float(np.mean(y))
    tp_pop = tp * prevalence / ybar
    fp_pop = fp * (1.0 - prevalence) / (1.0 - ybar)
    return tp_pop - fp_pop * thresholds / (1.0 - thresholds), tp_pop, fp_pop


def km_survival(time: np.ndarray, event: np.ndarray, horizon: float,
                entry: np.ndarray | None = None) -> float:
    """Kaplan-Meier estimate of S(horizon): the product over event times u <= horizon of
    1 - d_u / n_u, with n_u the rows at risk (entry < u <= time). 1 before the first event."""
    t = np.asarray(time, dtype=float)
    e = np.asarray(event, dtype=float) > 0
    if t.size == 0:
        return float("nan")
    u, d = np.unique(t[e & (t <= horizon)], return_counts=True)
    if u.size == 0:
        return 1.0
    exited = np.searchsorted(np.sort(t), u, side="left")  # rows with time < u
    if entry is None:
        entered = np.full(u.size, t.size)
    else:
        entered = np.searchsorted(np.sort(np.asarray(entry, dtype=float)), u, side="left")
    at_risk = entered - exited
    return float(np.prod(1.0 - d / at_risk))


class TimeOrder:
    """One sample's rows sorted once by time (and by entry), for Kaplan-Meier estimates on
    many subsets of its rows: a subset's times in time order are the sorted rows picked by its
    mask in that order, so :meth:`steps` needs no sort of its own (the net benefit's 99
    thresholds per rule and the calibration's tenths would otherwise sort the subset's times
    and entries for each). Its counts are :func:`km_survival`'s whole numbers at the same
    event times, so the estimates are the same to the bit."""

    def __init__(self, time: np.ndarray, event: np.ndarray, entry: np.ndarray | None = None):
        t = np.asarray(time, dtype=float)
        self.n = t.size
        self.by_time = np.argsort(t, kind="stable")
        self.time = t[self.by_time]
        self.event = (np.asarray(event, dtype=float) > 0)[self.by_time]
        self.by_entry: np.ndarray | None = None
        self.entry: np.ndarray | None = None
        self._entry_rows: np.ndarray | None = None  # as given (row order)
        if entry is not None:
            en = np.asarray(entry, dtype=float)
            self.by_entry = np.argsort(en, kind="stable")
            self.entry = en[self.by_entry]
            self._entry_rows = en

    def in_order(self, values: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
        """``values`` (one per row) in time order and in entry order (None without entry)."""
        v = np.asarray(values)
        return v[self.by_time], None if self.by_entry is None else v[self.by_entry]

    def steps(self, horizon: float, by_time: np.ndarray, by_entry: np.ndarray | None = None,
              ) -> tuple[np.ndarray, np.ndarray]:
        """(events d_u, rows at risk n_u) at the subset's event times u <= horizon, in time
        order; the subset is given by its row mask in time order and, with entry, in entry
        order (:meth:`in_order`)."""
        t = self.time[by_time]
        hit = t[self.event[by_time] & (t <= horizon)]  # event times up to h, sorted
        if hit.size == 0:
            empty = np.zeros(0, dtype=np.int64)
            return empty, empty
        first = np.flatnonzero(np.concatenate(([True], hit[1:] != hit[:-1])))
        u = hit[first]
        d = np.diff(np.append(first, hit.size))
        exited = np.searchsorted(t, u, side="left")  # rows with time < u
        if self.entry is None:
            entered = np.full(u.size, t.size)
        else:
            assert by_entry is not None
            entered = np.searchsorted(self.entry[by_entry], u, side="left")
        return d, entered - exited

    def survival_at_or_above(self, horizon: float, risk: np.ndarray,
                             thresholds: np.ndarray) -> np.ndarray:
        """:func:`km_survival` among the rows whose ``risk`` is at least each threshold (NaN
        where there are none), for all thresholds at once: the rules "treat when risk >= p_t"
        treat nested sets, so the at-risk and event counts at the sample's event times up to
        the horizon are counted once for all rows and then lose the rows below each next
        threshold. A subset's product runs over the times where it has events, with the same
        whole numbers as its own count (an event time of the sample without an event of the
        subset is left out, as it is absent from the subset's own times): the same estimate,
        bit for bit."""
        t, e = self.time, self.event
        hit = t[e & (t <= horizon)]
        first = np.flatnonzero(np.concatenate(([True], hit[1:] != hit[:-1]))) if hit.size \
            else np.zeros(0, dtype=np.int64)
        grid = hit[first]
        K = grid.size
        # in time order: a row is at risk at the grid times lo <= k < hi, and its event (up to
        # the horizon) is at grid time hi - 1
        hi = np.searchsorted(grid, t, side="right")
        lo = (np.zeros(t.size, dtype=np.int64) if self._entry_rows is None
              else np.searchsorted(grid, self._entry_rows[self.by_time], side="right"))
        at = np.where(e & (t <= horizon), hi - 1, -1)
        risk_t = np.asarray(risk, dtype=float)[self.by_time]
        by_risk = np.argsort(risk_t, kind="stable")  # a missing risk last: never treated
        valid = int(np.count_nonzero(~np.isnan(risk_t)))
        by_risk = by_risk[:valid]
        cuts = np.searchsorted(risk_t[by_risk], thresholds, side="left")
        rows = by_risk if valid < t.size else slice(None)
        enter = np.bincount(lo[rows], minlength=K + 1)
        leave = np.bincount(hi[rows], minlength=K + 1)
        ev = at[rows]
        events = np.bincount(ev[ev >= 0], minlength=K)
        out = np.full(len(thresholds), np.nan)
        gone, value = 0, float("nan")
        for g in np.argsort(thresholds, kind="stable"):  # ever fewer rows
            cut = int(cuts[g])
            if cut > gone:
                out_rows = by_risk[gone:cut]
                enter -= np.bincount(lo[out_rows], minlength=K + 1)
                leave -= np.bincount(hi[out_rows], minlength=K + 1)
                ev = at[out_rows]
                events -= np.bincount(ev[ev >= 0], minlength=K)
                value = float("nan")
                gone = cut
            if gone == valid:
                break
            if np.isnan(value):
                has = events > 0
                if not has.any():
                    value = 1.0
                else:
                    at_risk = np.cumsum(enter - leave)[:K]
                    value = float(np.prod(1.0 - events[has] / at_risk[has]))
            out[g] = value
        return out

    def survival(self, horizon: float, by_time: np.ndarray,
                 by_entry: np.ndarray | None = None) -> float:
        """:func:`km_survival` of the subset (masks as in :meth:`steps`)."""
        if not by_time.any():
            return float("nan")
        d, at_risk = self.steps(horizon, by_time, by_entry)
        if d.size == 0:
            return 1.0
        return float(np.prod(1.0 - d / at_risk))


def cif_at(time: np.ndarray, cause: np.ndarray, event_of_interest: int, horizon: float,
           entry: np.ndarray | None = None) -> float:
    """The Aalen–Johansen cumulative incidence of ``event_of_interest`` at ``horizon``."""
    from ..models.competing import aalen_johansen, step_at

    aj = aalen_johansen(time, cause, event_of_interest, entry=entry)
    return float(step_at(aj["time"].to_numpy(), aj["cif"].to_numpy(), horizon))


def net_benefit_km(time: np.ndarray, event: np.ndarray, entry: np.ndarray | None,
                   positive: np.ndarray, horizon: float,
                   thresholds: np.ndarray, risk: np.ndarray | None = None,
                   cause: np.ndarray | None = None, event_of_interest: int = 1,
                   order: TimeOrder | None = None,
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Survival outcome at ``horizon``: (NB, (1 - S+) P+, S+ P+) per threshold (Vickers et al.
    2008), ``positive`` of shape (n,) or (thresholds, n); with ``risk`` (n,), the rules "treat
    when risk >= p_t" instead (``positive`` is then ignored; one row mask at a time). A rule
    treating nobody has NB 0. With ``cause`` (competing events), S+ is one minus the
    Aalen–Johansen cumulative incidence of ``event_of_interest`` among the treated.
    ``order``: the sample's :class:`TimeOrder` (made here when not given), which every rule
    of one sample can share; the Kaplan-Meier estimates are those of :func:`km_survival`."""
    if cause is not None:
        return _net_benefit_competing(time, cause, event_of_interest, entry, positive,
                                      horizon, thresholds, risk)
    if order is None:
        order = TimeOrder(time, event, entry)
    tp = np.zeros(len(thresholds))
    fp = np.zeros(len(thresholds))
    if risk is not None:  # nested rules: every threshold's estimate in one pass
        risk = np.asarray(risk, dtype=float)
        surv = order.survival_at_or_above(horizon, risk, np.asarray(thresholds, dtype=float))
        for g in range(len(thresholds)):
            share = float((risk >= thresholds[g]).mean())
            if share == 0:
                continue
            tp[g], fp[g] = (1.0 - surv[g]) * share, surv[g] * share
        return tp - fp * thresholds / (1.0 - thresholds), tp, fp
    cache: dict[bytes, tuple[float, float]] = {}
    pos = np.broadcast_to(np.asarray(positive, dtype=bool), (len(thresholds), len(time)))
    for g in range(len(thresholds)):
        by_time, by_entry = order.in_order(pos[g])
        share = float(by_time.mean())
        if share == 0:
            continue
        key = np.packbits(by_time).tobytes()
        if key not in cache:
            s = order.survival(horizon, by_time, by_entry)
            cache[key] = ((1.0 - s) * share, s * share)
        tp[g], fp[g] = cache[key]
    return tp - fp * thresholds / (1.0 - thresholds), tp, fp


def _net_benefit_competing(time: np.ndarray, cause: np.ndarray, event_of_interest: int,
                           entry: np.ndarray | None, positive: np.ndarray, horizon: float,
                           thresholds: np.ndarray, risk: np.ndarray | None,
                           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`net_benefit_km` with competing events (Aalen–Johansen among the treated)."""
    pos = np.broadcast_to(np.asarray(positive, dtype=bool), (len(thresholds), len(time)))
    tp = np.zeros(len(thresholds))
    fp = np.zeros(len(thresholds))
    cache: dict[bytes, tuple[float, float]] = {}
    for g in range(len(thresholds)):
        mask = pos[g] if risk is None else risk >= thresholds[g]
        share = float(mask.mean())
        if share == 0:
            continue
        key = np.packbits(mask).tobytes()
        if key not in cache:
            sub_entry = None if entry is None else entry[mask]
            s = 1.0 - cif_at(time[mask], cause[mask], event_of_interest, horizon, sub_entry)
            cache[key] = ((1.0 - s) * share, s * share)
        tp[g], fp[g] = cache[key]
    return tp - fp * thresholds / (1.0 - thresholds), tp, fp


def legacy_rules(term: GroupedTerm, x: np.ndarray) -> list[tuple[str, np.ndarray]]:
    """Rules that treat exposure beyond the legacy cut(s), on the side away from the reference
    group: one for the reference group's complement, and one per cut when there are several."""
    codes = term.codes(x)
    ref, cuts, v = term.reference, term.cuts, term.variable
    low, high = ("<", ">=") if term.closed == "left" else ("<=", ">")

    def side(j: int) -> tuple[str, np.ndarray]:
        if ref <= j:
            return f"{v} {high} {cuts[j]:g}", codes > j
        return f"{v} {low} {cuts[j]:g}", codes <= j

    parts = [side(j) for j in (ref - 1, ref) if 0 <= j < len(cuts)]
    rules = [("legacy: " + " or ".join(p[0] for p in parts), codes != ref)]
    if len(cuts) > 1:
        rules += [(f"legacy: {name}", mask) for name, mask in map(side, range(len(cuts)))
                  if not np.array_equal(mask, rules[0][1])]
    return rules


COLUMNS = ("rule", "rule_type", "model", "adjustment", "threshold", "net_benefit", "treated",
              "true_positive", "false_positive", "risk_scale", "horizon", "method", "n", "status",
              "reason", "note", "caution")


def net_benefit_table(r: Refit, spec: Spec) -> pd.DataFrame:
    """Decision curves: net benefit of treat-all, treat-none, legacy and risk rules."""
    d = decision_models(r, spec)
    base: dict[str, Any] = {"risk_scale": d.scale.label, "horizon": d.scale.horizon,
                            "n": len(r.x)}
    if r.family not in EVENT_FAMILIES:
        return finish([{**base, "status": "skipped", "reason":
                         f"net benefit needs the probability of an event (binary or survival "
                         f"outcome); a {r.family} outcome has none ({d.scale.label})"}],
                       COLUMNS)
    if d.reason:
        return finish([{**base, "status": "skipped", "reason": d.reason}], COLUMNS)
    pt = NB_GRID
    o = r.outcome
    held = ""
    y = np.asarray(o.y, dtype=float)
    prevalence = r.analysis.design.prevalence if r.family == "binary" else None
    if r.family == "binary":
        method = "events/n"
        if prevalence is not None:
            method = f"events/n, cases and controls reweighted to the prevalence {prevalence:g}"

        def nb(positive: np.ndarray, risk: np.ndarray | None = None,
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
            out = (net_benefit_risk(y, risk, pt) if risk is not None
                   else net_benefit_counts(y, positive, pt))
            return out if prevalence is None else reweighted(out[1], out[2], y, prevalence, pt)
    else:
        assert o.time is not None and d.scale.horizon is not None
        estimator = "Kaplan-Meier" if o.cause is None else "Aalen-Johansen"
        method = f"{estimator} at {d.scale.horizon:g}"
        h = d.scale.horizon
        time, entry = np.asarray(o.time, dtype=float), o.entry
        order = TimeOrder(time, y, entry) if o.cause is None else None  # one for every rule
        if h > time.max():
            held = (f"the horizon {h:g} is past the longest follow-up ({time.max():g}): "
                    f"{estimator} held at its last value")

        def nb(positive: np.ndarray, risk: np.ndarray | None = None,
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
            return net_benefit_km(time, y, entry, positive, h, pt, risk, o.cause,
                                  o.event_of_interest, order)

    # (rule, kind, model, adjustment, who is treated: a row mask, or the risk of each row for
    # the rules "treat when risk >= p_t" at every p_t, note)
    rules: list[tuple[str, str, str, str, np.ndarray, np.ndarray | None, str]] = [
        ("treat all", "reference", "", "", np.ones(len(y), dtype=bool), None, held),
        ("treat none", "reference", "", "", np.zeros(len(y), dtype=bool), None, "")]
    rules += [(name, "legacy", "", "", mask, None, held)
              for name, mask in legacy_rules(r.legacy, r.x)]
    fits = ([d.legacy] if d.legacy is not None else []) + list(d.curves)
    none = np.zeros(len(y), dtype=bool)
    for rf in fits:
        note = " | ".join(v for v in (APPARENT, rf.note, held) if v)
        rules.append((f"risk: {rf.model}", "model", rf.model, rf.adjustment, none,
                      np.asarray(rf.risk, dtype=float), note))
    rows: list[dict[str, Any]] = []
    for model, adjustment, message in d.failed:
        rows.append({**base, "rule": f"risk: {model}", "rule_type": "model", "model": model,
                     "adjustment": adjustment, "method": method, "status": "failed",
                     "reason": message})
    parts = [finish(rows, COLUMNS)] if rows else []
    unused = design_not_used(r.outcome, clusters=False)  # no intervals: clusters do not matter
    for name, kind, model, adjustment, positive, risk, note in rules:
        note = " | ".join(v for v in (note, unused) if v)
        value, tp, fp = nb(positive, risk)
        if prevalence is not None:
            treated = tp + fp
        elif risk is None:
            treated = positive.mean() * np.ones(len(pt))
        else:
            events, others, _ = threshold_counts(y > 0, risk, pt)
            treated = (events + others) / risk.size
        part = pd.DataFrame({**base, "rule": name, "rule_type": kind, "model": model,
                             "adjustment": adjustment, "threshold": pt, "net_benefit": value,
                             "treated": treated, "true_positive": tp, "false_positive": fp,
                             "method": method, "status": "ok", "reason": "", "note": note})
        parts.append(finish(part, COLUMNS))
    return pd.concat(parts, ignore_index=True)
