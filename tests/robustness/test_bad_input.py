"""The bad-input matrix: for each problem, the message the user sees or the status recorded in the
outputs.

- Spec-time problems (the spec itself, or the spec against the extract's columns and types) stop
  `unbin check` and `unbin run` with exit code 2 and one message per problem, before any fitting:
  no output folder is created.
- Fit-time problems (what only the analysis sample shows) are recorded per analysis — in
  ``status`` and in the failing fits' ``status``/``message``/``warnings`` — and the rest
  completes (one real workflow run at the end shows it end to end).

Everything runs in-process on a few hundred invented rows, except that one workflow run.
"""

from __future__ import annotations

import subprocess
import sys
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import yaml

from unbin.cli import main
from unbin.data import data_problems
from unbin.errors import SpecError
from unbin.pipeline.jobs import analyse
from unbin.results.tables import read_table
from unbin.spec import Spec, load_spec, parse_spec

N = 300


def registry(n: int = N, seed: int = 7) -> pd.DataFrame:
    """An invented registry extract: a biomarker ('marker') with a log-linear association with
    every outcome, age and sex as confounders, and two exactly collinear covariates."""
    rng = np.random.default_rng(seed)
    marker = rng.uniform(20, 90, n).round(1)
    age = rng.normal(60, 10, n).round(1)
    sex = rng.integers(0, 2, n).astype(float)
    w = rng.normal(0, 1, n).round(3)
    lin = 0.03 * (marker - 55) + 0.02 * (age - 60)
    t_event = rng.exponential(1.0, n) / (0.2 * np.exp(lin))
    censor = rng.uniform(1, 6, n)
    py = rng.uniform(0.5, 3.0, n).round(2)
    return pd.DataFrame({
        "id": np.arange(1, n + 1),
        "marker": marker, "age": age, "sex": sex,
        "w": w, "w_scaled": 3 * w - 2,  # collinear with w by construction
        "readmit": (rng.random(n) < 1 / (1 + np.exp(-(-1.0 + lin)))).astype(float),
        "years": np.minimum(t_event, censor).round(3),
        "died": (t_event <= censor).astype(float),
        "visits": rng.poisson(1.5 * np.exp(lin) * py).astype(float),
        "pyears": py,
        "sbp": (130 + 0.2 * (marker - 55) + 0.4 * (age - 60) + rng.normal(0, 10, n)).round(0),
    })


OUTCOMES: dict[str, dict[str, Any]] = {
    "binary": {"type": "binary", "event": "readmit"},
    "survival": {"type": "survival", "time": "years", "event": "died"},
    "count": {"type": "count", "count": "visits", "persontime": "pyears"},
    "continuous": {"type": "continuous", "value": "sbp"},
}


def base_raw(path: str = "registry.parquet") -> dict[str, Any]:
    """A valid spec: one analysis per outcome family, small resampling sizes."""
    return {
        "study": "robustness",
        "cohorts": [{"name": "north", "path": path}],
        "groupings": {"marker": {"cuts": [40, 60]}, "age": {"cuts": [50, 70]}},
        "analyses": [{"name": f"{family}_marker", "outcome": dict(outcome), "exposure": "marker",
                      "adjust": ["age", "sex"]} for family, outcome in OUTCOMES.items()],
        "continuous": {"forms": ["linear", "spline"], "spline_knots": [4]},
        "resampling": {"bootstrap": 10, "permutations": 19},
        "seed": 11,
    }


def _flat(text: str) -> str:
    return " ".join(text.split())


def _write(folder: Path, raw: dict[str, Any], frame: pd.DataFrame | None = None) -> Path:
    if frame is not None:
        frame.to_parquet(folder / "registry.parquet", index=False)
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    return path


def _stops_before_fitting(spec_path: Path, messages: list[str], tmp_path: Path,
                          capsys: pytest.CaptureFixture[str]) -> None:
    """`unbin check` and `unbin run` exit 2, print every message, and `run` writes nothing."""
    assert main(["check", str(spec_path)]) == 2
    out = _flat(capsys.readouterr().out)
    for m in messages:
        assert _flat(m) in out
    results = tmp_path / "results"
    assert main(["run", str(spec_path), "--out", str(results), "--cores", "1", "--quiet"]) == 2
    out = _flat(capsys.readouterr().out)
    for m in messages:
        assert _flat(m) in out
    assert not results.exists()  # nothing fitted, no output folder


