"""Cut-point audit: where the legacy cuts sit in the analysis sample, and — for cuts chosen from
the data — how much the search for an "optimal" cut overstates significance.

For every legacy cut (of the exposure and of grouped adjustment variables): its percentile in the
analysis sample (share of rows in the groups below it, x 100) and its distance to the median, in
units and in percentile points; for every legacy group its row and event counts, suppressed below
the disclosure threshold ``spec.min_cell`` (with a second, complementary suppression when only one
cell of a variable would be hidden, so that it cannot be recovered from the total).

For an exposure grouping flagged ``derived_from_data``:

- the **profile** of the split statistic over every candidate cut whose low-group share lies in
  the search range (``cutpoint_search``, default 10-90%); candidates are the distinct observed
  values (thinned to ``MAX_CANDIDATES`` evenly spaced in rank when there are more);
- the **maximally selected statistic**, its naive p-value (chi-square, 1 df), the corrected
  p-values of Altman, Lausen, Sauerbrei & Schumacher 1994 (JNCI 86:829; only for the 10-90% and
  5-95% ranges and the naive p-values 1e-4 <= p <= 0.1 the formula was published for; otherwise
  empty, with the reason in ``p_altman_message``) and of Miller & Siegmund 1982 (Biometrics
  38:1011) / Lausen & Schumacher 1992 (Biometrics 48:73; any range), and a permutation p-value
  (the exposure permuted against the outcome — within strata for survival — and the whole search
  repeated; p = (1 + #{max* >= max}) / (1 + permutations));
- the **bootstrap spread** of the re-derived "optimal" cut (case resampling; percentiles), with
  the replicates that gave no cut counted (``bootstrap_failed``) and their reasons. The
  resampled unit is the row (under frequency weights the person), or with ``cluster`` the whole
  cluster (``unbin.models.weighted.design_resample_weights``; Davison & Hinkley 1997, sec.
  3.8), and a replicate's low-group shares are of its own drawn rows.

With ``cluster`` there is no permutation p-value (nor ``p_simulated``): under the null the
outcome is still correlated within clusters and so, often, is the exposure; permuting the
exposure over rows makes the rows exchangeable that are not, and its null distribution of the
maximal statistic is too narrow. Permuting within clusters tests only the within-cluster
association, and permuting whole clusters' exposures needs clusters of equal size with
cluster-level exposure; neither is general, so the table says so in ``message``. Under
frequency weights (a row stands for w persons) every statistic, share, count, median and
bootstrap draw counts persons, equal to the rows repeated by their weights; the permutation
p-value permutes those repeated rows (whole weights only). Sampling weights are not used in
this table (the split statistics count rows), whose message says so.

Without adjustment variables the split statistic is the score (Rao) chi-square of a binary split
in the analysis's family, computed for all candidates at once from cumulative sums over the
sorted exposure:

- continuous: n R^2 of the split (score test of the linear model, variance estimated under the
  null with denominator n);
- binary: the Pearson chi-square of the 2x2 table (the score test of the logistic model);
- count: the Poisson score chi-square with the person-time offset, (O - E)^2 / (E (1 - E/E_tot));
- survival: the log-rank chi-square (hypergeometric variance; stratified by the analysis's strata;
  delayed entry respected: a row is at risk at t when entry < t <= time).

When the analysis adjusts for other variables (``adjust``, ``by``), the statistic is the score
chi-square of the split added to the adjusted null model — those variables in their legacy
coding, and the strata for Cox (Breslow ties) — fitted once (``unbin.models.splitstats``); the table's
``statistic_name`` and ``adjusted_for`` say which. A permutation of the exposure would also
break its association with the adjusters (the null it simulates is "exposure independent of
outcome and adjusters", not "no association given the adjusters"), so under adjustment there is
no permutation p-value. The corrected p-values rest on the asymptotic null distribution of the
maximally selected statistic of an unadjusted split (Miller & Siegmund 1982; Lausen &
Schumacher 1992), which the adjusted score process approaches when the exposure is not strongly
tied to the adjusters; ``p_simulated`` instead draws (``permutations`` times) from the
asymptotic null of the adjusted score process itself, given the design (Gaussian draws with
the efficient information as covariance; for Cox, multipliers on the events' score
contributions, Lin, Wei & Ying 1993), and repeats the maximisation:
p = (1 + #{max* >= max}) / (1 + draws). The bootstrap refits the null model in every replicate.

Resampling uses frequency weights (a bootstrap replicate is a vector of multinomial counts), which
give exactly the statistic of the resampled data; it is vectorised over replicates except for
survival and adjusted searches, where each replicate costs O(n + candidates x event times), or a
refit of the null model. Draws come from
``spec.rng(analysis, "cutpoints-...")``: the same spec gives the same numbers on every run.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any, Literal

import numpy as np
import pandas as pd

from ..distributions import stats
from ..models.base import Outcome
from ..models.splitstats import (  # noqa: F401  (the corrected p-values are part of this API)
    ALTMAN_COEFFICIENTS,
    AdjustedScore,
    NullModelFailed,
    altman_message,
    p_altman,
    p_lausen,
)
from ..models.splitstats import SurvivalLayout as _SurvivalLayout
from ..models.weighted import design_resample_weights
from ..refit.analysis import Refit, adjustment_terms, design, legacy_term
from ..spec import Spec
from ..terms import GroupedTerm
from ..terms.roles import is_grouped
from . import disclosure

TABLE = "cutpoints"
MAX_CANDIDATES = 500
BOOT_PERCENTILES = (2.5, 25.0, 50.0, 75.0, 97.5)
_CHUNK_CELLS = 4_000_000  # rows x columns of one vectorised block (about 32 MB of float64)

STATISTIC = {
    "continuous": "score chi-square of the split in the linear model (n R^2)",
    "binary": "Pearson chi-square of the 2x2 table (logistic score test)",
    "count": "Poisson score chi-square with person-time offset",
    "survival": "log-rank chi-square (hypergeometric variance, strata, delayed entry)",
}

NO_NULL_DRAWS_WITH_CLUSTERS = (
    "no permutation or simulated p-value with clusters: permuting the exposure over rows breaks "
    "the dependence within clusters that the null distribution must keep, and the simulated "
    "null assumes independent rows; p_naive, p_altman and p_lausen assume independent rows too")

# --------------------------------------------------------------------------- the split search


@dataclass
class SplitSearch:
    """The maximally selected split statistic of one exposure and one outcome, vectorised over
    candidate cuts. Build with :meth:`build`; arrays are held in exposure-sorted order."""

    family: str
    closed: str
    lower: float
    upper: float
    xs: np.ndarray  # sorted exposure
    k: np.ndarray  # rows in the low group for each candidate (ascending)
    cuts: np.ndarray  # candidate cut values
    y: np.ndarray  # outcome in sorted order (event, value or count)
    t: np.ndarray | None = None  # person-time (count), sorted
    surv: _SurvivalLayout | None = None
    adjusted: AdjustedScore | None = None  # the score statistic given the adjusters
    null_error: list[str] = field(default_factory=list)  # why the adjusted null model failed
    name: str = ""  # the statistic, for the table (STATISTIC[family] when not adjusted)
    adjusted_for: str = ""  # adjustment variables and strata the statistic accounts for
    cluster: np.ndarray | None = None  # cluster codes in sorted order (the resampled units)
    # frequency weights in sorted order (a row stands for w persons), None without them; the
    # statistics, shares and bootstrap draws then count persons
    w: np.ndarray | None = None

    @classmethod
    def build(cls, family: str, x: np.ndarray, outcome: Outcome, closed: str = "left",
              lower: float = 0.1, upper: float = 0.9,
              max_candidates: int = MAX_CANDIDATES,
              adjust: tuple[np.ndarray, tuple[str, ...]] | None = None) -> SplitSearch:
        """``adjust``: the adjustment design (columns, names; no intercept) in row order; with
        at least one column the statistic is the adjusted score chi-square."""
        x = np.asarray(x, dtype=float)
        order = np.argsort(x, kind="stable")
        xs = x[order]
        n = len(xs)
        values = np.unique(xs)
        if closed == "left":  # low group x < c: a cut at each distinct value but the smallest
            cand = values[1:]
            k = np.searchsorted(xs, cand, side="left")
        else:  # low group x <= c: a cut at each distinct value but the largest
            cand = values[:-1]
            k = np.searchsorted(xs, cand, side="right")
        w = (np.asarray(outcome.weights, dtype=float)[order]
             if outcome.weights is not None and outcome.weight_kind == "frequency" else None)
        share = k / n if w is None else _cum(w)[0, k] / w.sum()
        keep = (share >= lower - 1e-12) & (share <= upper + 1e-12)
        cand, k = cand[keep], k[keep]
        if len(k) > max_candidates:
            targets = np.linspace(k[0], k[-1], max_candidates)
            pick = np.unique(np.clip(np.searchsorted(k, targets), 0, len(k) - 1))
            cand, k = cand[pick], k[pick]
        t = None
        if family == "count":
            if outcome.offset is None:
                raise ValueError("a count outcome needs its person-time offset")
            t = np.exp(outcome.offset)[order]
        surv = _SurvivalLayout.build(outcome, order) if family == "survival" else None
        y = np.asarray(outcome.y, dtype=float)[order]
        adjusted = None
        if adjust is not None and adjust[0].shape[1] > 0:
            def srt(a: np.ndarray | None) -> np.ndarray | None:
                return None if a is None else np.asarray(a)[order]

            adjusted = AdjustedScore(family, np.asarray(adjust[0], dtype=float)[order],
                                     adjust[1], y, srt(outcome.offset), srt(outcome.time),
                                     srt(outcome.entry), srt(outcome.strata), surv)
        cluster = (None if outcome.cluster is None
                   else np.unique(np.asarray(outcome.cluster), return_inverse=True)[1].ravel()[order])
        return cls(family, closed, lower, upper, xs, k.astype(np.int64), cand, y, t, surv,
                   adjusted, name=STATISTIC.get(family, ""), cluster=cluster, w=w)

    @property
    def n(self) -> int:
        return len(self.xs)

    @property
    def percentiles(self) -> np.ndarray:
        return self.share_below(self.k)

    def share_below(self, k: np.ndarray) -> np.ndarray:
        """Percent of the sample (persons under frequency weights) in the first k rows."""
        if self.w is None:
            return 100.0 * np.asarray(k) / self.n
        return 100.0 * _cum(self.w)[0, np.asarray(k)] / self.w.sum()

    def statistic_at(self, cut: float) -> float:
        """The split statistic at one cut value (any value, not only a candidate)."""
        k = int(np.searchsorted(self.xs, cut, side=_side(self.closed)))
        if k <= 0 or k >= self.n:
            return float("nan")
        one = replace(self, lower=0.0, upper=1.0, k=np.array([k]), cuts=np.array([cut]))
        return float(one.profile()[0])

    # -- statistics

    def profile(self) -> np.ndarray:
        """The statistic at every candidate cut (NaN where undefined; all NaN, with the reason in
        ``null_error``, when the adjusted null model cannot be fitted)."""
        if self.adjusted is not None:
            try:
                return self.adjusted.profile(self.k, self.w)
            except NullModelFailed as exc:
                self.null_error.append(str(exc) or "the adjusted null model failed")
                return np.full(len(self.k), np.nan)
        if self.family == "survival":
            assert self.surv is not None
            return self.surv.logrank(self.k, self.surv.w_unit if self.w is None else self.w)
        return self._glm_stat(None if self.w is None else self.w[None, :], None)[0]

    def _glm_stat(self, W: np.ndarray | None, perm: np.ndarray | None) -> np.ndarray:
        """Statistic per (replicate, candidate). ``W`` (B x n) are frequency weights in sorted
        order; ``perm`` (R x n) reorders the outcome rows against the sorted exposure."""
        y, t = self.y, self.t
        idx = self.k
        if perm is not None:
            Y = y[perm]
            cy = _cum(Y)[:, idx]
            n_l = idx[None, :].astype(float)
            n = np.full((Y.shape[0], 1), float(self.n))
            s1 = np.full((Y.shape[0], 1), y.sum())
            s2 = np.full((Y.shape[0], 1), (y * y).sum())
            ct = _cum(t[perm])[:, idx] if t is not None else None
            tt = np.full((Y.shape[0], 1), t.sum()) if t is not None else None
        elif W is not None:
            cw = _cum(W)
            n_l = cw[:, idx]
            n = cw[:, -1:]
            WY = W * y
            cwy = _cum(WY)
            cy = cwy[:, idx]
            s1 = cwy[:, -1:]
            s2 = (WY * y).sum(axis=1, keepdims=True)
            if t is not None:
                cwt = _cum(W * t)
                ct, tt = cwt[:, idx], cwt[:, -1:]
            else:
                ct = tt = None
        else:
            cy = np.concatenate([[0.0], np.cumsum(y)])[idx][None, :]
            n_l = idx[None, :].astype(float)
            n = np.array([[float(self.n)]])
            s1 = np.array([[y.sum()]])
            s2 = np.array([[(y * y).sum()]])
            if t is not None:
                ctt = np.concatenate([[0.0], np.cumsum(t)])
                ct, tt = ctt[idx][None, :], np.array([[ctt[-1]]])
            else:
                ct = tt = None
        with np.errstate(divide="ignore", invalid="ignore"):
            if self.family == "count":
                assert ct is not None and tt is not None
                rate = s1 / tt
                e_l = rate * ct
                u = cy - e_l
                v = e_l * (1.0 - ct / tt)
            else:  # continuous and binary: the same score statistic, n R^2
                mean = s1 / n
                var = s2 / n - mean * mean
                u = cy - n_l * mean
                v = var * n_l * (n - n_l) / n
            stat = np.where(v > 0, u * u / v, np.nan)
        return np.asarray(stat, dtype=float)

    # -- resampling

    def permutation_max(self, rng: np.random.Generator, permutations: int) -> np.ndarray:
        """The maximal statistic of each of ``permutations`` data sets in which the exposure is
        permuted against the outcome (within strata for survival). Unadjusted searches only."""
        if self.adjusted is not None:
            raise ValueError("a permutation of the exposure ignores the adjusters; the adjusted "
                             "search has no permutation p-value")
        if self.cluster is not None:
            raise ValueError(NO_NULL_DRAWS_WITH_CLUSTERS)
        out = np.empty(permutations)
        if self.family == "survival":
            assert self.surv is not None
            for r in range(permutations):
                perm = self.surv.stratified_permutation(rng)
                out[r] = _nanmax(self.surv.logrank(self.k, self.surv.w_unit, perm))
            return out
        chunk = max(1, _CHUNK_CELLS // max(self.n, 1))
        done = 0
        base = np.arange(self.n)
        while done < permutations:
            size = min(chunk, permutations - done)
            perm = rng.permuted(np.broadcast_to(base, (size, self.n)), axis=1)
            out[done:done + size] = _nanmax(self._glm_stat(None, perm), axis=1)
            done += size
        return out

    def bootstrap_cuts(self, rng: np.random.Generator, replicates: int) -> np.ndarray:
        """The re-derived optimal cut in each of ``replicates`` bootstrap samples (case
        resampling as multinomial frequency weights; the search range applies to each
        replicate's own low-group shares). NaN when a replicate has no valid candidate or its
        adjusted null model cannot be fitted (see :meth:`bootstrap`)."""
        return self.bootstrap(rng, replicates)[0]

    def bootstrap(self, rng: np.random.Generator,
                  replicates: int) -> tuple[np.ndarray, dict[str, int]]:
        """:meth:`bootstrap_cuts` and the number of replicates that gave no cut, by reason."""
        out = np.full(replicates, np.nan)
        failed = {"null model failed": 0, "no valid candidate": 0}
        if len(self.k) == 0:
            failed["no valid candidate"] = replicates
            return out, failed
        n = self.n
        chunk = max(1, _CHUNK_CELLS // max(n, 1))
        one_by_one = self.family == "survival" or self.adjusted is not None
        done = 0
        while done < replicates:
            size = min(chunk, replicates - done) if not one_by_one else 1
            # rows (frequency-weighted: persons), or whole clusters
            # (unbin.models.weighted.design_resample_weights)
            W = design_resample_weights(rng, Outcome(self.family, self.y, weights=self.w,
                                                     cluster=self.cluster), size)
            share = _cum(W)[:, self.k] / W.sum(axis=1, keepdims=True)
            if self.adjusted is not None:
                try:
                    stat = self.adjusted.profile(self.k, W[0])[None, :]
                except NullModelFailed:
                    failed["null model failed"] += 1
                    done += 1
                    continue
            elif self.family == "survival":
                assert self.surv is not None
                stat = self.surv.logrank(self.k, W[0])[None, :]
            else:
                stat = self._glm_stat(W, None)
            ok = (share >= self.lower - 1e-12) & (share <= self.upper + 1e-12) & np.isfinite(stat)
            stat = np.where(ok, stat, -np.inf)
            best = np.argmax(stat, axis=1)
            has = ok.any(axis=1)
            out[done:done + size] = np.where(has, self.cuts[best], np.nan)
            failed["no valid candidate"] += int((~has).sum())
            done += size
        return out, failed


def _side(closed: str) -> Literal["left", "right"]:
    """searchsorted side giving the size of the low group: x < c (closed left), x <= c."""
    return "left" if closed == "left" else "right"


def _cum(A: np.ndarray) -> np.ndarray:
    """Cumulative sums along the last axis with a leading zero column: out[..., k] = sum of the
    first k entries."""
    A = np.atleast_2d(A).astype(float, copy=False)
    out = np.zeros((A.shape[0], A.shape[1] + 1))
    np.cumsum(A, axis=1, out=out[:, 1:])
    return out


def _nanmax(a: np.ndarray, axis: int | None = None) -> Any:
    """Max ignoring NaN; NaN (not a warning) when everything is NaN."""
    filled = np.where(np.isnan(a), -np.inf, a)
    m = np.max(filled, axis=axis) if filled.size else np.array(-np.inf)
    return np.where(np.isneginf(m), np.nan, m)


# --------------------------------------------------------------------------- the table


def _grouped_variables(r: Refit, spec: Spec) -> list[tuple[str, str]]:
    a = r.analysis
    out = [(a.exposure, "exposure")]
    return out + [(v, "adjustment") for v in a.adjust if is_grouped(v, spec)]


def _events(r: Refit) -> np.ndarray | None:
    return None if r.family == "continuous" else np.asarray(r.outcome.y, dtype=float)


def _frequency_weights(r: Refit) -> np.ndarray | None:
    """The analysis sample's frequency weights (a row stands for w persons), else None."""
    o = r.outcome
    return (np.asarray(o.weights, dtype=float)
            if o.weights is not None and o.weight_kind == "frequency" else None)


def _person_median(x: np.ndarray, w: np.ndarray) -> float:
    """The median of the persons the rows stand for: of the rows repeated by their (whole)
    frequency weights, the middle person's value, or the mean of the two middle ones."""
    order = np.argsort(x, kind="stable")
    xs, cw = np.asarray(x, dtype=float)[order], np.cumsum(w[order])
    total = cw[-1]
    mid = [(total - 1) / 2] if round(total) % 2 else [total / 2 - 1, total / 2]
    at = np.minimum(np.searchsorted(cw, mid, side="right"), xs.size - 1)
    return float(np.mean(xs[at]))


def _cut_and_group_rows(r: Refit, spec: Spec, variable: str, role: str, term: GroupedTerm,
                        x: np.ndarray, search: SplitSearch | None) -> list[dict[str, Any]]:
    rows: list[dict[str, Any]] = []
    g = spec.groupings[variable]
    codes = term.codes(x)
    fw = _frequency_weights(r)
    med = float(np.median(x)) if fw is None else _person_median(x, fw)
    base = {"variable": variable, "role": role, "derived_from_data": bool(g.derived_from_data)}
    for j, c in enumerate(term.cuts):
        pct = 100.0 * float(np.average(codes <= j, weights=fw))
        stat = search.statistic_at(c) if search is not None else float("nan")
        named = {"statistic_name": search.name} if search is not None else {}
        rows.append({**base, **named, "row_type": "cut", "cut": float(c), "percentile": pct,
                     "median": med, "distance_to_median": float(c) - med,
                     "distance_percentile_points": pct - 50.0, "statistic": stat,
                     "p_naive": float(stats.chi2.sf(stat, 1)) if np.isfinite(stat) else np.nan,
                     "group": f"{term.labels[j]} | {term.labels[j + 1]}"})
    counts = np.bincount(codes, weights=fw, minlength=len(term.labels)).round().astype(int).tolist()
    ev = _events(r)
    ev_counts = (np.bincount(codes, weights=ev if fw is None else ev * fw,
                             minlength=len(term.labels)).round().astype(int)
                 .tolist() if ev is not None else [None] * len(counts))
    n_shown = disclosure.complementary(counts, spec.min_cell)
    e_shown = (disclosure.complementary(ev_counts, spec.min_cell) if ev is not None
               else [None] * len(counts))
    for j, label in enumerate(term.labels):
        rows.append({**base, "row_type": "group", "group": label,
                     "n": n_shown[j], "events": e_shown[j],
                     "suppressed": bool(n_shown[j] is None
                                        or (ev is not None and e_shown[j] is None))})
    return rows


def _search_rows(r: Refit, spec: Spec, search: SplitSearch,
                 term: GroupedTerm) -> list[dict[str, Any]]:
    a = r.analysis
    base = {"variable": a.exposure, "role": "exposure", "derived_from_data": True,
            "statistic_name": search.name}
    prof = search.profile()
    rows: list[dict[str, Any]] = [
        {**base, "row_type": "profile", "cut": float(c), "percentile": float(p),
         "statistic": float(s), "p_naive": float(stats.chi2.sf(s, 1)) if np.isfinite(s) else np.nan}
        for c, p, s in zip(search.cuts, search.percentiles, prof, strict=True)]
    lo, hi = spec.cutpoint_search.lower, spec.cutpoint_search.upper
    summary: dict[str, Any] = {**base, "row_type": "search", "adjusted_for": search.adjusted_for,
                               "search_lower": lo, "search_upper": hi,
                               "n_candidates": len(search.k), "status": "ok", "message": ""}
    if search.null_error:
        summary.update(status="failed", message="the adjusted null model (adjustment variables "
                       f"in their legacy coding) could not be fitted: {search.null_error[0]}")
        return [*rows, summary]
    if not np.isfinite(prof).any():
        summary.update(status="failed", message="no candidate cut in the search range gives a "
                                                "defined statistic (too few distinct values?)")
        return [*rows, summary]
    best = int(np.nanargmax(prof))
    max_stat = float(prof[best])
    p_naive = float(stats.chi2.sf(max_stat, 1))
    summary.update(cut=float(search.cuts[best]), percentile=float(search.percentiles[best]),
                   statistic=max_stat, p_naive=p_naive, p_altman=p_altman(p_naive, lo, hi),
                   p_altman_message=altman_message(p_naive, lo, hi),
                   p_lausen=p_lausen(p_naive, lo, hi))
    notes = []
    if len(term.cuts) > 1:
        notes.append(f"the grouping has {len(term.cuts)} cuts; the search is over single "
                     "binary splits")
    n_perm = spec.resampling.permutations
    summary["permutations"] = n_perm
    if a.weights is not None and search.w is None:
        notes.append(f"the split search counts rows; the sampling weights ({a.weights.column}) "
                     "are not used in this table")
    if n_perm > 0 and search.cluster is not None:
        summary["permutations"] = 0
        notes.append(NO_NULL_DRAWS_WITH_CLUSTERS)
    elif n_perm > 0 and search.adjusted is not None and search.w is not None:
        summary["permutations"] = 0
        notes.append("no permutation or simulated p-value for an adjusted search with frequency "
                     "weights (the simulated null does not take the weights yet); use p_lausen")
    elif n_perm > 0 and search.adjusted is not None:
        summary["permutations"] = 0
        sim = search.adjusted.simulate_max(search.k, spec.rng(a.name, "cutpoints-simulation"),
                                           n_perm)
        ge = int(np.sum(np.nan_to_num(sim, nan=-np.inf) >= max_stat * (1 - 1e-10)))
        summary.update(simulations=n_perm, p_simulated=(1 + ge) / (1 + n_perm))
        notes.append("no permutation p-value under adjustment (permuting the exposure would "
                     "also break its association with the adjusters); p_simulated instead")
    elif n_perm > 0 and search.w is not None and not np.all(search.w == np.round(search.w)):
        summary["permutations"] = 0
        notes.append("no permutation p-value with frequency weights that are not whole numbers "
                     "(the persons permuted must be whole)")
    elif n_perm > 0:
        persons = search if search.w is None else _person_search(r, search)
        perm_max = persons.permutation_max(spec.rng(a.name, "cutpoints-permutation"), n_perm)
        ge = int(np.sum(np.nan_to_num(perm_max, nan=-np.inf) >= max_stat * (1 - 1e-10)))
        summary["p_permutation"] = (1 + ge) / (1 + n_perm)
    n_boot = spec.resampling.bootstrap
    summary["bootstrap"] = n_boot
    if n_boot > 0:
        cuts, failed = search.bootstrap(spec.rng(a.name, "cutpoints-bootstrap"), n_boot)
        ok = cuts[np.isfinite(cuts)]
        summary["bootstrap_ok"] = len(ok)
        summary["bootstrap_failed"] = n_boot - len(ok)
        if len(ok):
            q = np.percentile(ok, BOOT_PERCENTILES)
            pct = search.share_below(np.searchsorted(search.xs, q, side=_side(search.closed)))
            for name, v, p in zip(_boot_names("boot_cut"), q, pct, strict=True):
                summary[name] = float(v)
                summary[name.replace("boot_cut", "boot_percentile")] = float(p)
        if len(ok) < n_boot:
            why = ", ".join(f"{v} {k}" for k, v in failed.items() if v)
            notes.append(f"{n_boot - len(ok)} of {n_boot} bootstrap replicate(s) gave no cut "
                         f"({why}); the boot_* columns use the other {len(ok)}")
    summary["message"] = "; ".join(notes)
    return [*rows, summary]


def _person_search(r: Refit, search: SplitSearch) -> SplitSearch:
    """The unadjusted search on the rows repeated by their (whole) frequency weights: the
    persons, whose exposures a permutation shuffles."""
    w = np.asarray(r.outcome.weights, dtype=float)
    rows = np.repeat(np.arange(w.size), np.round(w).astype(np.int64))
    outcome = replace(r.outcome.subset(rows), weights=None)
    return SplitSearch.build(r.family, r.x[rows], outcome, search.closed, search.lower,
                             search.upper)


def _boot_names(prefix: str) -> list[str]:
    return [f"{prefix}_p{str(p).replace('.', '_').removesuffix('_0')}" for p in BOOT_PERCENTILES]


COLUMNS = ("row_type", "variable", "role", "derived_from_data", "group", "cut", "percentile",
           "median", "distance_to_median", "distance_percentile_points", "statistic", "p_naive",
           "n", "events", "suppressed", "statistic_name", "adjusted_for", "search_lower",
           "search_upper", "n_candidates", "p_altman", "p_altman_message", "p_lausen",
           "permutations", "p_permutation", "simulations", "p_simulated", "bootstrap",
           "bootstrap_ok", "bootstrap_failed", *_boot_names("boot_cut"),
           *_boot_names("boot_percentile"), "status", "message")


def _adjustment(r: Refit, spec: Spec) -> tuple[np.ndarray, tuple[str, ...]]:
    """The legacy analysis's adjustment design (legacy coding; no intercept)."""
    terms = adjustment_terms(r.sample.frame, r.analysis, spec, "legacy")
    return design(r.sample.frame, r.x, (), terms)


def cutpoints_table(r: Refit, spec: Spec) -> pd.DataFrame:
    """The cut-point audit of one analysis (see the module docstring for the row types)."""
    rows: list[dict[str, Any]] = []
    df = r.sample.frame
    search: SplitSearch | None = None
    search_error = ""
    lo, hi = spec.cutpoint_search.lower, spec.cutpoint_search.upper
    try:
        if r.analysis.design.matched_set:  # the split statistics are unconditional
            raise ValueError("the split search does not condition on matched sets")
        search = SplitSearch.build(r.family, r.x, r.outcome, r.legacy.closed, lo, hi,
                                   adjust=_adjustment(r, spec))
        a = r.analysis
        adjusters = [*a.adjust, *([a.by] if a.by else [])]
        strata = list(a.strata) if r.family == "survival" else []
        search.adjusted_for = ", ".join([*adjusters, *(f"strata {v}" for v in strata)])
        if search.adjusted is not None:
            search.name = (f"score chi-square of the split, adjusted for {', '.join(adjusters)} "
                           "(legacy coding)" + (f", stratified by {', '.join(strata)}"
                                                if strata else "")
                           + ("; Cox model, Breslow ties" if r.family == "survival" else ""))
    except ValueError as exc:
        search_error = str(exc)
    for variable, role in _grouped_variables(r, spec):
        x = r.x if role == "exposure" else df[variable].to_numpy(float)
        term = r.legacy if role == "exposure" else legacy_term(x, variable, spec)
        rows += _cut_and_group_rows(r, spec, variable, role, term, x,
                                    search if role == "exposure" else None)
    if spec.groupings[r.analysis.exposure].derived_from_data:
        if search is None:
            rows.append({"row_type": "search", "variable": r.analysis.exposure,
                         "role": "exposure", "derived_from_data": True, "status": "failed",
                         "message": f"the split search could not be set up: {search_error}"})
        else:
            rows += _search_rows(r, spec, search, r.legacy)
    out = pd.DataFrame(rows, columns=list(COLUMNS))
    for c in ("n", "events", "n_candidates", "permutations", "simulations", "bootstrap",
              "bootstrap_ok", "bootstrap_failed"):
        out[c] = out[c].astype("Int64")
    for c in ("derived_from_data", "suppressed"):
        out[c] = out[c].astype("boolean")
    for c in ("group", "statistic_name", "adjusted_for", "p_altman_message", "status",
              "message"):
        out[c] = out[c].astype("string")
    return out


def summary_line(df: pd.DataFrame) -> str:
    """One line for the terminal summary: how many exposure cuts were audited, and each
    data-derived cut with its corrected p-values and the bootstrap range of the re-derived cut."""
    if df.empty or "row_type" not in df:
        return "Cut points: no legacy cuts audited."
    cuts = df[(df["row_type"] == "cut") & (df["role"] == "exposure")]
    text = f"Cut points: {len(cuts)} legacy exposure cut(s) audited"
    for s in df[df["row_type"] == "search"].itertuples():
        legacy = cuts[cuts["analysis"] == s.analysis]
        where = ", ".join(f"{c.cut:g} (P{c.percentile:.0f})" for c in legacy.itertuples())
        if s.status != "ok":
            text += f"; {s.analysis}: search failed"
            continue
        resampled = (f"permutation p {_p(s.p_permutation)}" if pd.notna(s.p_permutation)
                     else f"simulated p {_p(getattr(s, 'p_simulated', None))}")
        text += (f"; {s.analysis} {s.variable} {where} chosen from the data: optimal "
                 f"{s.cut:g}, naive p {_p(s.p_naive)}, corrected p {_p(s.p_lausen)}, "
                 f"{resampled}, bootstrap cut {_g(s.boot_cut_p2_5)}–{_g(s.boot_cut_p97_5)}")
    return text


def _p(v: Any) -> str:
    if v is None or pd.isna(v):
        return "–"
    return "<0.001" if v < 0.001 else f"{v:.3f}"


def _g(v: Any) -> str:
    return "–" if v is None or pd.isna(v) else f"{v:g}"
