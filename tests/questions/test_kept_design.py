"""The information-kept bootstrap under a sampling design (unbin.questions.kept with
``cluster`` or weights): a replicate whose draw keeps every row once reproduces the
``information`` table's info_kept exactly (the same robust Wald statistics with the same
sandwich), the point estimate lies inside its interval for every coding on a clustered count
design, and the replicates resample whole clusters."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest

from helpers import bare_refit
from unbin.models.weighted import design_resample_weights
from unbin.questions.information import information_table
from unbin.questions.kept import (
    _point_rows,
    bootstrap_shares,
    information_bootstrap_table,
    shares_on,
)

CUTS = [-0.6745, 0.0, 0.6745]
OUTCOMES = {
    "binary": {"type": "binary", "event": "yb"},
    "continuous": {"type": "continuous", "value": "yc"},
    "count": {"type": "count", "count": "yn", "persontime": "pt"},
    "survival": {"type": "survival", "time": "t", "event": "d"},
}


def _raw(outcome: dict[str, Any], bootstrap: int, design: dict[str, Any],
         seed: int = 5) -> dict[str, Any]:
    return {
        "study": "sim", "cohorts": [{"name": "sim", "path": "sim.parquet"}],
        "groupings": {"x": {"cuts": CUTS}},
        "analyses": [{"name": "a", "outcome": outcome, "exposure": "x", "adjust": ["z"],
                      **design}],
        "continuous": {"forms": ["linear"], "spline_knots": [3]},
        "resampling": {"bootstrap": bootstrap, "permutations": 0}, "seed": seed,
    }


def _clustered(seed: int, clusters: int, size: int) -> pd.DataFrame:
    """Rows in clusters with a shared random effect on every outcome (correlated rows), the
    exposure partly shared within a cluster too; integer frequency weights and sampling
    weights for the weighted designs."""
    rng = np.random.default_rng(seed)
    g = np.repeat(np.arange(clusters), size)
    n = g.size
    u = rng.normal(scale=0.6, size=clusters)[g]
    x = 0.7 * rng.normal(size=clusters)[g] + 0.7 * rng.normal(size=n)
    z = 0.5 * x + rng.normal(size=n)
    eta = -0.4 + 0.6 * x - 0.25 * x ** 2 + 0.3 * z
    return pd.DataFrame({
        "x": x, "z": z, "centre": g, "fw": rng.integers(1, 4, n).astype(float),
        "sw": rng.uniform(0.5, 3.0, n),
        "yb": rng.binomial(1, 1 / (1 + np.exp(-(eta + u)))),
        "yc": eta + u + rng.normal(size=n),
        "yn": rng.poisson(np.exp(0.5 * (eta + u)) * 1.5),
        "pt": rng.uniform(0.5, 2.0, n),
        "t": np.round(rng.exponential(np.exp(-(eta + u))), 2) + 0.01,
        "d": rng.binomial(1, 0.7, n)})


DESIGNS = {
    "cluster": {"cluster": "centre"},
    "sampling": {"weights": {"column": "sw", "kind": "sampling"}},
    "sampling+cluster": {"weights": {"column": "sw", "kind": "sampling"}, "cluster": "centre"},
    "frequency": {"weights": {"column": "fw", "kind": "frequency"}},
    "frequency+cluster": {"weights": {"column": "fw", "kind": "frequency"},
                          "cluster": "centre"},
}


@pytest.mark.parametrize("family", list(OUTCOMES))
@pytest.mark.parametrize("design", list(DESIGNS))
def test_a_draw_of_every_unit_once_reproduces_the_information_table(
        refit_frame: Any, family: str, design: str) -> None:
    # With refit weights equal to the outcome's own (every row or cluster drawn once; with
    # frequency weights every individual once) the replicate's share is computed exactly as
    # the point estimate: the robust Wald ratio of the information table (unbin.questions.
    # information) with clusters or sampling weights, else the LR ratio. Independent of the
    # replicate code path: the information table uses models.robust.robust_cov on the full fits.
    df = _clustered(1, 40, 8)
    raw = _raw(OUTCOMES[family], 10, DESIGNS[design])
    _, r = refit_frame(df, raw)
    info = information_table(r).set_index("adjustment")["info_kept"]
    rb, spec = bare_refit(df, raw)
    rows, models, ok_rows = _point_rows(rb, spec)
    o = rb.outcome
    W = np.tile(np.ones(o.n) if o.weights is None else o.weights, (2, 1))
    shares = shares_on(rb.family, models, o, W, rb.analysis.robust)
    assert ok_rows == [0, 1, 2]
    for j, i in enumerate(ok_rows):
        coding = str(rows[i]["adjustment"])
        assert rows[i]["info_kept"] == pytest.approx(info[coding], rel=1e-10)
        assert shares[:, j] == pytest.approx([info[coding]] * 2, rel=1e-6)


@pytest.mark.parametrize("family", ["count", "binary"])
def test_point_estimates_lie_inside_their_cluster_bootstrap_intervals(family: str) -> None:
    # A necessary property (the failure that prompted this: the point outside its own
    # interval when the replicates formed a different statistic than the point estimate).
    df = _clustered(3, 80, 10)
    t = information_bootstrap_table(*bare_refit(df, _raw(OUTCOMES[family], 200,
                                                          DESIGNS["cluster"])))
    assert list(t["status"]) == ["ok"] * 3
    assert (t["info_kept_lower"] <= t["info_kept"]).all()
    assert (t["info_kept"] <= t["info_kept_upper"]).all()


def test_the_replicates_draw_whole_clusters() -> None:
    df = _clustered(4, 30, 5)
    r, spec = bare_refit(df, _raw(OUTCOMES["count"], 0, DESIGNS["cluster"]))
    W = design_resample_weights(np.random.default_rng(0), r.outcome, 50)
    codes = r.outcome.cluster
    assert codes is not None
    for g in np.unique(codes):
        block = W[:, codes == g]
        assert (block == block[:, :1]).all()  # every row of a cluster drawn as often
    per_cluster = np.stack([W[:, codes == g][:, 0] for g in np.unique(codes)], axis=1)
    assert (per_cluster.sum(axis=1) == 30).all()  # G draws of the G clusters


def _sm_wald(y: np.ndarray, X: np.ndarray, k: int, offset: np.ndarray, groups: np.ndarray,
             weights: np.ndarray | None) -> float:
    """statsmodels' Poisson GLM with its cluster-robust covariance (``use_correction=False``:
    the bare Liang-Zeger sandwich, then times G / (G - 1) as unbin's), Wald of X's first k
    columns."""
    import warnings

    import statsmodels.api as sm
    from statsmodels.tools.sm_exceptions import SpecificationWarning

    kw = {} if weights is None else {"var_weights": weights}
    with warnings.catch_warnings():  # "not fully supported" with var_weights: the df only
        warnings.simplefilter("ignore", SpecificationWarning)
        res = sm.GLM(y, sm.add_constant(X), family=sm.families.Poisson(), offset=offset,
                     **kw).fit(tol=1e-12, cov_type="cluster",
                               cov_kwds={"groups": groups, "use_correction": False})
    G = len(np.unique(groups))
    b = np.asarray(res.params)[1:1 + k]
    V = np.asarray(res.cov_params())[1:1 + k, 1:1 + k] * G / (G - 1)
    return float(b @ np.linalg.solve(V, b))


@pytest.mark.parametrize("design", ["cluster", "sampling+cluster"])
def test_replicate_shares_equal_statsmodels_on_the_drawn_data_set(design: str) -> None:
    # Each replicate's share under a cluster draw equals the robust Wald ratio that statsmodels
    # (GLM Poisson, cluster-robust covariance) computes on the drawn data set written out: the
    # drawn clusters' rows repeated, every copy of a cluster a cluster of its own, each copy with
    # its sampling weight. Design matrices are unbin's (the statistic is what is checked).
    from unbin.models.weighted import replicate_clusters, replicate_rows

    df = _clustered(6, 40, 8)
    r, spec = bare_refit(df, _raw(OUTCOMES["count"], 3, DESIGNS[design]))
    shares = bootstrap_shares(r, spec)
    rows, models, _ = _point_rows(r, spec)
    o = r.outcome
    W = design_resample_weights(spec.rng("a", "information-bootstrap"), o, 3)
    assert o.offset is not None
    for b in range(3):
        m, case = replicate_rows(o, W[b])
        groups = replicate_clusters(o, m)
        assert groups is not None
        for j, coding in enumerate(("legacy", "continuous", "none")):
            legacy, full = models[3 * j + 1], models[3 * j + 2]
            walds = [_sm_wald(o.y[m], mod.X[m], mod.k, o.offset[m], groups, case)
                     for mod in (legacy, full)]
            assert shares[coding][b] == pytest.approx(walds[0] / walds[1], rel=1e-5)


def test_the_demo_visit_rates_share_lies_inside_its_interval() -> None:
    # The demo's clustered count analysis (visits by BMI, 80 practices), whose share kept once
    # lay outside its own interval (robust Wald point, likelihood-ratio replicates of single
    # rows). Necessary, not sufficient: paired with the checks above.
    from helpers import keep_analyses
    from unbin.demo import demo_spec, simulate_registry

    raw = keep_analyses(demo_spec(), "visits_bmi")
    t = information_bootstrap_table(*bare_refit(simulate_registry(), raw, "visits_bmi"))
    assert list(t["status"]) == ["ok"] * 3
    assert (t["replicates_used"] == t["replicates"]).all()
    assert (t["info_kept_lower"] < t["info_kept"]).all()
    assert (t["info_kept"] < t["info_kept_upper"]).all()
