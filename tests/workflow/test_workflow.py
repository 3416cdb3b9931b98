"""End to end: the demo through the real Snakemake workflow, the command contract, provenance,
byte-identical reruns, and the demo recovering the truths it was simulated with."""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from unbin.consortium.bundles import BUNDLE_TABLES
from unbin.demo import (
    COHORTS,
    EGFR_FADE,
    EGFR_FADE_AFTER,
    extract_path,
    true_loghr_egfr,
    true_logodds_sodium,
)
from unbin.results.tables import read_provenance, read_table

pytestmark = pytest.mark.workflow


def run_cli(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "unbin.cli", *args], capture_output=True,
                          text=True, cwd=cwd, timeout=600)


def test_demo_command_contract(demo_out: Path) -> None:
    assert (demo_out / "spec.yaml").is_file()
    assert list((demo_out / "data").glob("*.parquet"))
    for name in ("fits", "information", "effects", "curves"):
        assert (demo_out / "tables" / f"{name}.parquet").is_file()


def test_every_analysis_completed(demo_out: Path) -> None:
    status = read_table(demo_out / "tables" / "status.parquet")
    assert set(status["analysis"]) == {"readmission_sodium", "readmission_sodium_imputed",
                                       "death_egfr", "visits_bmi", "sbp_urate"}
    assert set(status["cohort"]) == {c.name for c in COHORTS}
    assert (status["status"] == "ok").all(), status[["analysis", "status", "message"]]


def test_provenance_in_every_table(demo_out: Path) -> None:
    for path in sorted((demo_out / "tables").glob("*.parquet")):
        prov = read_provenance(path)
        assert prov["table"] == path.stem
        assert prov["seed"] == 20260401
        assert len(prov["spec_digest"]) == 64
        inputs = {i["cohort"]: i for i in prov["inputs"]}
        for c in COHORTS:
            inp = inputs[c.name]
            assert inp["path"] == extract_path(c.name) and inp["rows"] == c.n
            data = (demo_out / extract_path(c.name)).read_bytes()
            assert inp["sha256"] == hashlib.sha256(data).hexdigest()
        assert "statsmodels" in prov["versions"]
        assert "time" not in json.dumps(prov).lower().replace("followup", "")


def test_rerun_is_byte_identical(demo_out: Path, tmp_path: Path) -> None:
    """Same inputs, same bytes (results carry no timestamps): a second run in a fresh folder."""
    proc = run_cli("demo", "--out", str(tmp_path), "--cores", "2", "--quiet")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    for path in sorted((demo_out / "tables").glob("*.parquet")):
        assert (tmp_path / "tables" / path.name).read_bytes() == path.read_bytes(), path.name


def _info(demo_out: Path, analysis: str, adjustment: str = "continuous") -> pd.Series:
    info = read_table(demo_out / "tables" / "information.parquet")
    row = info[(info["analysis"] == analysis) & (info["adjustment"] == adjustment)
               & (info["cohort"] == "lindenfeld")]
    assert len(row) == 1
    return row.iloc[0]


@pytest.mark.parametrize("analysis", ["readmission_sodium", "death_egfr"])
def test_demo_nonlinear_truths_beat_grouping_and_linear(demo_out: Path, analysis: str) -> None:
    """Simulated truth (unbin.demo): U shape for sodium, elbow for eGFR. The spline or FP must
    beat both the legacy grouping and the linear form on AIC and the spline adds significantly
    to the groups; the information kept is the LR ratio of the fits in fits.parquet."""
    r = _info(demo_out, analysis)
    best_flexible = min(r["aic_spline"], r["aic_fp"])
    assert best_flexible < r["aic_legacy"] and best_flexible < r["aic_linear"]
    assert r["added_p"] < 0.05
    assert r["best_form"] in ("spline", "fp")
    # README: info_kept = LR(legacy) / LR(legacy + spline), both against the adjustment-only
    # fit of the same coding, from the log-likelihoods the fits table reports.
    fits = read_table(demo_out / "tables" / "fits.parquet")
    ll = fits[(fits["analysis"] == analysis) & (fits["cohort"] == "lindenfeld")
              & (fits["adjustment"] == "continuous") & fits["selected"]].set_index("form")["loglik"]
    kept = (ll["legacy"] - ll["null"]) / (ll["legacy+test_spline"] - ll["null"])
    assert r["info_kept"] == pytest.approx(kept, rel=1e-9)
    assert r["info_kept"] < 0.9  # a strongly nonlinear truth: the groups lose a clear share


