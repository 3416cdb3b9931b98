"""The cut-point audit under clusters (unbin.questions.cutpoints with ``cluster``): the
bootstrap of the re-derived cut resamples whole clusters, checked against the row bootstrap of
the collapsed data (an independent computation); the permutation p-value is withheld with a
message, and a seeded null simulation shows why (row permutations reject far too often when
the exposure and the outcome are both correlated within clusters)."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest

from helpers import bare_refit
from unbin.models.base import Outcome
from unbin.questions.cutpoints import NO_NULL_DRAWS_WITH_CLUSTERS, SplitSearch, cutpoints_table


def _raw(design: dict[str, Any], **top: Any) -> dict[str, Any]:
    return {"study": "sim", "cohorts": [{"name": "c", "path": "unused.csv"}],
            "groupings": {"x": {"cuts": [0.0], "derived_from_data": True}},
            "analyses": [{"name": "a", "outcome": {"type": "binary", "event": "y"},
                          "exposure": "x", **design}], **top}


def _base(seed: int, n: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = np.round(rng.normal(size=n), 3)
    y = (rng.random(n) < 1 / (1 + np.exp(-1.2 * (x > 0.3) + 0.5))).astype(float)
    return pd.DataFrame({"x": x, "y": y, "g": np.arange(n)})


def test_cluster_bootstrap_of_the_cut_equals_the_row_bootstrap_of_collapsed_clusters() -> None:
    # Each cluster is 3 identical copies of one row. Drawing clusters then draws the rows of
    # the collapsed (one row per cluster) data, with the same generator calls; the Pearson
    # chi-square of every split is 3 times the collapsed one and the low-group shares are
    # equal, so every replicate's optimal cut must be the collapsed data's row-bootstrap cut.
    # (rows in exposure order: the search draws in that order, so row j of the collapsed data
    # and cluster j are the same unit of the generator's draws)
    base = _base(7, 150).sort_values("x", kind="stable").reset_index(drop=True)
    base["g"] = np.arange(len(base))
    copies = base.loc[base.index.repeat(3)].reset_index(drop=True)
    top = {"seed": 4, "resampling": {"bootstrap": 60, "permutations": 0}}
    clustered = cutpoints_table(*bare_refit(copies, _raw({"cluster": "g"}, **top)))
    rows = cutpoints_table(*bare_refit(base, _raw({}, **top)))
    s_c = clustered[clustered["row_type"] == "search"].iloc[0]
    s_r = rows[rows["row_type"] == "search"].iloc[0]
    assert s_c["status"] == "ok" and s_r["status"] == "ok"
    assert s_c["cut"] == s_r["cut"]
    assert s_c["statistic"] == pytest.approx(3 * s_r["statistic"], rel=1e-10)
    boot = [c for c in clustered.columns if c.startswith("boot_cut")]
    assert len(boot) == 5
    assert s_c[boot].tolist() == s_r[boot].tolist()
    # while the row bootstrap of the copies (rows drawn singly) is a different, narrower one
    singly = cutpoints_table(*bare_refit(copies, _raw({}, **top)))
    s_s = singly[singly["row_type"] == "search"].iloc[0]
    assert s_s[boot].tolist() != s_c[boot].tolist()


def test_the_permutation_p_value_is_withheld_with_clusters() -> None:
    df = _base(8, 300).assign(g=np.arange(300) // 6)
    tab = cutpoints_table(*bare_refit(df, _raw({"cluster": "g"}, seed=1,
                                               resampling={"bootstrap": 20,
                                                           "permutations": 99})))
    s = tab[tab["row_type"] == "search"].iloc[0]
    assert s["status"] == "ok"
    assert s["permutations"] == 0 and pd.isna(s["p_permutation"])
    assert pd.isna(s["p_simulated"])
    assert NO_NULL_DRAWS_WITH_CLUSTERS in s["message"]
    assert s["bootstrap_ok"] == 20


def test_row_permutations_reject_too_often_under_a_clustered_null() -> None:
    # Why the permutation p is withheld: under the null (outcome independent of exposure) but
    # with exposure and outcome each shared within clusters of 20 rows, the row-permutation
    # p-value of the maximally selected statistic rejects at the 5% level far more often than
    # 5% (seeded simulation; 40 data sets, 199 permutations each). With independent rows the
    # rate is 5%, and 40 data sets give at most 8/40 rejections with probability above 0.99
    # (binomial(40, 0.05)); the clustered rate must exceed that (it is 25/40 with this seed).
    rng = np.random.default_rng(2026)
    rejected = 0
    sims, perms, clusters, size = 40, 199, 30, 20
    for _ in range(sims):
        g = np.repeat(np.arange(clusters), size)
        x = rng.normal(size=clusters)[g] + 0.3 * rng.normal(size=g.size)
        p = 1 / (1 + np.exp(-1.5 * rng.normal(size=clusters)))[g]
        y = (rng.random(g.size) < p).astype(float)
        search = SplitSearch.build("binary", x, Outcome("binary", y))
        observed = np.nanmax(search.profile())
        perm_max = search.permutation_max(rng, perms)
        p_perm = (1 + np.sum(perm_max >= observed * (1 - 1e-10))) / (1 + perms)
        rejected += p_perm <= 0.05
    assert rejected > 8, rejected
