"""The Kaplan-Meier estimates of many subsets of one sample from one time order
(``net_benefit.TimeOrder``, used by the net benefit's rules and the calibration's tenths).

References: lifelines ``KaplanMeierFitter`` (with ``entry``: left truncation) on each subset;
and the subset's own sort (``km_survival``, ``km_risk``), which the ordered counts must give
bit for bit (the same whole numbers in the same order)."""

from __future__ import annotations

import numpy as np
import pytest
from lifelines import KaplanMeierFitter

from unbin.questions.calibration import km_risk, km_risk_of
from unbin.questions.net_benefit import TimeOrder, km_survival, net_benefit_km


def _sample(n: int, seed: int, delayed: bool) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    rng = np.random.default_rng(seed)
    entry = np.round(rng.uniform(0, 2, n), 1) if delayed else None
    start = entry if entry is not None else 0.0
    t = rng.exponential(6, n) + start
    c = rng.uniform(1, 12, n) + start
    time = np.round(np.minimum(t, c), 1)  # ties in time, and times equal to entries
    event = (t <= c).astype(float)
    keep = time > (entry if entry is not None else 0.0)
    return time[keep], event[keep], None if entry is None else entry[keep]


@pytest.mark.parametrize("delayed", [False, True])
def test_subset_survival_matches_lifelines_and_the_subsets_own_sort(delayed: bool) -> None:
    time, event, entry = _sample(900, 11, delayed)
    order = TimeOrder(time, event, entry)
    rng = np.random.default_rng(12)
    score = rng.normal(size=time.size)
    for h in (0.7, 4.0, 30.0):
        for q in (0.0, 0.3, 0.8, 0.97):
            mask = score >= np.quantile(score, q)
            by_time, by_entry = order.in_order(mask)
            got = order.survival(h, by_time, by_entry)
            own = km_survival(time[mask], event[mask], h,
                              None if entry is None else entry[mask])
            assert got == own  # the same counts, the same product: bit for bit
            kmf = KaplanMeierFitter().fit(time[mask], event[mask],
                                          entry=None if entry is None else entry[mask])
            ref = float(kmf.survival_function_at_times(h).iloc[0])  # lifelines
            assert got == pytest.approx(ref, rel=1e-10)


def test_empty_subset_and_no_event_before_the_horizon() -> None:
    time, event, entry = _sample(200, 3, True)
    order = TimeOrder(time, event, entry)
    none = np.zeros(time.size, dtype=bool)
    assert np.isnan(order.survival(5.0, *order.in_order(none)))
    assert order.survival(float(time.min()) / 2, *order.in_order(~none)) == 1.0
    assert km_risk_of(order, ~none, float(time.min()) / 2)[0] == 0.0


@pytest.mark.parametrize("delayed", [False, True])
def test_net_benefit_of_risk_rules_matches_each_rules_own_kaplan_meier(delayed: bool) -> None:
    # Vickers, Cronin, Elkin & Gonen 2008: NB = (1 - S+) P+ - S+ P+ p_t / (1 - p_t), S+ from
    # lifelines' Kaplan-Meier among the rows treated at each threshold
    time, event, entry = _sample(600, 5, delayed)
    rng = np.random.default_rng(6)
    risk = rng.beta(2, 5, time.size)
    pt = np.arange(1, 20) / 20.0
    nb, tp, fp = net_benefit_km(time, event, entry, np.zeros(time.size, bool), 3.0, pt, risk)
    for g, p in enumerate(pt):
        mask = risk >= p
        if not mask.any():
            assert nb[g] == 0.0
            continue
        kmf = KaplanMeierFitter().fit(time[mask], event[mask],
                                      entry=None if entry is None else entry[mask])
        s = float(kmf.survival_function_at_times(3.0).iloc[0])
        share = mask.mean()
        want = (1 - s) * share - s * share * p / (1 - p)
        assert nb[g] == pytest.approx(want, rel=1e-9, abs=1e-12)
    # a rule given as row masks (one per threshold) gives the same numbers
    masks = risk[None, :] >= pt[:, None]
    again = net_benefit_km(time, event, entry, masks, 3.0, pt)
    np.testing.assert_array_equal(again[0], nb)


@pytest.mark.parametrize("delayed", [False, True])
def test_km_risk_of_a_tenth_is_the_subsets_own(delayed: bool) -> None:
    # km_risk itself is checked against lifelines' Greenwood log(-log) limits in
    # test_calibration; here the ordered counts must give its numbers bit for bit
    time, event, entry = _sample(800, 8, delayed)
    order = TimeOrder(time, event, entry)
    codes = np.random.default_rng(9).integers(0, 10, time.size)
    for g in range(10):
        inside = codes == g
        own = km_risk(time[inside], event[inside], 4.0, None if entry is None else entry[inside])
        np.testing.assert_array_equal(km_risk_of(order, inside, 4.0), own)


@pytest.mark.parametrize("delayed", [False, True])
def test_nested_risk_rules_in_one_pass_are_each_subsets_own_estimate(delayed: bool) -> None:
    # every threshold's S(h) among the rows with risk >= p_t, counted by removing the rows
    # below each next threshold, must be km_survival of that subset bit for bit (risks tied at
    # a threshold, a missing risk, thresholds out of order, one threshold above every risk)
    time, event, entry = _sample(1500, 13, delayed)
    rng = np.random.default_rng(14)
    risk = np.round(rng.beta(2, 4, time.size), 2)
    risk[:7] = np.nan
    pt = np.array([0.3, 0.05, 0.5, 0.31, 0.3, 0.99, 0.2, 0.0])
    order = TimeOrder(time, event, entry)
    for h in (1.0, 4.0, 40.0):
        got = order.survival_at_or_above(h, risk, pt)
        for g, p in enumerate(pt):
            mask = risk >= p
            if not mask.any():
                assert np.isnan(got[g])
                continue
            want = km_survival(time[mask], event[mask], h,
                               None if entry is None else entry[mask])
            assert got[g] == want, (h, p)