# --------------------------------------------------------------------------- spec problems


def _set(path: tuple[Any, ...], value: Any) -> Callable[[dict[str, Any]], None]:
    def edit(raw: dict[str, Any]) -> None:
        node = raw
        for part in path[:-1]:
            node = node[part]
        node[path[-1]] = value
    return edit


def _rename(path: tuple[Any, ...], old: str, new: str) -> Callable[[dict[str, Any]], None]:
    def edit(raw: dict[str, Any]) -> None:
        node = raw
        for part in path:
            node = node[part]
        node[new] = node.pop(old)
    return edit


SPEC_CASES: list[tuple[str, Callable[[dict[str, Any]], None], list[str]]] = [
    ("unknown top-level key", _rename((), "continuous", "continous"),
     ["(top level): unknown key 'continous'. Did you mean 'continuous'?"]),
    ("misspelled groupings: one message, the cause", _rename((), "groupings", "groupngs"),
     ["(top level): unknown key 'groupngs'. Did you mean 'groupings'?"]),
    ("unknown analysis key", _rename(("analyses", 1), "adjust", "adjustment"),
     ["analyses[survival_marker]: unknown key 'adjustment'. Did you mean 'adjust'?"]),
    ("wrong type: seed as text", _set(("seed",), "eleven"),
     ["seed: 'eleven' has the wrong type; expected integer."]),
    ("wrong type: adjust as text", _set(("analyses", 0, "adjust"), "age, sex"),
     ["analyses[binary_marker].adjust: 'age, sex' has the wrong type; expected array."]),
    ("wrong type: cuts as text", _set(("groupings", "marker", "cuts"), "40, 60"),
     ["groupings.marker.cuts: '40, 60' has the wrong type; expected array."]),
    ("exposure without a grouping", _set(("analyses", 2, "exposure"), "age_at_entry"),
     ["analyses[count_marker].exposure: 'age_at_entry' has no entry under 'groupings'"]),
    ("unsorted cuts", _set(("groupings", "marker", "cuts"), [60, 40]),
     ["groupings.marker.cuts: [60, 40] must be strictly increasing with no repeats; write them "
      "as [40.0, 60.0]."]),
    ("duplicate cuts", _set(("groupings", "age", "cuts"), [50, 50, 70]),
     ["groupings.age.cuts: [50, 50, 70] must be strictly increasing with no repeats; write them "
      "as [50.0, 70.0]."]),
    ("reference group that does not exist", _set(("groupings", "marker", "reference"), ">=70"),
     ["groupings.marker.reference: '>=70' is not one of the groups ['<40', '40-<60', '>=60']. "
      "Did you mean '>=60'?"]),
    ("outcome column given as a number", _set(("analyses", 0, "outcome", "event"), 1),
     ["analyses[binary_marker].outcome.event: 1 has the wrong type; expected string."]),
    ("outcome of an unknown type", _set(("analyses", 3, "outcome", "type"), "continous"),
     ["analyses[continuous_marker].outcome.type: 'continous' is not one of ['binary', 'continuous', 'count', "
      "'survival']. Did you mean 'continuous'?"]),
    ("outcome field of another family", _set(("analyses", 0, "outcome", "value"), "sbp"),
     ["analyses[binary_marker].outcome.value: not used by a binary outcome (it takes "
      "['event']); remove it."]),
    ("survival outcome without its event", _rename(("analyses", 1, "outcome"), "event", "died"),
     ["analyses[survival_marker].outcome: unknown key 'died'.",
      "analyses[survival_marker].outcome: a survival outcome needs 'event' (a column name); "
      "add it."]),
]


@pytest.mark.parametrize(("edit", "messages"), [c[1:] for c in SPEC_CASES],
                         ids=[c[0] for c in SPEC_CASES])
