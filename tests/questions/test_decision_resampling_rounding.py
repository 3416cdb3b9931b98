"""The decision bootstrap's replicate C indices (``_Evaluator.replicate_c``) compare the scores
as the point estimate does (unbin.models.discrimination.c_index: rounded to SCORE_DECIMALS
decimals), so a replicate's C in its drawn data set is the C index of that data set written out
row by row (each drawn row repeated as often as it was drawn) with scores that differ by less
than one rounding unit tied. References computed independently of the engine: the pair count
by hand (``brute_pair_c``; Harrell et al. 1982, pairs at risk together within a stratum under
delayed entry), lifelines' ``concordance_index`` (no strata or entry) and scipy's Mann-Whitney
U (binary: AUC = U / (n1 n0), ties one half; Hanley & McNeil 1982), each on the exact lattice
values the scores round to."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from lifelines.utils import concordance_index
from scipy import stats

from helpers import bare_refit, brute_pair_c
from unbin.models.base import Outcome
from unbin.models.discrimination import SCORE_DECIMALS, c_index
from unbin.models.weighted import design_resample_weights, replicate_rows
from unbin.questions.decision_resampling import PURPOSE, _Evaluator, _Sample

HORIZON = 4.0


def _frame(rng: np.random.Generator, n: int, entry: bool) -> pd.DataFrame:
    x = rng.normal(50, 10, n)
    t = np.round(rng.exponential(5.0, n), 1) + 0.1  # tenths: tied times
    e = (rng.random(n) < 0.6).astype(int)
    en = np.where(rng.random(n) < 0.5, np.round(t * rng.uniform(0, 0.7, n), 1), 0.0)
    return pd.DataFrame({"x": x, "t": t, "e": e, "en": np.minimum(en, t - 0.05) if entry
                         else 0.0, "s": rng.integers(0, 3, n), "y": e})


def _raw(family: str, entry: bool, strata: bool) -> dict[str, Any]:
    o: dict[str, Any] = ({"type": "binary", "event": "y"} if family == "binary" else
                         {"type": "survival", "time": "t", "event": "e", "horizon": HORIZON})
    if entry:
        o["entry"] = "en"
    a: dict[str, Any] = {"name": "a", "outcome": o, "exposure": "x"}
    if strata:
        a["strata"] = ["s"]
    return {"study": "sim", "cohorts": [{"name": "sim", "path": "sim.parquet"}],
            "groupings": {"x": {"cuts": [45, 55]}}, "analyses": [a],
            "resampling": {"bootstrap": 4}, "seed": 11}


def _scores(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Scores on a lattice of eighths (exact in binary) moved by less than half a rounding unit
    (+-0.4e-10 and +-3e-12): rounded to SCORE_DECIMALS decimals they are the lattice values,
    while many pairs of rows with the same lattice value differ unrounded."""
    unit = 10.0 ** -SCORE_DECIMALS
    lattice = rng.integers(0, 8, n) * 0.125
    nudge = rng.choice([-0.4, -0.03, 0.0, 0.03, 0.4], n) * unit
    return lattice + nudge, lattice


@pytest.mark.parametrize(("family", "entry", "strata"), [
    ("survival", True, True), ("survival", False, False), ("binary", False, False)])
def test_replicate_c_is_the_c_index_of_the_drawn_rows_written_out(
        family: str, entry: bool, strata: bool) -> None:
    rng = np.random.default_rng(20261204)
    df = _frame(rng, 160, entry)
    r, spec = bare_refit(df, _raw(family, entry, strata))
    o = r.outcome
    n = o.n
    horizon = HORIZON if family == "survival" else None
    ev = _Evaluator(r, {}, np.zeros(0), horizon)
    full = _Sample(r, np.arange(n), horizon)
    W = design_resample_weights(spec.rng("a", PURPOSE), o, 4)
    moved_any = False
    for b in range(W.shape[0]):
        rows, weights = replicate_rows(o, W[b])
        assert weights is None
        drawn = _Sample(r, rows, horizon, weights)
        z, lattice = _scores(rng, n)
        got = ev.replicate_c({0: z}, drawn, full)
        assert got is not None
        in_drawn, in_full = got[0][0], got[1][0]
        for idx, value in ((rows, in_drawn), (np.arange(n), in_full)):
            y = np.asarray(o.y, dtype=float)[idx]
            if family == "binary":
                ev_ = y > 0
                u = stats.mannwhitneyu(lattice[idx][ev_], lattice[idx][~ev_]).statistic
                want = u / (ev_.sum() * (~ev_).sum())
                exact = stats.mannwhitneyu(z[idx][ev_], z[idx][~ev_]).statistic / (
                    ev_.sum() * (~ev_).sum())
                point = c_index(Outcome("binary", y), z[idx])
            else:
                assert o.time is not None
                t = o.time[idx]
                en = None if o.entry is None else o.entry[idx]
                st = None if o.strata is None else o.strata[idx]
                want = brute_pair_c(t, lattice[idx], y, entry=en, strata=st)
                exact = brute_pair_c(t, z[idx], y, entry=en, strata=st)
                if en is None and st is None:  # lifelines: higher score, shorter life
                    assert want == pytest.approx(
                        concordance_index(t, -lattice[idx], y), abs=1e-12)
                point = c_index(Outcome("survival", y, time=t, entry=en, strata=st), z[idx])
            assert value == pytest.approx(want, abs=1e-12)
            assert point == pytest.approx(want, abs=1e-12)  # the point estimate's footing
            moved_any |= abs(exact - want) > 1e-6  # unrounded scores would give another C
    assert moved_any


