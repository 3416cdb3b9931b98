"""The bootstrap interval of the information kept (unbin.questions.kept): point estimates equal the
information table's, each replicate's share equals statsmodels / lifelines refits of the drawn
rows, reruns repeat, failures are recorded, and the percentile interval covers the true share in
seeded simulations (truth: the ratio of the LR statistics in a 2,000,000-row sample from the same
generating model, fitted with statsmodels / numpy least squares)."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from helpers import bare_refit
from unbin.models.weighted import resample_weights
from unbin.questions.information import information_table
from unbin.questions.kept import bootstrap_shares, information_bootstrap_table
from unbin.refit import analysis as refit_analysis

CUTS = [-0.6745, 0.0, 0.6745]  # quartiles of N(0, 1)


def _raw(outcome: dict[str, Any], bootstrap: int, adjust: list[str] | None = None,
         seed: int = 11, cuts: list[float] | None = None) -> dict[str, Any]:
    return {
        "study": "sim", "cohorts": [{"name": "sim", "path": "sim.parquet"}],
        "groupings": {"x": {"cuts": cuts or CUTS}},
        "analyses": [{"name": "a", "outcome": outcome, "exposure": "x",
                      **({"adjust": adjust} if adjust else {})}],
        "continuous": {"forms": ["linear"], "spline_knots": [3]},
        "resampling": {"bootstrap": bootstrap, "permutations": 0}, "seed": seed,
    }


OUTCOMES = {
    "binary": {"type": "binary", "event": "yb"},
    "continuous": {"type": "continuous", "value": "yc"},
    "count": {"type": "count", "count": "yn", "persontime": "pt"},
    "survival": {"type": "survival", "time": "t", "event": "d"},
}


def _frame(seed: int, n: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    z = 0.5 * x + rng.normal(size=n)
    eta = -0.4 + 0.7 * x - 0.3 * x ** 2 + 0.4 * z
    return pd.DataFrame({
        "x": x, "z": z, "yb": rng.binomial(1, 1 / (1 + np.exp(-eta))),
        "yc": eta + rng.normal(size=n), "yn": rng.poisson(np.exp(0.5 * eta)),
        "pt": rng.uniform(0.5, 2.0, n), "t": np.round(rng.exponential(np.exp(-eta)), 2) + 0.01,
        "d": rng.binomial(1, 0.7, n)})


@pytest.mark.parametrize("family", list(OUTCOMES))
def test_point_estimate_equals_the_information_table(refit_frame: Any, family: str) -> None:
    # The same share, LR(legacy) / LR(legacy + test spline), from the full refit's information
    # table (unbin.questions.information) and from the resampling job's own fits.
    df = _frame(1, 500)
    raw = _raw(OUTCOMES[family], 20, adjust=["z"])
    spec, r = refit_frame(df, raw)
    info = information_table(r).set_index("adjustment")["info_kept"]
    rb, spec_b = bare_refit(df, raw)
    kept = information_bootstrap_table(rb, spec_b).set_index("adjustment")
    assert list(kept.index) == ["legacy", "continuous", "none"]
    for coding in kept.index:
        assert kept.loc[coding, "info_kept"] == pytest.approx(info[coding], rel=1e-10)
        assert kept.loc[coding, "status"] == "ok"
        assert kept.loc[coding, "replicates_used"] == 20
        assert kept.loc[coding, "info_kept_lower"] < kept.loc[coding, "info_kept"]
        assert kept.loc[coding, "info_kept"] < kept.loc[coding, "info_kept_upper"]


def _rcs(x: np.ndarray, knots: tuple[float, ...]) -> np.ndarray:
    """Restricted cubic spline basis written out by hand (Harrell 2015, section 2.4.5)."""
    t = np.asarray(knots)
    k = len(t)

    def p3(u: np.ndarray) -> np.ndarray:
        return np.maximum(u, 0.0) ** 3

    cols = [x]
    for j in range(k - 2):
        cols.append(p3(x - t[j]) - p3(x - t[k - 2]) * (t[k - 1] - t[j]) / (t[k - 1] - t[k - 2])
                    + p3(x - t[k - 1]) * (t[k - 2] - t[j]) / (t[k - 1] - t[k - 2]))
    return np.column_stack(cols) / (t[-1] - t[0]) ** 2


def _reference_lr(family: str, d: pd.DataFrame, base: np.ndarray, extra: np.ndarray) -> float:
    """LR chi-square of ``extra`` added to ``base`` on the rows of ``d``: statsmodels GLM/OLS
    (maximum-likelihood variance) or lifelines Cox (Efron ties)."""
    if family == "survival":
        from lifelines import CoxPHFitter

        def ll(X: np.ndarray) -> float:
            cols = {f"c{j}": X[:, j] for j in range(X.shape[1])}
            frame = pd.DataFrame({**cols, "t": d["t"].to_numpy(), "d": d["d"].to_numpy()})
            cph = CoxPHFitter().fit(frame, "t", "d")
            return float(cph.log_likelihood_)

        return 2 * (ll(np.column_stack([base, extra])) - ll(base))

    def llf(X: np.ndarray) -> float:
        X1 = sm.add_constant(X, has_constant="add")
        if family == "continuous":
            return float(sm.OLS(d["yc"].to_numpy(), X1).fit().llf)
        if family == "binary":
            return float(sm.GLM(d["yb"].to_numpy(), X1, family=sm.families.Binomial()).fit().llf)
        return float(sm.GLM(d["yn"].to_numpy(), X1, family=sm.families.Poisson(),
                            offset=np.log(d["pt"].to_numpy())).fit().llf)

    return 2 * (llf(np.column_stack([base, extra])) - llf(base))


@pytest.mark.parametrize("family", list(OUTCOMES))
def test_replicate_shares_equal_reference_refits_of_the_drawn_rows(family: str) -> None:
    # Each replicate's share from the vectorised frequency-weight refits equals the share from
    # statsmodels (GLM, OLS) or lifelines (Cox) fitted on the drawn rows themselves, repeated
    # as often as drawn; designs written out by hand (group indicators, the spline basis).
    df = _frame(2, 300)
    raw = _raw(OUTCOMES[family], 3, adjust=["z"])
    r, spec = bare_refit(df, raw)
    shares = bootstrap_shares(r, spec)["legacy"]  # z enters linearly in the legacy coding
    W = resample_weights(spec.rng("a", "information-bootstrap"), len(df), 3)
    x = df["x"].to_numpy()
    groups = np.column_stack([(x > c).astype(float) for c in CUTS])  # cumulative coding
    spline = _rcs(x, refit_analysis.test_spline_term(r.analysis, x).knots)
    z = df["z"].to_numpy()[:, None]
    for b in range(3):
        m = np.repeat(np.arange(len(df)), W[b].astype(int))
        d = df.iloc[m].reset_index(drop=True)
        lr_legacy = _reference_lr(family, d, z[m], groups[m])
        lr_full = _reference_lr(family, d, z[m], np.column_stack([groups, spline])[m])
        assert shares[b] == pytest.approx(lr_legacy / lr_full, rel=2e-5, abs=1e-6)


def _nb_frame(seed: int, n: int) -> pd.DataFrame:
    """Overdispersed counts: Poisson with a gamma frailty of mean 1 and variance 1 (NB2 with
    alpha = 1)."""
    d = _frame(seed, n)
    rng = np.random.default_rng(seed + 100)
    eta = -0.4 + 0.7 * d["x"] - 0.3 * d["x"] ** 2 + 0.4 * d["z"]
    d["yn"] = rng.poisson(np.exp(0.5 * eta) * d["pt"] * rng.gamma(1.0, 1.0, n))
    return d


NB = {"type": "count", "count": "yn", "persontime": "pt", "count_model": "negative-binomial"}


def test_negative_binomial_replicates_are_nb2_refits_of_the_drawn_rows() -> None:
    # An NB2 analysis' replicate shares come from NB2 refits (alpha re-estimated), not from
    # Poisson refits: each equals the LR ratio of statsmodels' NegativeBinomial (NB2, log
    # person-time offset) fitted on the drawn rows repeated as often as drawn. The Poisson LR
    # ratio of the same rows differs, so the check can fail.
    df = _nb_frame(6, 400)
    raw = _raw(NB, 3, adjust=["z"])
    r, spec = bare_refit(df, raw)
    shares = bootstrap_shares(r, spec)["legacy"]
    W = resample_weights(spec.rng("a", "information-bootstrap"), len(df), 3)
    x = df["x"].to_numpy()
    groups = np.column_stack([(x > c).astype(float) for c in CUTS])
    spline = _rcs(x, refit_analysis.test_spline_term(r.analysis, x).knots)
    z = df["z"].to_numpy()[:, None]

    def nb_llf(d: pd.DataFrame, X: np.ndarray) -> float:
        model = sm.NegativeBinomial(d["yn"].to_numpy(), sm.add_constant(X, has_constant="add"),
                                    loglike_method="nb2", offset=np.log(d["pt"].to_numpy()))
        return float(model.fit(method="newton", maxiter=200, tol=1e-12, disp=0).llf)

    poisson_differs = False
    for b in range(3):
        m = np.repeat(np.arange(len(df)), W[b].astype(int))
        d = df.iloc[m].reset_index(drop=True)
        base = nb_llf(d, z[m])
        lr_legacy = 2 * (nb_llf(d, np.column_stack([z[m], groups[m]])) - base)
        lr_full = 2 * (nb_llf(d, np.column_stack([z[m], groups[m], spline[m]])) - base)
        assert shares[b] == pytest.approx(lr_legacy / lr_full, rel=1e-4)
        pois = _reference_lr("count", d, z[m], groups[m]) / _reference_lr(
            "count", d, z[m], np.column_stack([groups, spline])[m])
        poisson_differs |= abs(pois - shares[b]) > 1e-3
    assert poisson_differs


def test_negative_binomial_interval_is_around_its_own_estimate() -> None:
    # With NB2 refits the replicates estimate what the point estimate does: the percentile
    # interval contains the share kept (common practice for a percentile interval on a
    # smooth statistic; 60 replicates).
    kept = information_bootstrap_table(*bare_refit(_nb_frame(7, 600), _raw(NB, 60)))
    row = kept.set_index("adjustment").loc["none"]
    assert row["status"] == "ok" and row["replicates_used"] >= 55
    assert row["info_kept_lower"] < row["info_kept"] < row["info_kept_upper"]


def test_reruns_repeat_and_the_seed_decides_the_draws() -> None:
    df = _frame(3, 400)
    a = information_bootstrap_table(*bare_refit(df, _raw(OUTCOMES["binary"], 30)))
    b = information_bootstrap_table(*bare_refit(df, _raw(OUTCOMES["binary"], 30)))
    c = information_bootstrap_table(*bare_refit(df, _raw(OUTCOMES["binary"], 30, seed=12)))
    pd.testing.assert_frame_equal(a, b, check_exact=True)
    assert (a["info_kept"] == c["info_kept"]).all()
    assert not np.allclose(a["info_kept_lower"], c["info_kept_lower"])


def test_no_replicates_skips_the_interval_and_keeps_the_estimate() -> None:
    df = _frame(4, 300)
    kept = information_bootstrap_table(*bare_refit(df, _raw(OUTCOMES["continuous"], 0)))
    assert (kept["status"] == "skipped").all()
    assert kept["message"].str.contains("resampling.bootstrap").all()
    assert kept["info_kept"].between(0, 1).all()
    assert kept["info_kept_lower"].isna().all() and kept["info_kept_upper"].isna().all()


def test_an_empty_legacy_group_is_recorded_not_raised() -> None:
    df = _frame(5, 300)
    kept = information_bootstrap_table(*bare_refit(df, _raw(OUTCOMES["binary"], 10,
                                                            cuts=[-0.5, 0.5, 9.0])))
    assert (kept["status"] == "failed").all()
    assert kept["message"].str.contains("empty").all()
    assert kept["message"].str.contains("cuts").all()
    assert kept["info_kept"].isna().all()


def _truth_linear(slope: float, curve: float, noise: float, k: int) -> float:
    """The share kept in a 2,000,000-row sample of the generating model: LR = N log(RSS0/RSS1)
    by numpy least squares, the spline's knots at that sample's quantiles."""
    from unbin.terms.spline import default_knots

    rng = np.random.default_rng(2024)
    x = rng.normal(size=2_000_000)
    y = slope * x + curve * x ** 2 + noise * rng.normal(size=x.size)
    one = np.ones((x.size, 1))
    groups = np.column_stack([(x > c).astype(float) for c in CUTS])
    full = np.column_stack([one, groups, _rcs(x, default_knots(x, k))])

    def rss(X: np.ndarray) -> float:
        beta = np.linalg.lstsq(X, y, rcond=None)[0]
        return float(np.sum((y - X @ beta) ** 2))

    r0 = float(np.sum((y - y.mean()) ** 2))
    return np.log(r0 / rss(np.column_stack([one, groups]))) / np.log(r0 / rss(full))


def _truth_logistic(a0: float, slope: float, curve: float, k: int) -> float:
    """As :func:`_truth_linear`, logistic: LR from statsmodels fits of 2,000,000 rows."""
    from unbin.terms.spline import default_knots

    rng = np.random.default_rng(2025)
    x = rng.normal(size=2_000_000)
    y = rng.binomial(1, 1 / (1 + np.exp(-(a0 + slope * x + curve * x ** 2))))
    one = np.ones((x.size, 1))
    groups = np.column_stack([(x > c).astype(float) for c in CUTS])
    p = y.mean()
    ll0 = x.size * (p * np.log(p) + (1 - p) * np.log(1 - p))
    ll_leg = sm.Logit(y, np.column_stack([one, groups])).fit(disp=0).llf
    ll_full = sm.Logit(y, np.column_stack([one, groups, _rcs(x, default_knots(x, k))])
                       ).fit(disp=0).llf
    return float((ll_leg - ll0) / (ll_full - ll0))


def _coverage(family: str, truth: float, n: int, sims: int, bootstrap: int,
              draw: Any) -> tuple[float, float, float]:
    """Share of seeded replicates whose interval covers ``truth``, the mean interval width and
    the Monte-Carlo standard deviation of the point estimate."""
    hits, widths, points = [], [], []
    for s in range(sims):
        rng = np.random.default_rng(10_000 + s)
        df = draw(rng, n)
        kept = information_bootstrap_table(*bare_refit(df, _raw(OUTCOMES[family], bootstrap,
                                                                seed=s)))
        row = kept[kept["adjustment"] == "none"].iloc[0]
        assert row["status"] == "ok"
        hits.append(row["info_kept_lower"] <= truth <= row["info_kept_upper"])
        widths.append(row["info_kept_upper"] - row["info_kept_lower"])
        points.append(row["info_kept"])
    return float(np.mean(hits)), float(np.mean(widths)), float(np.std(points, ddof=1))


def _draw_linear(rng: np.random.Generator, n: int) -> pd.DataFrame:
    x = rng.normal(size=n)
    return pd.DataFrame({"x": x, "yc": 0.5 * x + 0.25 * x ** 2 + rng.normal(size=n)})


def _draw_logistic(rng: np.random.Generator, n: int) -> pd.DataFrame:
    x = rng.normal(size=n)
    return pd.DataFrame({"x": x, "yb": rng.binomial(
        1, 1 / (1 + np.exp(-(-0.3 + 0.9 * x - 0.35 * x ** 2))))})


def _binomial_band(p: float, sims: int, z: float = 3.3) -> tuple[float, float]:
    se = np.sqrt(p * (1 - p) / sims)
    return p - z * se, p + z * se


def test_interval_covers_the_true_share_linear_small() -> None:
    # 60 seeded replicates, n = 600, 100 bootstrap replicates each. Coverage: nominal 0.95 with
    # a two-sided binomial band of 3.3 Monte-Carlo SEs (0.86 to 1). Width: a 95% interval of a
    # roughly normal estimator is about 2 x 1.96 Monte-Carlo SDs of the point estimate
    # (common practice); the band allows the SD's own sampling error at 60 replicates.
    # Measured: truth 0.668, coverage 58/60, width ratio 0.98.
    truth = _truth_linear(0.5, 0.25, 1.0, 4)
    cover, width, sd = _coverage("continuous", truth, 600, 60, 100, _draw_linear)
    lo, _ = _binomial_band(0.95, 60)
    assert cover >= lo
    assert 0.7 < width / (2 * stats.norm.ppf(0.975) * sd) < 1.4


@pytest.mark.slow
@pytest.mark.long
def test_interval_covers_the_true_share_logistic() -> None:
    # 200 seeded replicates, n = 1,500, 200 bootstrap replicates each; truth from 2,000,000 rows
    # (statsmodels). Coverage must lie in 90-98% (Monte-Carlo SE at 200 replicates 1.5 points:
    # the band is -3.3 / +2 SEs around 95%), width as in the small test. Measured: truth
    # 0.867, coverage 191/200 = 95.5%, mean width / (2 x 1.96 x SD) = 1.02.
    truth = _truth_logistic(-0.3, 0.9, -0.35, 4)
    cover, width, sd = _coverage("binary", truth, 1500, 200, 200, _draw_logistic)
    assert 0.90 <= cover <= 0.98
    assert 0.8 < width / (2 * stats.norm.ppf(0.975) * sd) < 1.25


def test_large_cox_samples_draw_one_replicate_at_a_time(monkeypatch: pytest.MonkeyPatch) -> None:
    # Above weighted._BATCH_ROWS rows the Cox replicates are drawn one at a time (no
    # replicates x rows weights held); forced here on a small sample: each replicate's share
    # still equals lifelines' (Efron ties) on the rows drawn all at once from the same seed.
    from unbin.questions import kept

    calls: list[int] = []
    draw = kept.design_resample_replicates

    def counted(rng: np.random.Generator, outcome: Any, replicates: int) -> Any:
        calls.append(replicates)
        return draw(rng, outcome, replicates)

    monkeypatch.setattr(kept, "_BATCH_ROWS", 0)
    monkeypatch.setattr(kept, "design_resample_replicates", counted)
    df = _frame(2, 300)
    r, spec = bare_refit(df, _raw(OUTCOMES["survival"], 3, adjust=["z"]))
    shares = bootstrap_shares(r, spec)["legacy"]
    assert calls == [1, 1, 1]
    W = resample_weights(spec.rng("a", "information-bootstrap"), len(df), 3)
    x = df["x"].to_numpy()
    groups = np.column_stack([(x > c).astype(float) for c in CUTS])
    spline = _rcs(x, refit_analysis.test_spline_term(r.analysis, x).knots)
    z = df["z"].to_numpy()[:, None]
    for b in range(3):
        m = np.repeat(np.arange(len(df)), W[b].astype(int))
        d = df.iloc[m].reset_index(drop=True)
        lr_legacy = _reference_lr("survival", d, z[m], groups[m])
        lr_full = _reference_lr("survival", d, z[m], np.column_stack([groups, spline])[m])
        assert shares[b] == pytest.approx(lr_legacy / lr_full, rel=2e-5, abs=1e-6)