def test_spec_problems_stop_before_fitting(
        tmp_path: Path, capsys: pytest.CaptureFixture[str],
        edit: Callable[[dict[str, Any]], None], messages: list[str]) -> None:
    raw = base_raw()
    edit(raw)
    with pytest.raises(SpecError) as err:
        parse_spec(raw, base=tmp_path)
    problems = err.value.problems
    assert len(problems) == len(messages), problems
    for m in messages:
        assert any(m in p for p in problems), (m, problems)
    _stops_before_fitting(_write(tmp_path, raw, registry()), messages, tmp_path, capsys)


def test_the_unedited_spec_and_extract_are_usable(tmp_path: Path,
                                                  capsys: pytest.CaptureFixture[str]) -> None:
    spec_path = _write(tmp_path, base_raw(), registry())
    assert main(["check", str(spec_path)]) == 0
    assert "is usable: 1 cohort(s), 4 analysis(es)" in _flat(capsys.readouterr().out)


# --------------------------------------------------------------------------- data problems

def _break(column: str, value: float) -> Callable[[pd.DataFrame], pd.DataFrame]:
    """The column holding one value in every row."""
    return lambda df: df.assign(**{column: value})


def _text_with(column: str, positions: dict[int, str]) -> Callable[[pd.DataFrame], pd.DataFrame]:
    """The column as text (as a careless CSV export or a database view leaves it), with a few
    entries that are not numbers."""
    def edit(df: pd.DataFrame) -> pd.DataFrame:
        df = df.copy()
        text = df[column].map(lambda v: f"{v:g}").astype(object)
        for i, v in positions.items():
            text.iloc[i] = v
        df[column] = text
        return df
    return edit


# (label, spec edit, extract edit, the message, the analyses it concerns)
DATA_CASES: list[tuple[str, Callable[[dict[str, Any]], None] | None,
                       Callable[[pd.DataFrame], pd.DataFrame] | None, str, list[str]]] = [
    ("unknown variable", _set(("analyses", 2, "adjust"), ["agee", "sex"]), None,
     "analyses[count_marker].adjust[0]: column 'agee' is not in the extract. Did you mean 'age'?",
     ["count_marker"]),
    ("non-numeric values in the exposure", None, _text_with("marker", {3: ">85", 9: "pending"}),
     "column 'marker' (exposure) must be numeric but holds non-numeric values such as '>85', "
     "'pending' in 2 rows", list(f"{f}_marker" for f in OUTCOMES)),
    ("outcome column of the wrong type: event as yes/no",
     None, lambda df: df.assign(readmit=np.where(df["readmit"] > 0, "yes", "no")),
     "column 'readmit' (outcome.event) must be numeric but holds non-numeric values such as "
     "'yes', 'no' in 300 rows", ["binary_marker"]),
    ("exposure missing in every row", None, _break("marker", np.nan),
     "column 'marker' (exposure) is missing in every row; check the extract.",
     list(f"{f}_marker" for f in OUTCOMES)),
    ("constant exposure", None, _break("marker", 55.0),
     "column 'marker' (exposure) is constant (55); there is nothing to refit.",
     list(f"{f}_marker" for f in OUTCOMES)),
    ("events coded 1/2", None,
     lambda df: df.assign(died=df["died"] + 1),
     "column 'died' (outcome.event) must be coded 0/1; found values 1, 2; recode it "
     "(1 = event).", ["survival_marker"]),
    ("counts that are not whole numbers", None,
     lambda df: df.assign(visits=df["visits"] + 0.5),
     "column 'visits' (outcome.count) must hold non-negative whole counts.", ["count_marker"]),
]


@pytest.mark.parametrize(("spec_edit", "frame_edit", "message", "analyses"),
                         [c[1:] for c in DATA_CASES], ids=[c[0] for c in DATA_CASES])
