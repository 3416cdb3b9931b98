"""Consortium mode: common bases, share-safe bundles, pooling equal across one run and separate
runs, and the pooled curve's coverage of a shared true curve."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from helpers import keep_analyses
from unbin.consortium.basis import combine, sample_summary
from unbin.consortium.bundles import BUNDLE_TABLES, make_bundle
from unbin.consortium.meta_analysis import pool_multivariate, pooled_curve
from unbin.demo import COHORTS, demo_spec, simulate_registry
from unbin.models import Outcome, fit
from unbin.pipeline.jobs import analyse
from unbin.results.tables import read_table
from unbin.spec import ContinuousOptions, parse_spec
from unbin.terms import GroupedTerm, SplineTerm


def _small_spec(tmp: Path, cohorts: list[str], n: int, fixed: bool) -> Path:
    """A quick demo-style spec: one analysis (binary, U shape), no FP search, small resampling;
    with ``fixed`` the common basis comes from the spec (knots, reference, grid)."""
    raw = demo_spec(tuple(c for c in COHORTS if c.name in cohorts))
    keep_analyses(raw, "readmission_sodium")
    raw["continuous"] = {"forms": ["linear", "spline"], "spline_knots": [4]}
    if fixed:
        raw["analyses"][0]["continuous"] = {"spline_knots": {"values": [132, 137, 141, 146]},
                                           "reference_value": 140, "grid_range": [130, 150]}
    raw["resampling"] = {"bootstrap": 10, "permutations": 19}
    (tmp / "data").mkdir(parents=True, exist_ok=True)
    for c in COHORTS:
        if c.name in cohorts:
            from dataclasses import replace

            simulate_registry(profile=replace(c, n=n)).to_parquet(
                tmp / "data" / f"{c.name}.parquet", index=False)
    path = tmp / "spec.yaml"
    path.write_text(yaml.safe_dump(raw, sort_keys=False))
    return path


def _run(*args: str) -> None:
    proc = subprocess.run([sys.executable, "-m", "unbin.cli", *args], capture_output=True,
                          text=True, timeout=600)
    assert proc.returncode == 0, proc.stdout + proc.stderr


def test_common_basis_is_weighted_mean_of_cohort_summaries() -> None:
    """Knots = n-weighted mean of the cohorts' knot quantiles (never from pooled rows);
    a single cohort gets its own sample's default knots (common practice)."""
    rng = np.random.default_rng(1)
    opts = ContinuousOptions(common_knots=4)
    term = GroupedTerm("x", (0.0,), "left", ("lo", "hi"), 1)
    xa, xb = rng.normal(0, 1, 3000), rng.normal(1, 2, 1000)
    sa, sb = sample_summary(xa, term, opts), sample_summary(xb, term, opts)
    basis = combine([sa, sb], opts)
    expect = (3000 * np.array(sa["knots"]) + 1000 * np.array(sb["knots"])) / 4000
    np.testing.assert_allclose(basis.knots, expect, rtol=1e-12)
    assert basis.grid_low == min(sa["p01"], sb["p01"]) and basis.grid_high == max(sa["p99"],
                                                                                   sb["p99"])
    single = combine([sa], opts)
    np.testing.assert_allclose(single.knots, np.quantile(xa, [0.05, 0.35, 0.65, 0.95]))
    assert single.reference == pytest.approx(float(np.median(xa[xa >= 0])))


def test_bundle_holds_no_row_level_data_and_no_small_counts() -> None:
    """The bundle's shape does not grow with the number of people (doubling the cohort leaves
    every bundle table's row count unchanged) and no count is below the disclosure threshold."""
    raw = demo_spec(COHORTS[:1])
    keep_analyses(raw, "visits_bmi", "sbp_urate")
    raw["continuous"] = {"forms": ["linear", "spline"], "spline_knots": [4]}
    raw["resampling"] = {"bootstrap": 5, "permutations": 9}
    raw["disclosure"] = {"min_cell": 2000}  # large, so that suppression must happen
    spec = parse_spec(raw, base=Path("."))
    shapes = []
    for n in (1500, 3000):
        frame = simulate_registry(n)
        tables: dict[str, list[pd.DataFrame]] = {}
        for a in spec.analyses:
            t, status = analyse(spec, "lindenfeld", a.name, frame)
            assert status["status"] == "ok", status["message"]
            for name, df in t.items():
                df = df.copy()
                df.insert(0, "analysis", a.name)
                df.insert(0, "cohort", "lindenfeld")
                tables.setdefault(name, []).append(df)
        bundle = make_bundle({k: pd.concat(v, ignore_index=True) for k, v in tables.items()},
                             spec.min_cell)
        shapes.append({k: len(v) for k, v in bundle.items()})
        counts = bundle["counts"]
        assert counts["n"].isna().all() if n < 2000 else (counts["n"].dropna() >= 2000).all()
        for df in bundle.values():
            for col in ("n", "events"):
                if col in df.columns:
                    v = pd.to_numeric(df[col], errors="coerce").dropna()
                    assert ((v == 0) | (v >= 2000)).all()
        per_curve = bundle["curves"].groupby(["analysis", "adjustment", "form"]).size()
        assert (per_curve == 100).all()  # the grid, not the people
    assert shapes[0] == shapes[1]
    assert set(shapes[0]) == set(BUNDLE_TABLES)


