"""An invented scenario: the (fictional) Lindenfeld Regional Health Registry and two partner
cohorts (Marrowby, Eastholm) of an invented consortium.

Several thousand simulated patients per cohort, each exposure with a known true shape shared by
every cohort (the cohorts differ in who they recruited: the exposures' distributions shift), so
that the demo's results — per cohort and pooled — can be checked against the truth it was built
with:

- ``readmission_sodium`` (binary): 30-day readmission is U-shaped in serum sodium (lowest risk at
  140 mmol/L); the legacy analysis used three clinical groups (<135, 135-<145, >=145).
- ``death_egfr`` (survival on the time-on-study scale, from the registry's dates of
  diagnosis, recruitment (delayed entry) and exit; strata by centre): the cause-specific log
  hazard of cardiorenal death rises linearly as kidney function falls below 60 and is flat
  above (an elbow); the legacy analysis split eGFR at 60. The elbow's effect fades: from
  :data:`EGFR_FADE_AFTER` years on it is :data:`EGFR_FADE` times as large (the analysis' follow-up
  windows show it). Death from other causes competes (``death_cause`` 2; its hazard rises with
  age, not with eGFR), so the risk at the horizon is a cumulative incidence. Age confounds it
  strongly (older people have lower eGFR and die sooner) and the legacy analysis adjusted for
  age in decades — residual confounding.
- ``visits_bmi`` (count, person-years offset): the clinic-visit rate is log-linear in BMI;
  people are clustered in general practices (``practice``), so its variances are cluster-robust.
- ``sbp_urate`` (continuous): systolic pressure rises linearly with serum urate, more steeply
  in older patients (a real effect modification: the slope differs between the age groups
  <50, 50-<60, 60-<70, >=70, which the analysis takes as its ``by``); the legacy cut at
  7.1 mg/dL was chosen from the data.
- ``readmission_sodium`` is also analysed by diabetes, which shifts the risk at every sodium (a
  main effect) without changing the U shape (no effect modification).
- ``readmission_sodium_imputed``: the same analysis with ``missing: {method: impute}``. In
  Marrowby, age is missing more often for readmitted patients (missing at random given the
  outcome); complete cases drop those rows, multiple imputation keeps them, and the two sit
  side by side in every table.

Eastholm's registry delivers its extract as a ';'-separated CSV with decimal commas and
day-first dates; the others deliver parquet.

Every number here is invented; the random generator is seeded, so the files are identical on
every run.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import yaml

from .published.demo_tables import demo_published

DEMO_SEED = 20260401
DEMO_ROWS = 6000
DAYS_PER_YEAR = 365.25
# The cohort whose registry delivers a ';'-separated CSV with decimal commas and day-first
# dates (dd.mm.yyyy) instead of durations, as many European registries export.
CSV_COHORT = "eastholm"
CSV_DATE_FORMAT = "%d.%m.%Y"

# The true curves, used to simulate and by tests that check the demo recovers them.
SODIUM_OPTIMUM = 140.0


def true_logodds_sodium(na: np.ndarray) -> np.ndarray:
    """U shape: log-odds rises quadratically away from 140 mmol/L."""
    return 0.025 * (na - SODIUM_OPTIMUM) ** 2


def true_loghr_egfr(egfr: np.ndarray) -> np.ndarray:
    """Elbow: +0.05 per mL/min/1.73m2 below 60, flat above (the cause-specific log hazard
    ratio of cardiorenal death before :data:`EGFR_FADE_AFTER` years; times :data:`EGFR_FADE`
    after)."""
    return 0.05 * np.clip(60.0 - egfr, 0.0, None)


EGFR_FADE_AFTER = 5.0  # years on study: the eGFR effect fades from here on
EGFR_FADE = 0.25  # the share of the early log hazard ratio that remains later


TRUE_VISITS_PER_BMI = 0.04  # log rate ratio per kg/m2
AGE_CUTS = (50, 60, 70)  # the legacy age groups, the levels of sbp_urate's ``by``
TRUE_SBP_PER_URATE_BY_AGE = (0.5, 1.5, 2.5, 3.5)  # mmHg per mg/dL in <50, 50-<60, 60-<70, >=70


def true_sbp_per_urate(age: np.ndarray) -> np.ndarray:
    """The true slope of systolic pressure on urate (mmHg per mg/dL) at each age."""
    groups = np.searchsorted(np.asarray(AGE_CUTS), np.asarray(age, dtype=float), side="right")
    return np.asarray(TRUE_SBP_PER_URATE_BY_AGE)[groups]


@dataclass(frozen=True)
class CohortProfile:
    """How one invented cohort's population differs: the exposures' distributions shift, the
    true curves stay the same."""

    name: str
    n: int
    seed: int
    age_mean: float = 63.0
    bmi_median: float = 27.0
    sodium_mean: float = 139.5
    sodium_sd: float = 4.0
    egfr_shift: float = 0.0
    urate_shift: float = 0.0
    urate_cut: float = 7.1  # the cut this cohort's own legacy paper used (chosen from its data)


COHORTS = (
    CohortProfile("lindenfeld", DEMO_ROWS, DEMO_SEED),
    CohortProfile("marrowby", 4000, DEMO_SEED + 1, age_mean=68.0, bmi_median=28.5,
                  sodium_mean=138.0, sodium_sd=4.6, egfr_shift=-6.0, urate_shift=0.5,
                  urate_cut=7.0),
    CohortProfile("eastholm", 3000, DEMO_SEED + 2, age_mean=57.0, bmi_median=25.5,
                  sodium_mean=140.5, sodium_sd=3.4, egfr_shift=5.0, urate_shift=-0.7,
                  urate_cut=5.6),
)


def simulate_registry(n: int = DEMO_ROWS, seed: int = DEMO_SEED,
                      profile: CohortProfile | None = None) -> pd.DataFrame:
    p = profile or CohortProfile("lindenfeld", n, seed)
    n, seed = p.n, p.seed
    rng = np.random.default_rng(seed)
    centre = rng.integers(1, 5, n)
    age = np.clip(rng.normal(p.age_mean, 11, n), 30, 92).round(1)
    sex = rng.integers(0, 2, n)
    bmi = np.clip(rng.lognormal(np.log(p.bmi_median), 0.17, n), 16, 55).round(1)
    p_diab = 1 / (1 + np.exp(-(-3.2 + 0.03 * (age - 60) + 0.12 * (bmi - 27))))
    diabetes = (rng.random(n) < p_diab).astype(int)
    sodium = np.round(rng.normal(p.sodium_mean, p.sodium_sd, n), 0)
    egfr = np.clip(105 + p.egfr_shift - 0.9 * (age - 40) + rng.normal(0, 14, n) - 6 * diabetes,
                   6, 140).round(0)
    urate = np.clip(rng.normal(5.8 + p.urate_shift + 0.6 * sex + 0.05 * (bmi - 27), 1.4, n),
                    1.5, 13).round(1)

    lo = -2.3 + true_logodds_sodium(sodium) + 0.02 * (age - 63) + 0.5 * diabetes
    readmit = (rng.random(n) < 1 / (1 + np.exp(-lo))).astype(int)

    # Survival: cardiorenal death with age as a strong confounder and an eGFR effect that
    # fades after EGFR_FADE_AFTER years (piecewise-constant hazard, drawn by inverting its
    # cumulative hazard), death from other causes competing, delayed entry, censoring.
    rest = 0.07 * (age - 63) + 0.3 * sex + 0.1 * (centre - 2.5)
    early = 0.05 * np.exp(rest + true_loghr_egfr(egfr))
    late = 0.05 * np.exp(rest + EGFR_FADE * true_loghr_egfr(egfr))
    draw = rng.exponential(1.0, n)
    t_event = np.where(draw < early * EGFR_FADE_AFTER, draw / early,
                       EGFR_FADE_AFTER + (draw - early * EGFR_FADE_AFTER) / late)
    entry = np.round(rng.uniform(0, 2.0, n), 2)
    censor = entry + rng.uniform(2, 10, n)
    # other causes: a generator of their own, so the draws above stay as they were
    t_other = (np.random.default_rng([seed, 11]).exponential(1.0, n)
               / (0.012 * np.exp(0.06 * (age - 63))))
    time = np.minimum(np.minimum(t_event, t_other), censor)
    cause = np.where(time == censor, 0, np.where(t_event <= t_other, 1, 2))
    keep_surv = time > entry + 0.01  # people who died before entering the registry never enter
    time = np.where(keep_surv, time, np.nan).round(3)
    cause = np.where(keep_surv, cause, 0)
    died = (cause > 0).astype(int)

    pyears = np.round(rng.uniform(0.5, 5.0, n), 2)
    rate = 1.2 * np.exp(TRUE_VISITS_PER_BMI * (bmi - 27) + 0.01 * (age - 63) + 0.3 * diabetes)
    visits = rng.poisson(rate * pyears)

    sbp = (128 + true_sbp_per_urate(age) * (urate - 6) + 0.45 * (age - 63) + 3 * sex
           + rng.normal(0, 14, n)).round(0)

    df = pd.DataFrame({
        "patient_id": np.arange(1, n + 1), "centre": centre, "age": age, "sex": sex,
        "diabetes": diabetes, "bmi": bmi, "sodium": sodium, "egfr": egfr, "urate": urate,
        "readmit30": readmit, "entry_years": entry, "followup_years": time,
        "died": np.where(np.isnan(time), np.nan, died),
        "death_cause": np.where(np.isnan(time), np.nan, cause), "visits": visits,
        "person_years": pyears,
        "sbp": sbp,
    })
    # A little missingness, as in any registry extract.
    for col, share in (("sodium", 0.01), ("urate", 0.02), ("bmi", 0.005)):
        df.loc[rng.random(n) < share, col] = np.nan
    # Marrowby's readmitted patients often came back through another hospital whose transfer
    # records lack the age: age is missing more often after a readmission (missing at random
    # given the outcome; a generator of its own, so every column above stays as it was). The
    # analysis readmission_sodium_imputed sets complete cases beside multiple imputation.
    if p.name == "marrowby":
        gone = np.random.default_rng([seed, 11]).random(n) < np.where(readmit == 1, 0.3, 0.04)
        df.loc[gone, "age"] = np.nan
    # The registry's dates (a generator of their own, so every column above stays as it was):
    # diagnosis (time zero), recruitment (delayed entry) and exit (death or censoring), the
    # durations above rounded to whole days.
    cal = np.random.default_rng([seed, 7])
    diagnosed = pd.Timestamp("2008-01-01") + pd.to_timedelta(cal.integers(0, 3 * 365, n),
                                                             unit="D")
    df["diagnosed_on"] = diagnosed
    df["recruited_on"] = diagnosed + pd.to_timedelta(np.round(entry * DAYS_PER_YEAR), unit="D")
    df["exit_on"] = diagnosed + pd.to_timedelta(np.round(time * DAYS_PER_YEAR), unit="D")
    # The general practice that follows each person (80 practices; a generator of its own):
    # the cluster of the visits analysis.
    df["practice"] = np.random.default_rng([seed, 11]).integers(1, 81, n)
    return df


def demo_spec(cohorts: tuple[CohortProfile, ...] = COHORTS,
              as_delivered: bool = False) -> dict[str, Any]:
    """The demo's spec. ``as_delivered``: each cohort's extract in the format its registry
    delivers (:func:`extract_path`, as :func:`write_demo` writes them); otherwise every
    extract is ``data/<cohort>.parquet`` (for tests that write the frames themselves)."""
    def path(name: str) -> str:
        return extract_path(name) if as_delivered else f"data/{name}.parquet"

    def dialect(name: str) -> dict[str, Any]:
        return ({"csv": {"date_format": CSV_DATE_FORMAT}}
                if as_delivered and name == CSV_COHORT else {})

    return {
        "study": "lindenfeld-registry-demo",
        "cohorts": [{"name": c.name, "path": path(c.name), **dialect(c.name),
                     **({"groupings": {"urate": {"cuts": [c.urate_cut],
                                                 "derived_from_data": True}}}
                        if c.urate_cut != 7.1 else {})}
                    for c in cohorts],
        "variables": {
            "sodium": {"label": "Serum sodium", "unit": "mmol/L"},
            "egfr": {"label": "eGFR", "unit": "mL/min/1.73m²"},
            "bmi": {"label": "Body-mass index", "unit": "kg/m²"},
            "urate": {"label": "Serum urate", "unit": "mg/dL"},
            "age": {"label": "Age", "unit": "years"},
            "followup_years": {"unit": "years"},  # the horizon reads "within 5 years"
            "death_cause": {"label": "Cause of death (1 cardiorenal, 2 other)"},
            "centre": {"type": "categorical"},
            "practice": {"label": "General practice"},
        },
        "groupings": {
            "sodium": {"cuts": [135, 145], "labels": ["low", "normal", "high"],
                       "reference": "normal"},
            "egfr": {"cuts": [60], "reference": ">=60"},
            "age": {"cuts": list(AGE_CUTS)},
            "bmi": {"cuts": [25, 30], "labels": ["normal", "overweight", "obese"]},
            "urate": {"cuts": [7.1], "derived_from_data": True},
        },
        "analyses": [
            {"name": "readmission_sodium",
             "outcome": {"type": "binary", "event": "readmit30"},
             "exposure": "sodium", "adjust": ["age", "sex"], "by": "diabetes",
             "reported": {"contrast": "low vs normal", "estimate": 1.9, "lower": 1.5,
                          "upper": 2.4}},
            {"name": "death_egfr",
             # time on study from the registry's dates: from diagnosis, at risk from
             # recruitment (delayed entry) to death or censoring; the horizon is 5 years on
             # that scale; death from other causes (code 2) competes with cardiorenal death
             # (1), and the eGFR effect is read per follow-up window (before and after 5 years)
             "outcome": {"type": "survival", "event": "death_cause",
                         "event_of_interest": 1, "competing": [2], "follow_up_windows": [5],
                         "time": {"start": "diagnosed_on", "entry": "recruited_on",
                                  "end": "exit_on", "unit": "years"},
                         "time_scale": "on_study", "horizon": 5},
             "exposure": "egfr", "adjust": ["age", "sex"], "strata": ["centre"],
             "reported": {"contrast": "<60 vs >=60", "estimate": 2.1, "lower": 1.8,
                          "upper": 2.5}},
            {"name": "visits_bmi",
             "outcome": {"type": "count", "count": "visits", "persontime": "person_years"},
             "exposure": "bmi", "adjust": ["age", "diabetes"], "cluster": "practice",
             "risk_thresholds": [1.5]},  # clinic visits per person-year
            {"name": "sbp_urate",
             "outcome": {"type": "continuous", "value": "sbp"},
             "exposure": "urate", "adjust": ["sex"], "by": "age",
             "risk_thresholds": [140],  # predicted mean systolic pressure, mmHg
             "filters": [{"variable": "age", "min": 18}]},
            {"name": "readmission_sodium_imputed",  # readmission_sodium, ages imputed
             "outcome": {"type": "binary", "event": "readmit30"},
             "exposure": "sodium", "adjust": ["age", "sex"], "by": "diabetes",
             "missing": {"method": "impute", "imputations": 5, "iterations": 5}},
        ],
        "continuous": {"forms": ["linear", "spline", "fp"], "spline_knots": [3, 4, 5]},
        "risk_thresholds": [0.1, 0.2],
        "disclosure": {"min_cell": 10},
        # Smaller than the defaults (200, 1000) so that the demo stays quick.
        "resampling": {"bootstrap": 100, "permutations": 199},
        "seed": DEMO_SEED,
        # two invented studies known only from their published grouped tables
        "published": demo_published(DEMO_SEED, TRUE_VISITS_PER_BMI),
    }


def extract_path(cohort: str) -> str:
    """Where the demo keeps a cohort's extract, in the format its registry delivers."""
    return f"data/{cohort}.csv" if cohort == CSV_COHORT else f"data/{cohort}.parquet"