def test_data_problems_stop_before_fitting(
        tmp_path: Path, capsys: pytest.CaptureFixture[str],
        spec_edit: Callable[[dict[str, Any]], None] | None,
        frame_edit: Callable[[pd.DataFrame], pd.DataFrame] | None,
        message: str, analyses: list[str]) -> None:
    """The spec is valid but does not match the extract: `unbin check`/`run` list the problem per
    analysis (naming the cohort) and stop; a job run on the same data records it as failed."""
    raw = base_raw()
    if spec_edit:
        spec_edit(raw)
    frame = frame_edit(registry()) if frame_edit else registry()
    spec_path = _write(tmp_path, raw, frame)
    spec = load_spec(spec_path)
    problems = data_problems(spec)
    expected = [p for p in problems if message in p]
    assert len(expected) == len(analyses) == len(problems), problems
    for p, a in zip(expected, analyses, strict=True):
        assert p.startswith(f"analyses[{a}]") and p.endswith("(cohort north)")
    _stops_before_fitting(spec_path, expected, tmp_path, capsys)
    if spec_edit is None:  # the job itself refuses the same data, should it ever get there
        _, status = analyse(spec, "north", analyses[0], frame)
        assert status["status"] == "failed" and message in status["message"]


# --------------------------------------------------------------------------- fit-time problems


def _analyse(tmp_path: Path, frame: pd.DataFrame, family: str,
             edit: Callable[[dict[str, Any]], None] | None = None,
             ) -> tuple[Spec, dict[str, pd.DataFrame], dict[str, Any]]:
    raw = base_raw()
    if edit:
        edit(raw)
    spec = load_spec(_write(tmp_path, raw, frame))
    assert data_problems(spec) == []  # valid at spec time: found when fitting
    tables, status = analyse(spec, "north", f"{family}_marker", frame)
    return spec, tables, status


def _fits(tables: dict[str, pd.DataFrame], form: str, adjustment: str) -> pd.DataFrame:
    f = tables["fits"]
    return f[(f["form"] == form) & (f["adjustment"] == adjustment) & f["selected"]]


def test_cuts_outside_the_data_leave_an_empty_group(tmp_path: Path) -> None:
    """A cut above every value: the legacy contrast cannot be estimated and says why; the
    continuous forms are still fitted (and match a reference fit)."""
    frame = registry()
    _, tables, status = _analyse(tmp_path, frame, "binary",
                                 _set(("groupings", "marker", "cuts"), [40, 60, 120]))
    msg = ("legacy group(s) ['>=120'] of 'marker' are empty in the analysis sample (cuts "
           "[40.0, 60.0, 120.0]); the legacy contrast cannot be estimated. Check the cuts against "
           "the data's range.")
    assert status["status"] == "partial"
    # one line for the cause, naming every fit it stopped (not the same sentence three times)
    assert status["message"].count(msg) == 1
    assert f"legacy/legacy, legacy/continuous, legacy/none: {msg}" in status["message"]
    for adj in ("legacy", "continuous", "none"):
        legacy = _fits(tables, "legacy", adj)
        assert list(legacy["status"]) == ["failed"] and list(legacy["message"]) == [msg]
        assert list(_fits(tables, "linear", adj)["status"]) == ["ok"]
    # Reference: statsmodels' logistic GLM of the crude linear model gives the same fit.
    ref = sm.GLM(frame["readmit"], sm.add_constant(frame["marker"]),
                 family=sm.families.Binomial()).fit()
    assert _fits(tables, "linear", "none")["loglik"].iloc[0] == pytest.approx(ref.llf, rel=1e-9)


def test_negative_or_zero_follow_up_is_dropped_and_counted(tmp_path: Path) -> None:
    frame = registry()
    frame.loc[:19, "years"] = 0.0
    frame.loc[20:29, "years"] = -1.5
    _, tables, status = _analyse(tmp_path, frame, "survival")
    assert status["status"] == "ok" and status["n_used"] == N - 30
    samples = dict(zip(tables["samples"]["step"], tables["samples"]["rows"], strict=True))
    assert samples["dropped: non-positive follow-up (years <= 0)"] == 30
    assert samples["analysis sample"] == N - 30


def test_no_usable_follow_up_fails_the_analysis_naming_the_step(tmp_path: Path) -> None:
    frame = registry().assign(years=-1.0)
    _, tables, status = _analyse(tmp_path, frame, "survival")
    assert status["status"] == "failed" and status["n_used"] == 0
    assert status["message"].startswith(
        "only 0 rows are left after filters, complete cases and follow-up checks (most were "
        f"dropped by 'non-positive follow-up (years <= 0)': {N} rows)")
    # no fit tables from a failed analysis; the missingness table says what the sample lost
    assert set(tables) == {"missingness", "samples", "status"}