@pytest.mark.workflow
def test_pool_of_separate_runs_equals_all_in_one(tmp_path: Path) -> None:
    """`unbin pool` on bundles from separate single-cohort runs gives the same pooled tables as
    the all-in-one workflow (the common basis is fixed in the spec, as sites must agree on it)."""
    names = ["lindenfeld", "marrowby", "eastholm"]
    spec = _small_spec(tmp_path / "all", names, 800, fixed=True)
    _run("run", str(spec), "--out", str(tmp_path / "all" / "out"), "--cores", "2", "--quiet")
    bundles = []
    for name in names:
        site = tmp_path / name
        s = _small_spec(site, [name], 800, fixed=True)
        _run("run", str(s), "--out", str(site / "out"), "--cores", "2", "--quiet")
        bundles.append(str(site / "out" / "bundles" / name))
    _run("pool", *reversed(bundles), "--out", str(tmp_path / "pooled"))
    for t in ("pooled_curves", "pooled_effects", "heterogeneity", "harmonisation"):
        a = read_table(tmp_path / "all" / "out" / "tables" / f"{t}.parquet")
        b = read_table(tmp_path / "pooled" / "tables" / f"{t}.parquet")
        assert len(a) > 0, t
        pd.testing.assert_frame_equal(a, b, check_exact=False, rtol=1e-12)


def test_pooled_curve_covers_shared_truth() -> None:
    """Simulation with known truth: three cohorts with different exposure distributions and one
    true curve that the common-knot spline represents exactly (so no approximation bias). Each
    cohort fits the spline (OLS); the pooled curve's 95% pointwise intervals must cover the
    truth f(x) - f(ref) at the nominal rate. With 300 replicates x 5 points the Monte Carlo SE of
    the mean coverage is below 1.3 points (less with correlated points, but bounded by the
    single-point SE 1.26): fixed effects must lie in [0.92, 0.98]; random effects (method of
    moments, between-cohort covariance truncated at 0, hence a little conservative) in
    [0.92, 0.995] (common practice)."""
    rng = np.random.default_rng(20260402)
    term = SplineTerm("x", (-1.5, -0.5, 0.5, 1.5))
    beta = np.array([0.4, -1.5, 2.0])  # a hump: f = B(x) @ beta
    ref = 0.0
    grid = np.array([-1.2, -0.6, 0.3, 0.9, 1.4])
    truth = (term.basis(grid) - term.basis(np.array([ref]))) @ beta
    fixed, random = [], []
    for _ in range(300):
        Y, S = [], []
        for mu, sd, n in ((-0.3, 0.8, 400), (0.2, 0.9, 300), (0.4, 0.7, 500)):
            x = rng.normal(mu, sd, n)
            y = term.basis(x) @ beta + rng.normal(0, 1.0, n)
            res = fit("continuous", term.basis(x), Outcome("continuous", y), term.names())
            idx = res.index(term.names())
            Y.append(res.coef[idx])
            S.append(res.cov[np.ix_(idx, idx)])
        mv = pool_multivariate(np.array(Y), np.array(S))
        for mean, cov, acc in ((mv.fe_mean, mv.fe_cov, fixed), (mv.re_mean, mv.re_cov, random)):
            est, se = pooled_curve(mean, cov, term.basis(grid), term.basis(np.array([ref])))
            acc.append(np.abs(est - truth) <= 1.959964 * se)
    assert 0.92 <= float(np.mean(fixed)) <= 0.98, np.mean(fixed)
    assert 0.92 <= float(np.mean(random)) <= 0.995, np.mean(random)


def _shifted_fp_spec() -> tuple[object, pd.DataFrame]:
    """A continuous outcome on an exposure with negative values and a log-shaped truth, so the
    selected fractional polynomial needs a shift (its origin lies just below the minimum)."""
    from conftest import _one_analysis

    rng = np.random.default_rng(8)
    x = rng.uniform(-2.0, 3.0, 1500)
    frame = pd.DataFrame({"x": x, "y": np.log(x + 2.2) + rng.normal(0.0, 0.3, x.size)})
    raw = _one_analysis({"type": "continuous", "value": "y"}, "x", {"cuts": [0.0]},
                        continuous={"forms": ["linear", "fp"], "spline_knots": [4]},
                        resampling={"bootstrap": 5, "permutations": 9})
    return parse_spec(raw, base=Path(".")), frame


