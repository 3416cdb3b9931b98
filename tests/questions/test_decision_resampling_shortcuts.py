"""The shortcuts the decision bootstrap takes equal the direct computations they replace.

- ``_AtHorizon`` (the survival net benefits of many row subsets of one sample) against
  ``net_benefit_km`` on each subset (bit for bit) and against a product-limit estimate
  written out as a loop over the subset's event times (Kaplan & Meier 1958; Aalen & Johansen
  1978), on seeded data with tied times, delayed entry and competing events.
"""

from __future__ import annotations

import numpy as np
import pytest

from unbin.questions.decision_resampling import _AtHorizon
from unbin.questions.net_benefit import net_benefit_km


def _data(seed: int, n: int = 400, entry: bool = True):
    rng = np.random.default_rng(seed)
    time = np.round(rng.exponential(4.0, n), 1) + 0.1  # tenths: many ties
    cause = rng.choice([0, 1, 2], size=n, p=[0.4, 0.4, 0.2])
    start = np.round(time * rng.uniform(0, 0.6, n), 1) if entry else None
    if start is not None:
        start = np.minimum(start, time - 0.05)
    return time, cause, start


def _loop(time, cause, entry, horizon, competing, eoi=1):
    """The product-limit estimate at ``horizon`` by a loop over the distinct event times:
    S(h) for Kaplan–Meier, 1 - F(h) for the Aalen–Johansen incidence of ``eoi``."""
    s_all, cif = 1.0, 0.0
    for u in np.unique(time[(cause != 0) & (time <= horizon)]):
        at_risk = np.sum(((entry < u) if entry is not None else True) & (time >= u))
        d_all = np.sum((time == u) & (cause != 0))
        d_1 = np.sum((time == u) & (cause == eoi))
        cif += s_all * d_1 / at_risk
        s_all *= 1 - d_all / at_risk
    return 1 - cif if competing else s_all


@pytest.mark.parametrize("competing", [True, False])
@pytest.mark.parametrize("entry", [True, False])
def test_net_benefits_equal_the_subset_computation(competing: bool, entry: bool) -> None:
    time, cause, start = _data(20261204 + competing + 2 * entry, entry=entry)
    event = (cause == 1).astype(float) if competing else (cause != 0).astype(float)
    h = 5.0
    pt = np.array([0.05, 0.1, 0.2, 0.3])
    fast = _AtHorizon(time, event, start, h, cause if competing else None, 1)
    rng = np.random.default_rng(7)
    cs = cause if competing else None
    for _ in range(30):
        risk = rng.uniform(0, 0.5, time.size)
        want = net_benefit_km(time, event, start, np.zeros(time.size, bool), h, pt, risk,
                              cs, 1)[0]
        assert np.array_equal(fast.net_benefit(pt, np.zeros(time.size, bool), risk), want)
        mask = rng.uniform(size=time.size) < rng.uniform(0.05, 1)
        want = net_benefit_km(time, event, start, mask, h, pt, None, cs, 1)[0]
        assert np.array_equal(fast.net_benefit(pt, mask, None), want)
        # the product-limit loop (an independent computation) to rounding
        ref = _loop(time[mask], np.where(competing, cause, (cause != 0).astype(int))[mask],
                    None if start is None else start[mask], h, competing)
        assert fast.survival(mask) == pytest.approx(ref, abs=1e-12)


def test_a_subset_without_events_by_the_horizon() -> None:
    time, cause, start = _data(3)
    h = 5.0
    late = time > h  # every row of the subset outlives the horizon
    fast = _AtHorizon(time, (cause == 1).astype(float), start, h, cause, 1)
    assert fast.survival(late) == 1.0
    pt = np.array([0.1])
    want = net_benefit_km(time, (cause == 1).astype(float), start, late, h, pt, None, cause,
                          1)[0]
    assert np.array_equal(fast.net_benefit(pt, late, None), want)


def test_pair_auc_is_the_rank_auc() -> None:
    """The AUC from one sort of the non-events equals the rank formula's (bit for bit) and a
    count over every (event, non-event) pair (Hanley & McNeil 1982), with tied scores."""
    from scipy.stats import rankdata

    from unbin.questions.decision_resampling import pair_auc

    rng = np.random.default_rng(11)
    for n in (7, 60, 500):
        y = rng.uniform(size=n) < 0.3
        y[:2] = [True, False]
        score = np.round(rng.normal(size=n) + y, 1)  # rounded: ties within and across groups
        got = pair_auc(y, score)
        n1, n0 = int(y.sum()), int((~y).sum())  # the rank formula, scipy's midranks
        assert got == (rankdata(score)[y].sum() - n1 * (n1 + 1) / 2) / (n1 * n0)
        diff = score[y][:, None] - score[~y][None, :]
        assert got == pytest.approx(np.mean((diff > 0) + 0.5 * (diff == 0)), abs=1e-15)
    assert np.isnan(pair_auc(np.zeros(5, bool), np.arange(5.0)))


def test_logistic_slope_equals_statsmodels_logit() -> None:
    """The calibration slope (Cox 1958: b in logit P(y) = a + b z) from five sums per Newton
    step equals statsmodels' Logit of y on [1, z]; NaN when z does not vary."""
    import statsmodels.api as sm

    from unbin.questions.decision_resampling import logistic_slope

    rng = np.random.default_rng(21)
    for n in (50, 2000):
        z = np.round(rng.normal(-1.5, 0.8, n), 2)
        y = (rng.uniform(size=n) < 1 / (1 + np.exp(-(0.2 + 0.8 * z)))).astype(float)
        ref = sm.Logit(y, sm.add_constant(z)).fit(disp=0, tol=1e-12).params[1]
        assert logistic_slope(y, z) == pytest.approx(float(ref), rel=1e-9)
    assert np.isnan(logistic_slope(np.array([0.0, 1.0, 0.0]), np.ones(3)))


