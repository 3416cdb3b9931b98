"""A logistic model's risk rules in drawn rows and in the full sample from one compiled pass
(unbin.models.compiled.risk_places, ``logistic_rules_drawn_and_full``) against the net benefit's
definition computed here on the rows repeated as drawn (Vickers & Elkin 2006, Med Decis Making
26:565: NB = TP/n - FP/n p_t / (1 - p_t), treated when scipy.special.expit(z) >= p_t), and
against ``net_benefit_risk`` (the numpy path), both forced with UNBIN_COMPILED."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special

from unbin.questions.net_benefit import logistic_rules_drawn_and_full, net_benefit_risk


def _by_definition(y: np.ndarray, z: np.ndarray, pt: np.ndarray) -> np.ndarray:
    risk = special.expit(z)
    n = y.size
    out = []
    for t in pt:
        treated = risk >= t
        out.append(np.sum(treated & y) / n - np.sum(treated & ~y) / n * t / (1 - t))
    return np.array(out)


def _case(rng: np.random.Generator, n: int, pt: np.ndarray) -> tuple[np.ndarray, ...]:
    z = rng.normal(size=n) * 1.5 - 1.5
    # rows exactly at a threshold's log odds and one unit in the last place either side
    at = special.logit(rng.choice(pt, size=min(n, 30)))
    z[:at.size] = at
    z[at.size:2 * at.size] = np.nextafter(at, np.inf)[:max(0, min(at.size, n - at.size))]
    y = rng.random(n) < special.expit(z)
    counts = rng.multinomial(n, np.full(n, 1 / n))
    return z, y, counts


@pytest.mark.parametrize("mode", ["never", "always"])
def test_rules_equal_the_definition_on_the_repeated_rows(
        monkeypatch: pytest.MonkeyPatch, mode: str) -> None:
    # source: NB's definition (Vickers & Elkin 2006) on the rows repeated as drawn
    monkeypatch.setenv("UNBIN_COMPILED", mode)
    rng = np.random.default_rng(20261205)
    for pt in (np.array([0.1, 0.2, 0.05]), np.arange(1, 100) / 100.0, np.array([0.3])):
        for n in (5, 200, 3000):
            z, y, counts = _case(rng, n, pt)
            drawn, full = logistic_rules_drawn_and_full(y, z, pt, counts)
            rep = np.repeat(np.arange(n), counts)
            assert drawn == pytest.approx(_by_definition(y[rep], z[rep], pt), abs=1e-14)
            assert full == pytest.approx(_by_definition(y, z, pt), abs=1e-14)


def test_compiled_rules_equal_net_benefit_risk(monkeypatch: pytest.MonkeyPatch) -> None:
    # source: net_benefit_risk of scipy.special.expit(z) (the numpy path), bit for bit;
    # thresholds the kernel declines (t (1 - t) < 1e-6) and a NaN z take that path
    monkeypatch.setenv("UNBIN_COMPILED", "always")
    rng = np.random.default_rng(5)
    for pt in (np.array([0.1, 0.2, 0.05]), np.arange(1, 100) / 100.0,
               np.array([1e-8, 0.5]), np.array([0.25, 0.25])):
        for nan in (False, True):
            z, y, counts = _case(rng, 4000, pt)
            if nan:
                z[7] = np.nan
            risk = special.expit(z)
            want = (net_benefit_risk(y, risk, pt, counts)[0], net_benefit_risk(y, risk, pt)[0])
            got = logistic_rules_drawn_and_full(y, z, pt, counts)
            for g, w in zip(got, want, strict=True):
                assert np.array_equal(g, w, equal_nan=True)


def test_the_kernels_risk_is_scipys_expit() -> None:
    # source: scipy.special.expit, bit for bit (the rows near a threshold are decided by the
    # kernel's own 1 / (1 + exp(-z)))
    import math

    import numba

    @numba.njit
    def expit(z: np.ndarray) -> np.ndarray:
        out = np.empty_like(z)
        for i in range(z.size):
            out[i] = 1.0 / (1.0 + math.exp(-z[i]))
        return out

    rng = np.random.default_rng(11)
    z = np.r_[rng.normal(size=200_000) * 4, rng.uniform(-40, 40, 100_000), 0.0, 745.0, -745.0]
    assert np.array_equal(expit(z), special.expit(z))