def test_events_coded_only_zero_fail_the_analysis(tmp_path: Path) -> None:
    for family, column in (("binary", "readmit"), ("survival", "died")):
        frame = registry().assign(**{column: 0.0})
        _, _, status = _analyse(tmp_path, frame, family)
        assert status["status"] == "failed"
        assert status["message"] == (
            f"no events in the analysis sample: {column!r} is 0 in all {N} rows; there is no "
            "contrast to estimate. Check the outcome coding and the filters.")


def test_no_events_in_one_group(tmp_path: Path) -> None:
    """No events below the first cut: the grouped fits diverge (quasi-complete separation for
    the logistic model, monotone likelihood for Cox; Albert & Anderson 1984, Heinze & Schemper
    2001, from memory) and are recorded as failed; the continuous forms are fitted."""
    frame = registry()
    low = frame["marker"] < 40
    assert low.sum() > 40  # the group exists and is not small
    frame.loc[low, ["readmit", "died"]] = 0.0
    _, tables, status = _analyse(tmp_path, frame, "binary")
    assert status["status"] == "partial"
    legacy = _fits(tables, "legacy", "none")
    assert legacy["status"].iloc[0] == "failed"
    assert legacy["message"].iloc[0].startswith("perfect or quasi-complete separation")
    assert (_fits(tables, "spline", "none")["status"] == "ok").all()

    _, tables, status = _analyse(tmp_path, frame, "survival")
    assert status["status"] == "partial"
    legacy = _fits(tables, "legacy", "none")
    assert legacy["status"].iloc[0] == "failed"
    assert "monotone likelihood" in legacy["message"].iloc[0]
    assert (_fits(tables, "linear", "none")["status"] == "ok").all()


def test_perfect_separation(tmp_path: Path) -> None:
    """Readmission exactly when the marker exceeds 55: the maximum-likelihood estimates do not
    exist for any form of the exposure (complete separation, Albert & Anderson 1984, from
    memory); every exposure fit says so, while the adjustment-only fits are fine."""
    frame = registry()
    frame["readmit"] = (frame["marker"] > 55).astype(float)
    _, tables, status = _analyse(tmp_path, frame, "binary")
    assert status["status"] == "partial"
    fits = tables["fits"]
    exposure = fits[fits["form"].isin(["linear", "spline", "test_spline",
                                            "legacy+test_spline"]) & fits["selected"]]
    assert len(exposure) and (exposure["status"] == "failed").all()
    assert exposure["message"].str.startswith("perfect or quasi-complete separation").all()
    assert (fits.loc[fits["form"] == "null", "status"] == "ok").all()
    # statsmodels agrees that the data are separated: its logit fit warns of perfect prediction.
    from statsmodels.tools.sm_exceptions import PerfectSeparationWarning

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        sm.GLM(frame["readmit"], sm.add_constant(frame["marker"]),
               family=sm.families.Binomial()).fit()
    assert any(issubclass(w.category, PerfectSeparationWarning) for w in caught)


def test_collinear_adjusters(tmp_path: Path) -> None:
    """Two adjusters that are exact linear functions of each other: every adjusted fit names them
    and fails; the crude fits (adjustment: none) still run."""
    _, tables, status = _analyse(tmp_path, registry(), "count",
                                 _set(("analyses", 2, "adjust"), ["w", "w_scaled"]))
    assert status["status"] == "partial"
    fits = tables["fits"]
    adjusted = fits[fits["adjustment"] == "legacy"]
    assert (adjusted["status"] == "failed").all()
    assert adjusted["message"].str.contains(
        r"\['w', 'w_scaled'\] are linearly dependent; remove an adjustment variable that "
        "duplicates another.", regex=True).all()
    assert (fits.loc[fits["adjustment"] == "none", "status"] == "ok").all()