def write_registry_csv(df: pd.DataFrame, path: Path) -> None:
    """The registry's export: ';'-separated, decimal commas, dates as dd.mm.yyyy, the dates
    instead of the durations."""
    out = df.drop(columns=["entry_years", "followup_years"])
    for col in ("diagnosed_on", "recruited_on", "exit_on"):
        out[col] = out[col].dt.strftime(CSV_DATE_FORMAT)
    out.to_csv(path, sep=";", decimal=",", index=False, encoding="utf-8")


def write_demo(out: str | Path, n: int | None = None,
               cohorts: tuple[CohortProfile, ...] = COHORTS) -> Path:
    """Write the demo's extracts under ``out/data/`` and its spec at ``out/spec.yaml``
    (``n``: rows per cohort instead of the profiles' sizes, for quick tests)."""
    out = Path(out)
    if n is not None:
        from dataclasses import replace

        cohorts = tuple(replace(c, n=n) for c in cohorts)
    (out / "data").mkdir(parents=True, exist_ok=True)
    for c in cohorts:
        df = simulate_registry(profile=c)
        if c.name == CSV_COHORT:
            write_registry_csv(df, out / extract_path(c.name))
        else:
            df.to_parquet(out / extract_path(c.name), index=False)
    spec_path = out / "spec.yaml"
    spec_path.write_text(
        "# unbin demo: an invented registry (all data simulated; see unbin.demo).\n"
        + yaml.safe_dump(demo_spec(cohorts, as_delivered=True), sort_keys=False,
                         allow_unicode=True),
        encoding="utf-8")
    return spec_path