def test_fp_curve_on_a_wider_common_grid_is_missing_below_its_origin_not_an_error() -> None:
    """A common grid that reaches below this cohort's minimum (another cohort's exposure goes
    lower): the FP curve there is NaN with in_range false; the analysis keeps every table."""
    from unbin.consortium.basis import CommonBasis

    spec, frame = _shifted_fp_spec()
    basis = CommonBasis("x", (-1.5, 0.0, 1.0, 2.5), 0.5, -4.0, 3.0, "cohorts", (-0.5, 1.8),
                        (("<0", -1.0), (">=0", 1.5)))
    tables, status = analyse(spec, "sim", "a", frame, basis, resampling=False)
    assert status["status"] in ("ok", "partial") and "failed (" not in status["message"], status
    cur = tables["curves"]
    fp = cur[(cur["form"] == "fp") & (cur["adjustment"] == "legacy")]
    fits = tables["fits"]
    assert len(fp) == 100 and len(fits) and len(tables["effects"])
    origin = -json.loads(fits.loc[(fits["form"] == "fp") & (fits["adjustment"] == "legacy"),
                                  "exposure_basis"].iloc[0])[0]["shift"]
    assert frame["x"].min() - 0.06 < origin < frame["x"].min()  # delta = 1% of the range 5
    below = fp["x"] <= origin
    assert below.any()
    assert fp.loc[below, "estimate"].isna().all() and not fp.loc[below, "in_range"].any()
    assert fp.loc[~below & fp["in_range"], "estimate"].notna().all()
    cc = tables["common_contrasts"]
    assert set(cc["contrast_type"]) == {"common quartiles", "common group"}
    grp = cc[(cc["form"] == "fp") & (cc["contrast_type"] == "common group")
             & (cc["adjustment"] == "legacy")]
    # one non-reference group: its common value against the common reference value
    assert len(grp) == 1 and grp["x_value"].iloc[0] in (-1.0, 1.5)
    assert grp["x_reference"].iloc[0] == 0.5


def test_one_failing_question_keeps_the_other_tables(monkeypatch: pytest.MonkeyPatch) -> None:
    import unbin.questions.ranges

    def broken(r: object, spec: object) -> pd.DataFrame:
        raise ValueError("deliberately broken for the test")

    monkeypatch.setattr(unbin.questions.ranges, "ranges_table", broken)
    spec, frame = _shifted_fp_spec()
    tables, status = analyse(spec, "sim", "a", frame, resampling=False)
    assert status["status"] == "partial"
    assert "question 'ranges' failed (ValueError: deliberately broken" in status["message"]
    assert tables["ranges"].empty
    for name in ("fits", "effects", "curves", "information", "common_contrasts"):
        assert len(tables[name]) > 0, name


def test_common_contrast_values_are_weighted_means_of_cohort_summaries() -> None:
    """Common quartiles = n-weighted means of the cohorts' quartiles; common group values =
    n-weighted means of the cohorts' group medians (numpy on the raw samples); with the whole
    basis fixed by the spec, the quartile points of the fixed grid and no group values."""
    rng = np.random.default_rng(2)
    opts = ContinuousOptions(common_knots=4)
    term = GroupedTerm("x", (0.0,), "left", ("lo", "hi"), 1)
    xa, xb = rng.normal(0, 1, 3000), rng.normal(1, 2, 1000)
    basis = combine([sample_summary(xa, term, opts), sample_summary(xb, term, opts)], opts)
    qa, qb = np.quantile(xa, [0.25, 0.75]), np.quantile(xb, [0.25, 0.75])
    np.testing.assert_allclose(basis.quartiles, (3000 * qa + 1000 * qb) / 4000, rtol=1e-12)
    lo = (3000 * np.median(xa[xa < 0]) + 1000 * np.median(xb[xb < 0])) / 4000
    assert dict(basis.group_values)["lo"] == pytest.approx(lo, rel=1e-12)
    assert dict(basis.group_values)["hi"] == pytest.approx(basis.reference, rel=1e-12)
    again = type(basis).from_dict(json.loads(json.dumps(basis.to_dict())))
    assert again == basis
    fixed = ContinuousOptions(common_knots=4, knot_values=(-1.0, 0.0, 1.0, 2.0),
                              reference_value=0.0, grid_range=(-2.0, 2.0))
    fb = combine([sample_summary(xa, term, fixed)], fixed)
    assert fb.source == "spec" and fb.group_values == ()
    assert fb.contrast_quartiles() == (-1.0, 1.0)


def test_summary_leaves_out_medians_of_small_groups() -> None:
    """Disclosure: a group with fewer than min_cell rows sends no median in the summary."""
    x = np.concatenate([np.full(3, -1.0), np.linspace(0.0, 5.0, 200)])
    term = GroupedTerm("x", (0.0,), "left", ("lo", "hi"), 1)
    s = sample_summary(x, term, ContinuousOptions(common_knots=4), min_cell=10)
    assert s["group_medians"] == {"hi": pytest.approx(float(np.median(x[x >= 0])))}