def test_fewer_than_ten_events_per_coefficient_warn(tmp_path: Path) -> None:
    """About 10 events per estimated coefficient is the usual minimum (Peduzzi et al. 1996,
    J Clin Epidemiol 49:1373; common practice): below it the fits run and carry a warning."""
    frame = registry()
    keep_events = frame.index[frame["readmit"] == 1][:25]
    frame["readmit"] = 0.0
    frame.loc[keep_events, "readmit"] = 1.0
    _, tables, status = _analyse(tmp_path, frame, "binary")
    assert status["status"] == "ok"
    linear = _fits(tables, "linear", "legacy").iloc[0]
    # marker (1) + age in its legacy groups (2) + sex (1) = 4 coefficients besides the intercept
    assert linear["status"] == "ok"
    assert linear["warnings"] == ("25 events for 4 coefficients (6.2 per coefficient, below the "
                                  "usual minimum of 10): estimates may be unstable and "
                                  "optimistic.")
    crude = _fits(tables, "linear", "none").iloc[0]  # 25 events for 1 coefficient: no warning
    assert crude["warnings"] == ""


# --------------------------------------------------------------------------- registry scale


def test_a_million_rows_converge_by_relative_deviance() -> None:
    """At registry scale the deviance (~1e6) changes by a few units in the last place between
    iterations; judged by an absolute 1e-10 alone, this intercept-only logistic fit ran to the
    iteration limit and was reported as not converged (seen in the registry benchmark)."""
    from unbin.models import Outcome, fit

    rng = np.random.default_rng(0)  # a draw whose deviance wobbles by 2 ulp at the maximum
    y = (rng.random(1_000_000) < 0.2).astype(float)
    res = fit("binary", np.zeros((y.size, 0)), Outcome("binary", y), ())
    assert res.ok and res.converged and res.iterations < 20
    # Closed form (the Bernoulli maximum likelihood): sum of log pmf at p = the event share;
    # scipy.stats.bernoulli as the reference.
    from scipy import stats

    assert res.loglik == pytest.approx(stats.bernoulli.logpmf(y, y.mean()).sum(), rel=1e-12)


# --------------------------------------------------------------------------- one workflow run