@pytest.mark.parametrize("analysis", ["visits_bmi", "sbp_urate"])
def test_demo_linear_truths(demo_out: Path, analysis: str) -> None:
    """Simulated truth linear: linear beats the grouping on AIC, and there is no evidence of
    nonlinearity at the 1% level."""
    r = _info(demo_out, analysis)
    assert r["aic_linear"] < r["aic_legacy"]
    assert r["nonlinearity_p"] > 0.01


def test_demo_grouping_keeps_the_share_of_variance_its_groups_explain(demo_out: Path) -> None:
    """Linear truth (visits_bmi, fixed clinical cuts): in the local limit a grouping keeps
    c = Var(E[x | group]) / Var(x) of the LR chi-square (the generalisation of Cohen 1983 and
    MacCallum et al. 2002 to any cuts), c computed here from the analysis sample. Tolerance 4
    delta-method sds of the log ratio, 2 sqrt((1/c - 1) / LR) (as in test_information). The
    urate cut was chosen from the data, so its share is optimistic and not checked."""
    from unbin.data import analysis_sample, read_extract
    from unbin.spec import load_spec
    from unbin.terms.legacy import legacy_term

    spec = load_spec(demo_out / "spec.yaml").for_cohort("lindenfeld")
    a = spec.analysis("visits_bmi")
    sample = analysis_sample(read_extract(spec.cohort("lindenfeld").path, a.columns), a, spec)
    x = sample.frame[a.exposure].to_numpy(float)
    groups = legacy_term(x, a.exposure, spec).codes(x)
    c = float(np.var(pd.Series(x).groupby(groups).transform("mean")) / np.var(x))
    r = _info(demo_out, "visits_bmi", adjustment="none")
    sd = 2 * np.sqrt((1 / c - 1) / (r["lr_legacy_plus_spline"] - 1))
    assert abs(np.log(r["info_kept"] / c)) < 4 * sd, (r["info_kept"], c, sd)


def test_demo_spline_curve_tracks_truth(demo_out: Path) -> None:
    """The spline curve (continuous adjustment) against the simulated truth, relative to the same
    reference value: within its pointwise 99.9% band at most grid points (the band is
    pointwise, so a few misses are expected; common practice). The eGFR effect fades over
    follow-up, so its truth is checked per follow-up window (the windows table's test spline,
    the early truth before EGFR_FADE_AFTER years, EGFR_FADE times it after)."""
    curves = read_table(demo_out / "tables" / "curves.parquet")
    windows = read_table(demo_out / "tables" / "windows.parquet")
    windows = windows[(windows["analysis"] == "death_egfr") & (windows["row_type"] == "curve")]
    early, late = f"0-{EGFR_FADE_AFTER:g}", f"{EGFR_FADE_AFTER:g}+"
    for analysis, truth, table in (
            ("readmission_sodium", true_logodds_sodium, curves),
            ("death_egfr", true_loghr_egfr, windows[windows["window"] == early]),
            ("death_egfr", lambda x: EGFR_FADE * true_loghr_egfr(x),
             windows[windows["window"] == late])):
        c = table[(table["analysis"] == analysis)
                  & (table["form"].isin(["spline", "test_spline"]))
                  & (table["adjustment"] == "continuous") & (table["cohort"] == "lindenfeld")]
        assert len(c) > 10, analysis
        x = c["x"].to_numpy()
        ref = float(c["x_reference"].iloc[0])
        true = truth(x) - truth(np.array([ref]))
        z = np.abs(c["estimate"].to_numpy() - true) / np.maximum(c["se"].to_numpy(), 1e-9)
        assert np.mean(z < 3.29) > 0.9, (analysis, np.round(z, 1))