@pytest.mark.parametrize("design", ["rows", "clusters", "frequency", "sampling"])
def test_replicate_weights_one_at_a_time_are_the_draws_of_all_at_once(design: str) -> None:
    # source: numpy's Generator draws all replicates at once (design_resample_weights with
    # every replicate, from a generator of the same seed): the survival table draws each
    # replicate's weights when it comes, and must get the same rows, bit for bit
    from unbin.models.base import Outcome
    from unbin.models.weighted import design_resample_weights
    from unbin.questions.decision_resampling import _replicate_weights

    rng = np.random.default_rng(8)
    n = 300
    time = rng.exponential(3.0, n)
    kw: dict = {}
    if design == "clusters":
        kw["cluster"] = rng.integers(0, 40, n)
    elif design == "frequency":
        kw["weights"] = rng.integers(1, 5, n).astype(float)
    elif design == "sampling":
        kw.update(weights=rng.uniform(0.5, 3.0, n), weight_kind="sampling")
    o = Outcome("survival", (rng.random(n) < 0.5).astype(float), time=time, **kw)
    want = design_resample_weights(np.random.default_rng(99), o, 7)
    got = np.array(list(_replicate_weights(np.random.default_rng(99), o, 7)))
    np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("competing", [True, False])
@pytest.mark.parametrize("entry", [True, False])
def test_net_benefits_with_draw_counts_equal_the_repeated_rows(competing: bool,
                                                               entry: bool) -> None:
    # A bootstrap replicate's net benefits read on the sample's rows with its draw counts
    # equal net_benefit_km on the drawn rows written out row by row (bit for bit), and the
    # product-limit loop over the repeated rows (Kaplan & Meier 1958; Aalen & Johansen 1978)
    time, cause, start = _data(20261205 + competing + 2 * entry, entry=entry)
    event = (cause == 1).astype(float) if competing else (cause != 0).astype(float)
    h = 5.0
    pt = np.array([0.05, 0.1, 0.2, 0.3])
    cs = cause if competing else None
    fast = _AtHorizon(time, event, start, h, cs, 1)
    rng = np.random.default_rng(17)
    n = time.size
    for it in range(20):
        counts = (rng.multinomial(n, np.full(n, 1 / n)) if it % 2 else
                  rng.integers(0, 30, n) * (rng.random(n) < 0.2))  # zeros, large counts
        m = np.repeat(np.arange(n), counts)
        en = None if start is None else start[m]
        risk = rng.uniform(0, 0.5, n)
        want = net_benefit_km(time[m], event[m], en, np.zeros(m.size, bool), h, pt, risk[m],
                              None if cs is None else cs[m], 1)[0]
        assert np.array_equal(fast.net_benefit(pt, None, risk, counts), want)
        mask = rng.uniform(size=n) < rng.uniform(0.05, 1)
        want = net_benefit_km(time[m], event[m], en, mask[m], h, pt, None,
                              None if cs is None else cs[m], 1)[0]
        assert np.array_equal(fast.net_benefit(pt, mask, None, counts), want)
        ref = _loop(time[m][mask[m]], np.where(competing, cause, (cause != 0).astype(int))[m][
            mask[m]], None if en is None else en[mask[m]], h, competing)
        assert fast.survival(mask, counts) == pytest.approx(ref, abs=1e-12)


@pytest.mark.parametrize("competing", [True, False])
def test_risk_rule_at_unsorted_thresholds_equals_the_product_limit_loop(competing: bool) -> None:
    # The net benefit of "treat when risk >= p_t" at thresholds in any order (nested subsets
    # from one pass), risks on the thresholds themselves and not a number, with draw counts:
    # net_benefit_km of the repeated rows (bit for bit) and the definition NB = TP/N -
    # FP/N p_t/(1 - p_t) with the treated rows' product-limit loop (Kaplan & Meier 1958;
    # Aalen & Johansen 1978; Vickers & Elkin 2006, Med Decis Making 26:565)
    time, cause, start = _data(20261206 + competing)
    event = (cause == 1).astype(float) if competing else (cause != 0).astype(float)
    h = 5.0
    pt = np.array([0.2, 0.05, 0.3, 0.1, 0.2])
    cs = cause if competing else None
    fast = _AtHorizon(time, event, start, h, cs, 1)
    rng = np.random.default_rng(23)
    n = time.size
    codes = np.where(competing, cause, (cause != 0).astype(int))
    for _ in range(10):
        counts = rng.multinomial(n, np.full(n, 1 / n))
        m = np.repeat(np.arange(n), counts)
        risk = rng.uniform(0, 0.5, n)
        risk[:20] = pt[rng.integers(0, pt.size, 20)]  # on a threshold: treated
        risk[20:25] = np.nan  # not a number: never treated
        got = fast.net_benefit(pt, None, risk, counts)
        want = net_benefit_km(time[m], event[m], start[m], np.zeros(m.size, bool), h, pt,
                              risk[m], None if cs is None else cs[m], 1)[0]
        assert np.array_equal(got, want)
        for g, t in enumerate(pt):
            treated = (risk >= t)[m]
            share = treated.mean()
            s = _loop(time[m][treated], codes[m][treated], start[m][treated], h, competing)
            assert got[g] == pytest.approx((1 - s) * share - s * share * t / (1 - t),
                                           abs=1e-12)
