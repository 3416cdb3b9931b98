"""The missingness table: shares missing against pandas' isna on rows selected in the test,
standardised differences against hand computations (Austin 2009; Yang & Dalton 2012), seeded
simulations (missingness that depends on the outcome; missing completely at random), small-cell
suppression, and the fit job's handling (no missing values, a failed sample, the demo)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from unbin.data import analysis_sample
from unbin.pipeline.jobs import analyse
from unbin.questions.missingness import COLUMNS, missingness_table, smd_levels, smd_means
from unbin.spec import Spec, parse_spec


def _spec(tmp_path: Path, outcome: dict[str, Any], min_cell: int = 0,
          **analysis: Any) -> Spec:
    raw = {"study": "sim", "cohorts": [{"name": "sim", "path": "sim.parquet"}],
           "groupings": {"marker": {"cuts": [45, 60]}},
           "analyses": [{"name": "a", "outcome": outcome, "exposure": "marker", **analysis}],
           "disclosure": {"min_cell": min_cell},
           "continuous": {"forms": ["linear"]}, "resampling": {"bootstrap": 0,
                                                               "permutations": 0}}
    return parse_spec(raw, base=tmp_path)


def _table(frame: pd.DataFrame, spec: Spec) -> pd.DataFrame:
    a = spec.analyses[0]
    return missingness_table(frame, analysis_sample(frame, a, spec), a, spec)


def _cell(t: pd.DataFrame, column: str, subset: str, level: str) -> pd.Series:
    rows = t[(t["column"] == column) & (t["subset"] == subset) & (t["level"] == level)]
    assert len(rows) == 1, (column, subset, level)
    return rows.iloc[0]


def _survival_frame(seed: int, n: int = 600) -> pd.DataFrame:
    """Invented: a marker, age, a three-level site, survival with delayed entry; holes in
    marker, age, site and the event; some rows filtered out by age, some with time <= entry."""
    rng = np.random.default_rng(seed)
    entry = rng.uniform(0.0, 1.0, n)
    df = pd.DataFrame({
        "marker": rng.normal(55, 12, n), "age": rng.normal(60, 10, n),
        "site": rng.choice(["north", "south", "west"], n),
        "entry": entry, "time": entry + rng.exponential(4.0, n),
        "died": (rng.random(n) < 0.35).astype(float)})
    for col, share in (("marker", 0.08), ("age", 0.1), ("site", 0.05), ("died", 0.04)):
        df.loc[rng.random(n) < share, col] = np.nan
    df.loc[:19, "age"] = 10.0  # filtered out (age >= 18): not part of the table
    df.loc[20:29, "time"] = df.loc[20:29, "entry"]  # dropped later for follow-up: still counted
    return df


def test_shares_agree_with_pandas_isna_on_the_rows_the_complete_case_step_sees(
        tmp_path: Path) -> None:
    frame = _survival_frame(1)
    spec = _spec(tmp_path, {"type": "survival", "time": "time", "event": "died",
                            "entry": "entry"}, adjust=["age", "site"],
                 filters=[{"variable": "age", "min": 18}])
    t = _table(frame, spec)
    assert tuple(t.columns) == COLUMNS
    # Independently: the filter keeps age >= 18 (a missing age fails the filter as NaN >= 18).
    rows = frame[frame["age"] >= 18]
    cols = ["died", "time", "entry", "marker", "age", "site"]
    assert list(dict.fromkeys(t["column"])) == cols
    for c in cols:
        cell = _cell(t, c, "all", "all")
        assert cell["rows"] == len(rows)
        assert cell["missing"] == rows[c].isna().sum()
        assert cell["share_missing"] == pytest.approx(rows[c].isna().mean(), abs=1e-15)
    # By legacy group: cuts 45 and 60, closed left (a value on a cut in the group above).
    group = pd.cut(rows["marker"], [-np.inf, 45, 60, np.inf], right=False,
                   labels=["<45", "45-<60", ">=60"])
    levels = list(dict.fromkeys(t.loc[t["subset"] == "exposure group", "level"]))
    assert len(levels) == 3
    for label, level in zip(["<45", "45-<60", ">=60"], levels, strict=True):
        part = rows[group == label]
        for c in cols:
            cell = _cell(t, c, "exposure group", level)
            assert cell["rows"] == len(part)
            assert cell["share_missing"] == pytest.approx(part[c].isna().mean(), abs=1e-15)
    for level, value in (("event", 1.0), ("no event", 0.0)):
        part = rows[rows["died"] == value]
        for c in cols:
            cell = _cell(t, c, "outcome", level)
            assert cell["rows"] == len(part)
            assert cell["missing"] == part[c].isna().sum()


def test_continuous_outcome_tertiles_and_count_outcome_split(tmp_path: Path) -> None:
    rng = np.random.default_rng(2)
    n = 300
    frame = pd.DataFrame({"marker": rng.normal(55, 12, n), "z": rng.normal(size=n),
                          "v": rng.normal(size=n), "c": rng.poisson(0.8, n),
                          "pt": rng.uniform(0.5, 2, n)})
    frame.loc[rng.random(n) < 0.2, "z"] = np.nan
    frame.loc[rng.random(n) < 0.1, "v"] = np.nan
    t = _table(frame, _spec(tmp_path, {"type": "continuous", "value": "v"}, adjust=["z"]))
    v = frame["v"]
    q1, q2 = np.quantile(v.dropna(), [1 / 3, 2 / 3])  # tertile cuts; a value on a cut goes low
    for level, part in (("tertile 1", frame[v <= q1]), ("tertile 2", frame[(v > q1) & (v <= q2)]),
                        ("tertile 3", frame[v > q2])):
        cell = _cell(t, "z", "outcome", level)
        assert cell["rows"] == len(part) and cell["missing"] == part["z"].isna().sum()
    t = _table(frame, _spec(tmp_path, {"type": "count", "count": "c", "persontime": "pt"},
                            adjust=["z"]))
    for level, part in (("count > 0", frame[frame["c"] > 0]), ("count = 0", frame[frame["c"] == 0])):
        cell = _cell(t, "z", "outcome", level)
        assert cell["rows"] == len(part) and cell["missing"] == part["z"].isna().sum()


def test_standardised_differences_against_hand_computations(tmp_path: Path) -> None:
    frame = _survival_frame(3)
    spec = _spec(tmp_path, {"type": "survival", "time": "time", "event": "died",
                            "entry": "entry"}, adjust=["age", "site"])
    t = _table(frame, spec)
    cols = ["died", "time", "entry", "marker", "age", "site"]
    complete = frame[cols].notna().all(axis=1)
    # Numeric (Austin 2009, eq. for continuous variables): difference of means over the root of
    # the mean of the two sample variances, complete-case rows minus dropped rows.
    for c in ("age", "marker", "time"):
        a = frame.loc[complete, c].to_numpy()
        b = frame.loc[~complete, c].dropna().to_numpy()
        expected = (a.mean() - b.mean()) / np.sqrt((a.var(ddof=1) + b.var(ddof=1)) / 2)
        cell = _cell(t, c, "all", "all")
        assert cell["smd_method"] == "means"
        assert cell["smd"] == pytest.approx(expected, rel=1e-12)
    # Binary (Austin 2009, eq. for dichotomous variables).
    p1 = frame.loc[complete, "died"].mean()
    p2 = frame.loc[~complete, "died"].dropna().mean()
    expected = abs(p1 - p2) / np.sqrt((p1 * (1 - p1) + p2 * (1 - p2)) / 2)
    cell = _cell(t, "died", "all", "all")
    assert cell["smd_method"] == "levels"
    assert cell["smd"] == pytest.approx(expected, rel=1e-12)
    # Three levels (Yang & Dalton 2012): sqrt((T - C)' S^-1 (T - C)) over levels 2..k, S the
    # mean of the two multinomial covariance matrices, written out for k = 3.
    s_cc = frame.loc[complete, "site"]
    s_dr = frame.loc[~complete, "site"].dropna()
    tp = np.array([(s_cc == lev).mean() for lev in ("south", "west")])
    cp = np.array([(s_dr == lev).mean() for lev in ("south", "west")])
    s = np.array([[(tp[0] * (1 - tp[0]) + cp[0] * (1 - cp[0])) / 2,
                   (-tp[0] * tp[1] - cp[0] * cp[1]) / 2],
                  [(-tp[0] * tp[1] - cp[0] * cp[1]) / 2,
                   (tp[1] * (1 - tp[1]) + cp[1] * (1 - cp[1])) / 2]])
    expected = np.sqrt((tp - cp) @ np.linalg.solve(s, tp - cp))
    cell = _cell(t, "site", "all", "all")
    assert cell["smd_method"] == "levels"
    assert cell["smd"] == pytest.approx(expected, rel=1e-10)


def test_multi_level_difference_does_not_depend_on_the_reference_level() -> None:
    # Yang & Dalton (2012): a Mahalanobis distance of the proportions, so the level left out
    # does not matter; two levels give Austin's (2009) binary formula.
    rng = np.random.default_rng(4)
    a = pd.Series(rng.choice(list("abcd"), 200, p=[0.4, 0.3, 0.2, 0.1]))
    b = pd.Series(rng.choice(list("abcd"), 90, p=[0.25, 0.25, 0.25, 0.25]))
    base = smd_levels(a, b)
    renamed = {"a": "z", "b": "b", "c": "c", "d": "d"}  # "b" becomes the first sorted level
    assert smd_levels(a.map(renamed), b.map(renamed)) == pytest.approx(base, rel=1e-10)
    assert smd_levels(b, a) == pytest.approx(base, rel=1e-10)
    x, y = pd.Series([1, 1, 0, 0, 0]), pd.Series([1, 0, 0, 0])
    p, q = 0.4, 0.25
    assert smd_levels(x, y) == pytest.approx(abs(p - q) / np.sqrt((p * (1 - p) + q * (1 - q)) / 2))
    assert smd_means(np.array([1.0, 2.0, 3.0]), np.array([1.0, 2.0, 3.0])) == 0.0


def test_missingness_that_depends_on_the_outcome_shows_in_the_by_outcome_shares(
        tmp_path: Path) -> None:
    # Seeded simulation: z is missing with probability 0.30 when y = 1 and 0.10 when y = 0.
    rng = np.random.default_rng(5)
    n = 4000
    y = (rng.random(n) < 0.3).astype(float)
    frame = pd.DataFrame({"marker": rng.normal(55, 12, n), "z": rng.normal(size=n), "y": y})
    frame.loc[rng.random(n) < np.where(y == 1, 0.30, 0.10), "z"] = np.nan
    t = _table(frame, _spec(tmp_path, {"type": "binary", "event": "y"}, min_cell=10,
                            adjust=["z"]))
    ev, ne = _cell(t, "z", "outcome", "event"), _cell(t, "z", "outcome", "no event")
    se = np.sqrt(0.3 * 0.7 / ev["rows"] + 0.1 * 0.9 / ne["rows"])  # binomial MC error
    assert abs(ev["share_missing"] - 0.30) < 4 * np.sqrt(0.3 * 0.7 / ev["rows"])
    assert abs(ne["share_missing"] - 0.10) < 4 * np.sqrt(0.1 * 0.9 / ne["rows"])
    assert ev["share_missing"] - ne["share_missing"] > 0.2 - 4 * se > 4 * se
    # Complete-case rows hold fewer events than dropped rows: a clear difference in y. Its
    # true value: P(y | z observed) = .21/.84 = .25 vs P(y | z missing) = .09/.16 = .5625.
    p, q = 0.21 / 0.84, 0.09 / 0.16
    truth = abs(p - q) / np.sqrt((p * (1 - p) + q * (1 - q)) / 2)
    assert _cell(t, "y", "all", "all")["smd"] == pytest.approx(truth, abs=0.1)
    # The exposure is unrelated to the missingness: its difference is small.
    assert abs(_cell(t, "marker", "all", "all")["smd"]) < 0.15


def test_missing_completely_at_random_gives_differences_near_zero_over_replicates(
        tmp_path: Path) -> None:
    # Under MCAR a numeric column's difference has mean 0 and SD about sqrt(1/n1 + 1/n2)
    # (large-sample variance of a standardised mean difference, common practice); a 3-level
    # column's n1 n2 / (n1 + n2) d^2 is about chi-squared with 2 df (mean 2; the Mahalanobis
    # form of Yang & Dalton 2012). Bands: 4 Monte-Carlo SEs, two-sided for the SD.
    spec = _spec(tmp_path, {"type": "binary", "event": "y"}, adjust=["z", "g"])
    reps, n = 150, 400
    d_num, stat, sd_theory = [], [], []
    for r in range(reps):
        rng = np.random.default_rng(1000 + r)
        frame = pd.DataFrame({"marker": rng.normal(55, 12, n), "z": rng.normal(size=n),
                              "g": rng.choice(["p", "q", "r"], n, p=[0.5, 0.3, 0.2]),
                              "y": (rng.random(n) < 0.3).astype(float)})
        frame.loc[rng.random(n) < 0.2, "marker"] = np.nan
        t = _table(frame, spec)
        n2 = int(frame["marker"].isna().sum())
        n1 = n - n2
        d_num.append(_cell(t, "z", "all", "all")["smd"])
        stat.append(n1 * n2 / n * _cell(t, "g", "all", "all")["smd"] ** 2)
        sd_theory.append(np.sqrt(1 / n1 + 1 / n2))
    d = np.array(d_num)
    sd = float(np.mean(sd_theory))
    assert abs(d.mean()) < 4 * sd / np.sqrt(reps)
    assert 1 - 4 / np.sqrt(2 * reps) < d.std(ddof=1) / sd < 1 + 4 / np.sqrt(2 * reps)
    assert abs(np.mean(stat) - 2.0) < 4 * 2.0 / np.sqrt(reps)  # chi2(2): SD 2


def test_no_missing_values_give_a_table_of_zeros(tmp_path: Path) -> None:
    rng = np.random.default_rng(6)
    n = 200
    frame = pd.DataFrame({"marker": rng.normal(55, 12, n), "z": rng.normal(size=n),
                          "y": (rng.random(n) < 0.3).astype(float)})
    t = _table(frame, _spec(tmp_path, {"type": "binary", "event": "y"}, adjust=["z"]))
    assert (t["missing"] == 0).all() and (t["share_missing"] == 0).all()
    assert not t["suppressed"].any()
    top = t[t["subset"] == "all"]
    assert top["smd"].isna().all() and (top["note"] == "no row dropped").all()


def test_small_counts_are_withheld_and_cannot_be_given_back(tmp_path: Path) -> None:
    rng = np.random.default_rng(7)
    n = 400
    y = np.r_[np.ones(100), np.zeros(300)]
    frame = pd.DataFrame({"marker": rng.normal(55, 12, n), "z": rng.normal(size=n), "y": y})
    frame.loc[[0, 1, 2], "z"] = np.nan          # 3 missing among events
    frame.loc[100:139, "z"] = np.nan            # 40 missing among non-events
    t = _table(frame, _spec(tmp_path, {"type": "binary", "event": "y"}, min_cell=10,
                            adjust=["z"]))
    assert _cell(t, "z", "all", "all")["missing"] == 43  # a total that is shown
    ev, ne = _cell(t, "z", "outcome", "event"), _cell(t, "z", "outcome", "no event")
    # disclosure's rules: 3 is withheld, and 40 too, or 43 - 40 would give the 3 back.
    assert pd.isna(ev["missing"]) and pd.isna(ne["missing"])
    assert ev["suppressed"] and ne["suppressed"]
    assert np.isnan(ev["share_missing"]) and np.isnan(ne["share_missing"])
    shown = t["missing"].dropna().astype(int)
    assert not ((shown > 0) & (shown < 10)).any()


def test_the_fit_job_writes_it_for_failed_samples_too(tmp_path: Path) -> None:
    rng = np.random.default_rng(8)
    n = 200
    frame = pd.DataFrame({"marker": rng.normal(55, 12, n), "z": rng.normal(size=n),
                          "y": (rng.random(n) < 0.3).astype(float)})
    frame.loc[5:, "z"] = np.nan  # only 5 complete rows: the analysis fails
    spec = _spec(tmp_path, {"type": "binary", "event": "y"}, adjust=["z"])
    tables, status = analyse(spec, "sim", "a", frame, resampling=False)
    assert status["status"] == "failed"
    t = tables["missingness"]
    assert _cell(t, "z", "all", "all")["missing"] == n - 5  # it explains the failure
    # Data that do not fit the spec: an empty table with its columns, the status says why.
    bad = frame.assign(marker="high")
    tables, status = analyse(spec, "sim", "a", bad, resampling=False)
    assert status["status"] == "failed" and "marker" in status["message"]
    assert tables["missingness"].empty and tuple(tables["missingness"].columns) == COLUMNS


def test_the_demo_fit_job_writes_a_keyed_missingness_table(tmp_path: Path) -> None:
    # Through the job function without Snakemake, on a small demo cohort.
    from unbin.demo import COHORTS, write_demo
    from unbin.pipeline.jobs import fit_analysis
    from unbin.results.tables import read_table
    from unbin.spec import load_spec

    spec_path = write_demo(tmp_path, n=1500, cohorts=COHORTS[:1])
    spec = load_spec(spec_path)
    cohort = spec.cohorts[0].name
    a = spec.analysis("sbp_urate")
    status = fit_analysis(spec_path, cohort, a.name, tmp_path / "work")
    assert status["status"] in ("ok", "partial"), status["message"]
    t = read_table(tmp_path / "work" / "missingness.parquet")
    assert tuple(t.columns) == ("cohort", "analysis", *COLUMNS)
    extract = pd.read_parquet(spec.cohorts[0].path)
    rows = extract[extract["age"] >= 18]  # the analysis' filter
    cell = _cell(t, "urate", "all", "all")
    assert cell["rows"] == len(rows) and rows["urate"].isna().sum() >= spec.min_cell
    assert cell["missing"] == rows["urate"].isna().sum()
    assert cell["share_missing"] == pytest.approx(rows["urate"].isna().mean(), abs=1e-15)


def test_a_failing_missingness_table_loses_only_itself(tmp_path: Path,
                                                       monkeypatch: pytest.MonkeyPatch) -> None:
    import unbin.pipeline.jobs as jobs

    def broken(*args: Any) -> pd.DataFrame:
        raise ValueError("boom")

    monkeypatch.setattr(jobs, "missingness_table", broken)
    rng = np.random.default_rng(9)
    n = 200
    frame = pd.DataFrame({"marker": rng.normal(55, 12, n), "z": rng.normal(size=n),
                          "y": (rng.random(n) < 0.3).astype(float)})
    spec = _spec(tmp_path, {"type": "binary", "event": "y"}, adjust=["z"])
    tables, status = analyse(spec, "sim", "a", frame, resampling=False)
    assert status["status"] == "partial" and "missingness" in status["message"]
    assert tables["missingness"].empty and len(tables["fits"]) > 0
