"""The jobs that derive the common bases: one summary job per cohort for every analysis whose
basis is derived, one job for all the bases, and an analysis no cohort could summarise recorded
in its fit job's status while the others go on."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

from helpers import keep_analyses
from unbin.demo import write_demo
from unbin.pipeline.jobs import common_basis, fit_analysis, summarise_sample
from unbin.pipeline.workflow_support import derived_basis_analyses
from unbin.spec import load_spec


def _two_cohort_spec(tmp_path: Path) -> Path:
    """The demo cut to two cohorts and three analyses, one of which fixes its basis."""
    spec_path = write_demo(tmp_path, n=400)
    raw = yaml.safe_load(spec_path.read_text(encoding="utf-8"))
    raw["cohorts"] = raw["cohorts"][:2]
    raw = keep_analyses(raw, "sbp_urate", "visits_bmi", "readmission_sodium")
    fixed = next(a for a in raw["analyses"] if a["name"] == "readmission_sodium")
    fixed["continuous"] = {"spline_knots": {"values": [130, 137, 141, 148]},
                           "reference_value": 140, "grid_range": [125, 155]}
    spec_path.write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    return spec_path


def test_one_summary_job_per_cohort_and_one_basis_job(tmp_path: Path) -> None:
    spec_path = _two_cohort_spec(tmp_path)
    spec = load_spec(spec_path)
    derived = derived_basis_analyses(spec)
    assert derived == ["visits_bmi", "sbp_urate"]  # the fixed basis needs no summaries
    dirs = []
    for c in spec.cohorts:
        out = tmp_path / "summaries" / c.name
        summarise_sample(spec_path, c.name, out)
        assert sorted(p.stem for p in out.glob("*.json")) == sorted(derived)
        dirs.append(out)
        # the summary's quartiles are numpy's of the analysis sample (adults, urate known)
        s = json.loads((out / "sbp_urate.json").read_text())
        df = pd.read_parquet(tmp_path / c.path_as_written)
        x = df.loc[(df["age"] >= 18) & df[["urate", "sbp", "sex"]].notna().all(axis=1),
                   "urate"].to_numpy(float)
        assert s["n"] == x.size
        assert [s["q25"], s["q75"]] == list(np.percentile(x, [25, 75]))
    common_basis(spec_path, dirs, tmp_path / "common")
    assert sorted(p.stem for p in (tmp_path / "common").glob("*.json")) == sorted(derived)
    basis = json.loads((tmp_path / "common" / "sbp_urate.json").read_text())
    assert basis["source"] == "cohorts" and len(basis["knots"]) == 4


def test_an_analysis_no_cohort_could_summarise_fails_alone(tmp_path: Path) -> None:
    spec_path = _two_cohort_spec(tmp_path)
    spec = load_spec(spec_path)
    dirs = []
    for c in spec.cohorts:
        out = tmp_path / "summaries" / c.name
        summarise_sample(spec_path, c.name, out)
        bad = json.loads((out / "visits_bmi.json").read_text())
        bad.update(status="failed", message="only 3 rows in the analysis sample")
        (out / "visits_bmi.json").write_text(json.dumps(bad))
        dirs.append(out)
    common_basis(spec_path, dirs, tmp_path / "common")
    failed = json.loads((tmp_path / "common" / "visits_bmi.json").read_text())
    assert failed["status"] == "failed" and "'visits_bmi'" in failed["message"]
    assert "knots" in json.loads((tmp_path / "common" / "sbp_urate.json").read_text())
    cohort = spec.cohorts[0].name
    status = fit_analysis(spec_path, cohort, "visits_bmi", tmp_path / "work",
                          tmp_path / "common" / "visits_bmi.json")
    assert status["status"] == "failed"
    assert "no cohort could summarise" in status["message"]
    written = pd.read_parquet(tmp_path / "work" / "status.parquet")
    assert written["status"].tolist() == ["failed"]
