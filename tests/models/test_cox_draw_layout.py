"""A bootstrap replicate's Cox layout derived from the full sample's (``cox.layout.draw_layout``,
used by ``weighted.resampled_cox_samples``) against the layout of the drawn rows themselves.

References: ``prepare_layout`` of the drawn data set written out (a row drawn k times as k
rows), which must come out array for array the same (the derivation skips its sort and its
searches only); and lifelines ``CoxPHFitter`` (Efron ties, ``strata``, ``entry_col``) on the
same drawn rows for the Cox fit made on the derived layout.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest
from lifelines import CoxPHFitter
from scipy import sparse

import unbin.models.weighted as weighted
from unbin.models.base import Outcome
from unbin.models.cox import Layout, fit_cox, prepare_layout
from unbin.models.cox.inputs import _stratum_codes
from unbin.models.cox.layout import draw_layout

TIGHT = {"precision": 1e-14, "r_precision": 1e-16}


def _assert_same_layout(got: Layout, ref: Layout) -> None:
    names = [f.name for f in dataclasses.fields(Layout)
             if f.name not in ("subsamples", "kernel", "operators")]
    for name in [*names, "risk_op", "tie_op"]:  # (the operators are made on first use)
        a, b = getattr(got, name), getattr(ref, name)
        if sparse.issparse(b):
            assert a.shape == b.shape, name
            for part in ("indptr", "indices", "data"):
                assert np.array_equal(getattr(a, part), getattr(b, part)), (name, part)
        elif isinstance(b, np.ndarray):
            assert a.dtype == b.dtype and a.shape == b.shape, (name, a.dtype, b.dtype)
            assert np.array_equal(a, b), name
        else:
            assert a == b, (name, a, b)


def _cohort(n: int, seed: int, *, entry: bool, strata: bool, weights: bool, scale: str = "days"
            ) -> dict[str, np.ndarray | None]:
    """Invented: follow-up in whole days (heavily tied), or in years (days / 365.25 rounded to
    3 decimals, as a registry extract stores them: tied, fractions, more than 2^16 distinct
    values impossible to sort as 16-bit offsets), or continuous (no ties); a rare stratum
    without events (often not drawn at all), delayed entry for about half the rows (some at an
    event time)."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 2))
    time = np.ceil(rng.exponential(300 * np.exp(-0.4 * x[:, 0]), n)) + 1
    event = rng.uniform(size=n) < 0.3
    en = np.floor(rng.uniform(0, 1, n) * time * (rng.uniform(size=n) < 0.5)) if entry else None
    if scale == "years":
        time = np.round(time / 365.25, 3)
        en = None if en is None else np.round(en / 365.25, 3)
    elif scale == "continuous":
        time = time - rng.uniform(0.0, 0.999, n)
        en = None if en is None else np.minimum(en, time - 1e-3) * rng.uniform(0.5, 1.0, n)
    st = rng.choice(np.array(["north", "south", "west"]), n) if strata else None
    if st is not None:
        st[:3], event[:3] = "zz-rare", False
    w = rng.uniform(0.5, 2.0, n) if weights else None
    return {"x": x, "time": time, "event": event, "entry": en, "strata": st, "w": w}


@pytest.mark.parametrize("mode", ["never", "always"])  # the numpy passes; the compiled pass
@pytest.mark.parametrize("scale", ["days", "years", "continuous"])
@pytest.mark.parametrize(("entry", "strata", "weights"),
                         [(True, True, False), (True, True, True), (False, True, True),
                          (True, False, False), (False, False, False)])