def test_apparent_c_compares_rounded_scores_too() -> None:
    # The full sample's C (the apparent value and the C of a replicate model judged there by
    # _Sample.c_index) on the same footing: lifelines' concordance_index on the lattice.
    rng = np.random.default_rng(5)
    df = _frame(rng, 200, entry=False)
    r, _ = bare_refit(df, _raw("survival", False, False))
    o = r.outcome
    full = _Sample(r, np.arange(o.n), HORIZON)
    z, lattice = _scores(rng, o.n)
    assert o.time is not None
    want = concordance_index(o.time, -lattice, o.y)
    assert full.c_index(z) == pytest.approx(want, abs=1e-12)
    assert abs(concordance_index(o.time, -z, o.y) - want) > 1e-6


def test_table_c_and_optimism_equal_the_drawn_rows_written_out(monkeypatch) -> None:
    # The table's replicate C indices (every model of a replicate in one call of
    # scores_concordances) and its optimism rows against the pair count by hand
    # (brute_pair_c; Harrell et al. 1982) of each replicate model's scores, rounded to
    # SCORE_DECIMALS decimals by numpy, on its drawn data set written out row by row and on
    # the full sample; the optimism is their mean difference (Harrell, Lee & Mark 1996).
    from unbin.questions import decision_resampling as dr

    rng = np.random.default_rng(31)
    df = _frame(rng, 180, entry=True)
    r, spec = bare_refit(df, _raw("survival", True, True))
    seen: list[tuple[Any, dict[int, Any], np.ndarray]] = []
    original = dr._Evaluator.replicate_c

    def record(self, zs, drawn, full):  # type: ignore[no-untyped-def]
        seen.append((self, dict(zs), drawn.idx.copy()))
        return original(self, zs, drawn, full)

    monkeypatch.setattr(dr._Evaluator, "replicate_c", record)
    collect: dict[str, Any] = {}
    table = dr.decision_resampling_table(r, spec, collect=collect)
    o = r.outcome
    assert o.time is not None and o.entry is not None and o.strata is not None
    assert len(seen) == len(collect["boot"]) == spec.resampling.bootstrap
    y = np.asarray(o.y, dtype=float)
    diffs: dict[tuple[str, str], list[float]] = {}
    checked = 0
    for (ev, zs, idx), boot, test in zip(seen, collect["boot"], collect["test"], strict=True):
        for k in ev.keys:
            z = zs[id(ev.models[k])]
            if z is None:
                continue
            s = np.round(z, SCORE_DECIMALS)
            drawn = brute_pair_c(o.time[idx], s[idx], y[idx], entry=o.entry[idx],
                                 strata=o.strata[idx])
            whole = brute_pair_c(o.time, s, y, entry=o.entry, strata=o.strata)
            assert boot[("C index", k)] == pytest.approx(drawn, abs=1e-12)
            assert test[("C index", k)] == pytest.approx(whole, abs=1e-12)
            diffs.setdefault(k, []).append(drawn - whole)
            checked += 1
    assert checked >= 2 * spec.resampling.bootstrap
    c_rows = table[table["quantity"] == "C index"]
    assert len(c_rows) == len(diffs)
    for _, row in c_rows.iterrows():
        want = float(np.mean(diffs[(row["model"], row["adjustment"])]))
        assert row["optimism"] == pytest.approx(want, abs=1e-12)
        assert row["corrected"] == pytest.approx(row["apparent"] - want, abs=1e-12)