def test_effects_have_legacy_and_continuous_contrasts(demo_out: Path) -> None:
    eff = read_table(demo_out / "tables" / "effects.parquet")
    sod = eff[(eff["analysis"] == "readmission_sodium") & (eff["contrast"] == "low vs normal")
              & (eff["cohort"] == "lindenfeld")]
    assert set(sod["form"]) >= {"legacy", "linear", "spline", "fp"}
    assert (sod["scale"] == "odds ratio").all()
    legacy = sod[(sod["form"] == "legacy") & (sod["adjustment"] == "legacy")].iloc[0]
    assert legacy["effect_lower"] > 1.5  # the U shape: low sodium clearly raises the odds
    # The spline's contrast between the groups' medians against the simulated truth there
    # (within 3.29 se: a 99.9% interval, as for the curves below).
    spline_c = sod[(sod["form"] == "spline") & (sod["adjustment"] == "continuous")].iloc[0]
    truth = true_logodds_sodium(np.array([spline_c["x_value"], spline_c["x_reference"]]))
    assert abs(spline_c["estimate"] - (truth[0] - truth[1])) < 3.29 * spline_c["se"]
    # Inside the 'low' group the spline's effect spreads widely (U shape): not flat.
    spline = sod[(sod["form"] == "spline") & (sod["adjustment"] == "legacy")].iloc[0]
    assert spline["within_p10"] > 1.5 * spline["within_p90"]


def test_density_suppresses_small_cells(demo_out: Path) -> None:
    dens = read_table(demo_out / "tables" / "density.parquet")
    shown = dens["count"].dropna()
    assert (shown.eq(0) | shown.ge(10)).all()
    assert dens.loc[dens["suppressed"], "count"].isna().all()


def test_check_rejects_bad_spec_before_fitting(tmp_path: Path) -> None:
    from unbin.demo import write_demo

    spec = write_demo(tmp_path)
    text = spec.read_text().replace("count: visits", "count: vists", 1)
    spec.write_text(text)
    proc = run_cli("check", str(spec))
    assert proc.returncode != 0
    assert "vists" in proc.stdout and "Did you mean 'visits'" in proc.stdout
    proc = run_cli("run", str(spec), "--out", str(tmp_path / "out"), "--cores", "1")
    assert proc.returncode != 0
    assert not (tmp_path / "out" / "tables").exists()


def test_demo_pools_three_cohorts(demo_out: Path) -> None:
    """The demo's three invented cohorts share one true curve: pooled tables are filled, every
    cohort has a bundle, the pooled U curve for sodium tracks the truth, and the harmonisation
    table shows the urate cuts tracking the cohorts' medians (simulated that way)."""
    for c in COHORTS:
        for t in BUNDLE_TABLES:
            assert (demo_out / "bundles" / c.name / f"{t}.parquet").is_file()
    pc = read_table(demo_out / "tables" / "pooled_curves.parquet")
    assert {"fixed", "random", "multivariate fixed", "multivariate random"} <= set(pc["method"])
    mv = pc[(pc["analysis"] == "readmission_sodium") & (pc["adjustment"] == "continuous")
            & (pc["method"] == "multivariate random")]
    x, ref = mv["x"].to_numpy(), float(mv["x_reference"].iloc[0])
    true = true_logodds_sodium(x) - true_logodds_sodium(np.array([ref]))
    z = np.abs(mv["estimate"].to_numpy() - true) / mv["se"].to_numpy()
    assert np.mean(z < 3.29) > 0.9
    h = read_table(demo_out / "tables" / "harmonisation.parquet")
    ur = h[(h["variable"] == "urate") & (h["role"] == "exposure")]
    assert ur["cohort"].nunique() == 3
    assert ur["cut_median_correlation"].iloc[0] > 0.8