@pytest.mark.workflow
def test_one_failing_analysis_does_not_stop_the_others(tmp_path: Path) -> None:
    """A real workflow run: of four analyses, one cannot run (no positive person-time) and one
    has separated groups; both are recorded in tables/status.parquet and the others complete."""
    frame = registry()
    frame["pyears_zero"] = 0.0
    frame["separated"] = (frame["marker"] < 40).astype(float)
    raw = base_raw()
    raw["analyses"][2]["outcome"]["persontime"] = "pyears_zero"
    raw["analyses"][0]["outcome"]["event"] = "separated"
    spec_path = _write(tmp_path, raw, frame)
    out = tmp_path / "out"
    proc = subprocess.run([sys.executable, "-m", "unbin.cli", "run", str(spec_path), "--out",
                           str(out), "--cores", "2"], capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    status = read_table(out / "tables" / "status.parquet").set_index("analysis")
    assert dict(status["status"]) == {"binary_marker": "partial", "survival_marker": "ok",
                                      "count_marker": "failed", "continuous_marker": "ok"}
    assert status.loc["count_marker", "message"].startswith(
        "only 0 rows are left after filters, complete cases and follow-up checks (most were "
        f"dropped by 'non-positive person-time (pyears_zero <= 0)': {N} rows)")
    assert "separation" in status.loc["binary_marker", "message"]
    fits = read_table(out / "tables" / "fits.parquet")
    assert set(fits["analysis"]) == {"binary_marker", "survival_marker", "continuous_marker"}
    ok = fits[fits["analysis"].isin(["survival_marker", "continuous_marker"])]
    assert (ok["status"] == "ok").all()
    # The summary printed at the end lists the failed analysis with its status.
    assert "count_marker" in proc.stdout and "failed" in proc.stdout
    assert (out / "report.html").is_file()


# --------------------------------------------------------------------------- legacy groups preflight


@pytest.mark.parametrize(("cuts", "message"), [
    ([40, 60, 120], "analyses[binary_marker].exposure (marker): group '>=120' is empty in the "
                    "analysis sample because cut(s) 120 lie outside the observed range"),
    ([10, 60], "analyses[binary_marker].exposure (marker): the reference group '<10' is empty in "
               "the analysis sample because cut(s) 10 lie outside the observed range"),
])
def test_check_flags_cuts_outside_the_data_per_cohort(
        tmp_path: Path, capsys: pytest.CaptureFixture[str], cuts: list[float],
        message: str) -> None:
    """`unbin check` builds the analysis sample and its legacy groups before any fit and says
    which group is empty and why, naming the analysis, the field and the cohort; the spec stays
    usable (the analyses run and record the failing legacy contrasts)."""
    raw = base_raw()
    raw["analyses"] = raw["analyses"][:1]
    raw["groupings"]["marker"]["cuts"] = cuts
    spec_path = _write(tmp_path, raw, registry())
    assert main(["check", str(spec_path)]) == 0
    out = _flat(capsys.readouterr().out)
    assert _flat(message) in out and "(cohort north)" in out
    if cuts[0] == 10:
        assert "choose another `reference` in groupings" in out


def test_check_warns_about_groups_below_min_cell(tmp_path: Path,
                                                 capsys: pytest.CaptureFixture[str]) -> None:
    frame = registry()
    raw = base_raw()
    raw["analyses"] = raw["analyses"][:1]
    low = float(np.sort(frame["marker"])[3])  # 3 rows below (values are distinct enough)
    n_low = int((frame["marker"] < low).sum())
    raw["groupings"]["marker"]["cuts"] = [low, 60]
    spec_path = _write(tmp_path, raw, frame)
    assert main(["check", str(spec_path)]) == 0
    out = _flat(capsys.readouterr().out)
    assert f"({n_low} rows) of 'marker' hold fewer than disclosure.min_cell = 10 rows" in out


def test_a_figure_that_cannot_be_drawn_says_why_and_the_rest_is_drawn(tmp_path: Path) -> None:
    """One figure kind that raises: the other figures are drawn, the index records the reason,
    and the report carries it in the figure's place."""
    from unbin.present.figures import KINDS, Context, Kind, draw_figures, read_index
    from unbin.present.report import Builder

    def broken(ctx: Any, cohort: Any, analysis: Any) -> Any:
        raise KeyError("scale")

    spec = parse_spec({**base_raw(), "analyses": base_raw()["analyses"][:1]}, base=tmp_path)
    frame = registry()
    tables, _ = analyse(spec, "north", "binary_marker", frame)
    keyed = {name: df.assign(cohort="north", analysis="binary_marker") for name, df in
             tables.items()}
    ctx = Context(keyed, spec)
    kinds = (Kind("broken", "curves", "analysis", broken),
             *(k for k in KINDS if k.name == "curves"))
    done = draw_figures(ctx, tmp_path / "figures", kinds=kinds)
    by_kind = {f.kind: f for f in done}
    assert by_kind["curves"].svg is not None and by_kind["curves"].svg.is_file()
    assert by_kind["broken"].svg is None
    assert "the 'broken' figure could not be drawn from the 'curves' table (KeyError: 'scale')" \
        in by_kind["broken"].problem
    index = read_index(tmp_path / "figures" / "north", tmp_path / "figures")
    assert [f.problem for f in index if f.kind == "broken"] == [by_kind["broken"].problem]
    html = Builder(ctx, done, tmp_path).figs("north", "binary_marker", "broken")
    assert "Figure not drawn." in html and "KeyError" in html


@pytest.mark.workflow
def test_a_run_with_a_cut_outside_the_data_finishes_with_a_report(tmp_path: Path) -> None:
    """The case that used to end in a traceback from the figures: a grouping whose cut lies
    beyond every value. The run finishes, and the report says why the legacy contrasts and the
    range-dependence question could not be estimated."""
    raw = base_raw()
    raw["analyses"] = raw["analyses"][1:2]  # survival
    raw["groupings"]["marker"] = {"cuts": [200]}
    spec_path = _write(tmp_path, raw, registry())
    out = tmp_path / "out"
    proc = subprocess.run([sys.executable, "-m", "unbin.cli", "run", str(spec_path), "--out",
                           str(out), "--cores", "2"], capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "lie outside the observed range" in _flat(proc.stdout)
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "Not estimated: the legacy comparison group " in html and "is empty in the" in html
    assert "could not be written" not in html
    proc = subprocess.run([sys.executable, "-m", "unbin.cli", "report", str(out), "--spec",
                           str(spec_path), "--quiet"],
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stdout + proc.stderr