def test_derived_layout_is_the_drawn_rows_own(entry: bool, strata: bool, weights: bool,
                                              scale: str, mode: str,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("UNBIN_COMPILED", mode)
    n = 6000
    c = _cohort(n, 5, entry=entry, strata=strata, weights=weights, scale=scale)
    time, event, en, st, w = c["time"], c["event"], c["entry"], c["strata"], c["w"]
    assert time is not None and event is not None
    distinct = np.unique(time).size
    if scale == "continuous":
        assert distinct == n  # no ties
    else:
        assert distinct < n // 3  # heavily tied
    full = prepare_layout(time, event, entry=en, strata=st, weights=w)
    codes = None if st is None else _stratum_codes(st, n)[0]
    rng = np.random.default_rng(9)
    draws = [rng.multinomial(n, np.full(n, 1 / n)) for _ in range(3)]
    draws.append((rng.uniform(size=n) < 0.8).astype(np.int64))  # a subsample (0/1 copies)
    p = np.full(n, 1 / (n - 3))
    p[:3] = 0.0
    draws.append(rng.multinomial(n, p))  # the rare stratum not drawn: fewer labels
    few = np.zeros(n, dtype=np.int64)
    few[:1500] = rng.integers(0, 3, 1500)  # fewer drawn rows than the 16-bit sort takes
    draws.append(few)
    for copies in draws:
        m = np.repeat(np.arange(n), copies)
        ref = prepare_layout(time[m], event[m], entry=None if en is None else en[m],
                             strata=None if st is None else st[m],
                             weights=None if w is None else w[m])
        got = draw_layout(full, copies.astype(float), w, codes)
        assert got is not None
        _assert_same_layout(got, ref)
        # each laid-out row's position among the full sample's laid-out rows, by definition
        # (its drawn row's source row, found in the full layout's order)
        rank = np.full(n, -1)
        rank[full.order] = np.arange(full.order.size)
        source, positions = got.kernel["drawn_from"]
        assert source is full
        np.testing.assert_array_equal(positions, rank[m[got.order]])
    if strata:
        assert draws[4][:3].sum() == 0
        # (the draw without the rare stratum)
        fewer = draw_layout(full, draws[4].astype(float), w, codes)
        assert fewer is not None and fewer.n_strata == full.n_strata - 1


def test_declines_what_it_cannot_derive() -> None:
    c = _cohort(6000, 6, entry=True, strata=True, weights=False)
    time, event = c["time"], c["event"]
    assert time is not None and event is not None
    full = prepare_layout(time, event, entry=c["entry"], strata=c["strata"])
    codes = _stratum_codes(c["strata"], 6000)[0]
    no_events = (~event).astype(float)
    assert draw_layout(full, no_events, None, codes) is None
    assert draw_layout(full, np.zeros(6000), None, codes) is None
    with pytest.raises(ValueError, match="one value per row"):
        draw_layout(full, np.ones(10), None, codes)


@pytest.mark.parametrize("mode", ["never", "always"])
def test_fit_on_derived_layout_matches_lifelines(mode: str,
                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    # reference: lifelines CoxPHFitter (Efron ties, strata, entry_col) on the drawn rows; the
    # layout derived by the numpy passes and by the compiled pass (compiled/cox_draw.py)
    monkeypatch.setenv("UNBIN_COMPILED", mode)
    n = 5000
    c = _cohort(n, 7, entry=True, strata=True, weights=False)
    time, event, en, st, x = c["time"], c["event"], c["entry"], c["strata"], c["x"]
    assert time is not None and event is not None and x is not None and st is not None
    df = pd.DataFrame({"x1": x[:, 0], "x2": x[:, 1], "T": time, "E": event.astype(int),
                       "entry": en, "S": st})
    copies = np.random.default_rng(3).multinomial(n, np.full(n, 1 / n))
    o = Outcome("survival", event.astype(float), time=time, entry=en, strata=st)
    got = list(weighted.resampled_cox_samples(o, copies[None, :].astype(float)))
    assert len(got) == 1
    _, m, _, layout = got[0]
    full = weighted._draw_source(o)
    assert full is not None  # the layout was derived, not prepared
    fit = fit_cox(x[m], time[m], event[m], entry=en[m] if en is not None else None,
                  strata=st[m], layout=layout)
    drawn = df.iloc[m].reset_index(drop=True)
    cph = CoxPHFitter().fit(drawn[["x1", "x2", "T", "E", "entry", "S"]], "T", "E",
                            entry_col="entry", strata=["S"], fit_options=TIGHT)
    np.testing.assert_allclose(fit.coef, cph.params_[["x1", "x2"]].to_numpy(), rtol=1e-6)
    assert fit.loglik == pytest.approx(cph.log_likelihood_, abs=1e-7)
