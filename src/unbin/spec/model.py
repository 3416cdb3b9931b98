"""The spec's data model: frozen dataclasses, the defaults, group labels and digests."""

from __future__ import annotations

import hashlib
import json
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

from ..errors import SpecError

FORMS = ("linear", "spline", "fp")
DEFAULT_KNOTS = (3, 4, 5)
DEFAULT_SEED = 20240101
OUTCOME_FIELDS = {
    "binary": ("event",),
    "continuous": ("value",),
    "count": ("count", "persontime"),
    "survival": ("time", "event"),
}
OPTIONAL_OUTCOME_FIELDS = {
    "binary": (),
    "continuous": (),
    "count": (),
    "survival": ("entry", "horizon", "time_scale", "age", "follow_up_windows",
                 "event_of_interest", "competing", "subdistribution_variance"),
}
TIME_SCALES = ("on_study", "attained_age")
DAYS_PER_UNIT = {"days": 1.0, "weeks": 7.0, "months": 365.25 / 12, "years": 365.25}
# The analysis sample's names of follow-up columns built from the extract's columns.
TIME_ON_STUDY = "time_on_study"
ATTAINED_AGE = "attained_age"
TIME_AT_ENTRY = "time_at_entry"
AGE_AT_ENTRY = "age_at_entry"
DERIVED_TIME_COLUMNS = (TIME_ON_STUDY, TIME_AT_ENTRY, ATTAINED_AGE, AGE_AT_ENTRY)


@dataclass(frozen=True)
class Grouping:
    """How the legacy paper grouped one variable.

    Cut semantics: with ``closed="left"`` (default) the groups are ``x < c1``, ``c1 <= x < c2``,
    ..., ``x >= ck`` — a value equal to a cut belongs to the group above it. With
    ``closed="right"`` they are ``x <= c1``, ``c1 < x <= c2``, ..., ``x > ck`` — a value equal to a
    cut belongs to the group below it. ``quantiles=k`` asks for k equal-frequency groups whose cuts
    are the sample's j/k quantiles (linear interpolation, numpy's default) in the analysis sample.
    """

    variable: str
    cuts: tuple[float, ...] | None = None
    quantiles: int | None = None
    closed: str = "left"
    labels: tuple[str, ...] | None = None
    reference: str | None = None
    derived_from_data: bool = False

    @property
    def n_groups(self) -> int:
        if self.cuts is not None:
            return len(self.cuts) + 1
        assert self.quantiles is not None
        return self.quantiles


@dataclass(frozen=True)
class FollowUp:
    """How a survival outcome's times are built from the extract, when they are not a ready
    duration column on the time-on-study scale: from date columns (``start``, ``end`` and an
    optional delayed ``entry_date``; durations in ``unit``, the end optionally cut at the
    study's administrative end ``study_end``, an ISO date) or a ready ``duration`` column; on the attained-age scale (``scale``) the times are
    ages: entry at ``age`` (age in years at the start of follow-up, plus a delayed ``entry``
    when given) and exit at that age plus the duration."""

    scale: str = "on_study"
    start: str | None = None
    end: str | None = None
    entry_date: str | None = None  # date column: delayed entry (recruitment) after the start
    unit: str = "years"
    study_end: str | None = None
    duration: str | None = None
    entry: str | None = None
    age: str | None = None

    @property
    def columns(self) -> tuple[str, ...]:
        cols = [self.start, self.entry_date, self.end, self.duration, self.entry, self.age]
        return tuple(c for c in cols if c)


@dataclass(frozen=True)
class OutcomeSpec:
    """An outcome; ``time`` and ``entry`` name the analysis sample's columns (built from the
    extract's columns by ``followup`` when it is given)."""

    type: str
    event: str | None = None
    value: str | None = None
    count: str | None = None
    persontime: str | None = None
    time: str | None = None
    entry: str | None = None
    horizon: float | None = None
    # count outcomes: poisson, quasi-poisson (Pearson scale) or negative-binomial (NB2)
    count_model: str = "poisson"
    follow_up_windows: tuple[float, ...] = ()  # cuts of follow-up time (survival): windows
    # survival with competing risks: the event column's code of the event of interest and
    # the codes of the competing events (none: the event column is 0/1)
    event_of_interest: int = 1
    competing: tuple[int, ...] = ()
    # the Fine–Gray estimates' variance: "sandwich" or "bootstrap" (resampling.bootstrap draws)
    subdistribution_variance: str = "sandwich"
    followup: FollowUp | None = None

    @property
    def time_scale(self) -> str:
        return self.followup.scale if self.followup else "on_study"

    @property
    def has_competing(self) -> bool:
        """A survival outcome whose event column also codes competing events."""
        return self.type == "survival" and bool(self.competing)

    @property
    def columns(self) -> tuple[str, ...]:
        """The extract's columns this outcome reads."""
        if self.followup is not None:
            return tuple(c for c in (self.event, *self.followup.columns) if c)
        cols = [self.event, self.value, self.count, self.persontime, self.time, self.entry]
        return tuple(c for c in cols if c)


@dataclass(frozen=True)
class Weighting:
    """A weight column and what its weights mean: ``frequency`` (a row stands for that many
    identical rows; model-based variances) or ``sampling`` (survey, inverse-probability or
    case-control sampling weights; robust sandwich variances)."""

    column: str
    kind: str


@dataclass(frozen=True)
class Filter:
    variable: str
    min: float | None = None
    max: float | None = None
    values: tuple[Any, ...] | None = None

    def describe(self) -> str:
        parts = []
        if self.min is not None:
            parts.append(f"{self.variable} >= {self.min:g}")
        if self.max is not None:
            parts.append(f"{self.variable} <= {self.max:g}")
        if self.values is not None:
            parts.append(f"{self.variable} in {list(self.values)}")
        return " and ".join(parts) or f"{self.variable} (no condition)"


@dataclass(frozen=True)
class Reported:
    contrast: str
    estimate: float
    lower: float | None = None
    upper: float | None = None

    def groups(self) -> tuple[str, str]:
        a, b = re.split(r"\s+vs\.?\s+", self.contrast.strip(), maxsplit=1)
        return a.strip(), b.strip()


@dataclass(frozen=True)
class ContinuousOptions:
    forms: tuple[str, ...] = FORMS
    spline_knots: tuple[int, ...] = DEFAULT_KNOTS
    knot_values: tuple[float, ...] | None = None
    adjust_knots: int = 4
    # Knots of the spline behind the tests (nonlinearity, added beyond the groups, information
    # kept): a fixed count at the default quantiles of the exposure, chosen before the outcome
    # is seen, unlike the drawn spline whose knot count AIC picks.
    test_knots: int = 4
    fp_alpha: float = 0.05
    grid_points: int = 100
    grid_range: tuple[float, float] | None = None
    reference_value: float | None = None
    common_knots: int = 4

    @property
    def basis_fixed(self) -> bool:
        """Knots, reference value and grid all fixed by the spec: no cohort summaries needed."""
        return (self.knot_values is not None and self.reference_value is not None
                and self.grid_range is not None)


@dataclass(frozen=True)
class Design:
    """How the extract was sampled and fitted (the analysis' ``design`` block; binary outcomes,
    and ``firth`` for survival ones):
    ``matched_set`` the column naming each matched set (conditional logistic regression);
    ``case_control`` an extract sampled on the outcome; ``prevalence`` the population's outcome
    frequency (implies ``case_control``; absolute risks are recalibrated to it); ``firth``
    Firth's penalised likelihood for every fit."""

    matched_set: str | None = None
    case_control: bool = False
    prevalence: float | None = None
    firth: bool = False

    @property
    def sampled_on_outcome(self) -> bool:
        return self.case_control or self.prevalence is not None or self.matched_set is not None


@dataclass(frozen=True)
class Analysis:
    name: str
    outcome: OutcomeSpec
    exposure: str
    adjust: tuple[str, ...] = ()
    strata: tuple[str, ...] = ()
    by: str | None = None
    filters: tuple[Filter, ...] = ()
    reported: Reported | None = None
    continuous: ContinuousOptions = field(default_factory=ContinuousOptions)
    # Decision thresholds on this analysis' risk scale (probability; rate per person-time unit
    # for count outcomes; the mean for continuous ones); None: the study's risk_thresholds.
    risk_thresholds: tuple[float, ...] | None = None
    # Row weights and the cluster column (centre, family, person): the analysis' own, else the
    # study's; a cluster gives cluster-robust variances.
    weights: Weighting | None = None
    cluster: str | None = None
    design: Design = field(default_factory=Design)

    @property
    def robust(self) -> bool:
        """Robust (sandwich) variances: sampling weights or a cluster."""
        return self.cluster is not None or (self.weights is not None
                                            and self.weights.kind == "sampling")

    @property
    def family(self) -> str:
        return self.outcome.type

    @property
    def columns(self) -> tuple[str, ...]:
        """Every column this analysis reads, in a stable order without repeats."""
        cols: list[str] = [*self.outcome.columns, self.exposure, *self.adjust, *self.strata]
        if self.by:
            cols.append(self.by)
        cols += [f.variable for f in self.filters]
        if self.weights is not None:
            cols.append(self.weights.column)
        if self.cluster:
            cols.append(self.cluster)
        if self.design.matched_set:
            cols.append(self.design.matched_set)
        return tuple(dict.fromkeys(cols))


@dataclass(frozen=True)
class CsvDialect:
    """How a CSV extract is written (the cohort's ``csv`` block). ``None`` in a field: detected
    from the file."""

    delimiter: str | None = None
    decimal: str | None = None
    encoding: str | None = None
    date_format: str | None = None  # strptime format of date columns (default: ISO 8601)


@dataclass(frozen=True)
class Cohort:
    name: str
    path: Path
    path_as_written: str
    groupings: dict[str, Grouping] = field(default_factory=dict)
    csv: CsvDialect | None = None


@dataclass(frozen=True)
class VariableInfo:
    label: str | None = None
    unit: str | None = None
    type: str | None = None


@dataclass(frozen=True)
class Resampling:
    """Sizes of the resampling runs: bootstrap replicates (confounding share, re-derived cut
    point) and permutations (maximally selected statistic). 0 switches a run off."""

    bootstrap: int = 200
    permutations: int = 1000


@dataclass(frozen=True)
class CutpointSearch:
    """Range of the search for a data-derived cut: the share of the sample below a candidate
    cut must lie in [lower, upper]."""

    lower: float = 0.1
    upper: float = 0.9


@dataclass(frozen=True)
class Spec:
    study: str
    cohorts: tuple[Cohort, ...]
    analyses: tuple[Analysis, ...]
    groupings: dict[str, Grouping]
    variables: dict[str, VariableInfo]
    continuous: ContinuousOptions
    risk_thresholds: tuple[float, ...]
    min_cell: int
    seed: int
    raw: dict[str, Any] = field(repr=False)
    source: Path | None = None
    resampling: Resampling = field(default_factory=Resampling)
    cutpoint_search: CutpointSearch = field(default_factory=CutpointSearch)
    horizon: float | None = None  # default risk horizon of survival outcomes without their own
    report: bool = True  # figures and report.html at the end of a run

    def for_cohort(self, name: str) -> Spec:
        """The spec as one cohort sees it: its own legacy groupings override the study's."""
        c = self.cohort(name)
        if not c.groupings:
            return self
        from dataclasses import replace

        return replace(self, groupings={**self.groupings, **c.groupings})

    def analysis(self, name: str) -> Analysis:
        return _named(self.analyses, name, "analyses", "analysis")

    def cohort(self, name: str) -> Cohort:
        return _named(self.cohorts, name, "cohorts", "cohort")

    def columns_for_cohort(self) -> tuple[str, ...]:
        cols: list[str] = []
        for a in self.analyses:
            cols += a.columns
        return tuple(dict.fromkeys(cols))

    def label(self, variable: str) -> str:
        info = self.variables.get(variable)
        text = info.label if info and info.label else variable
        if info and info.unit:
            text += f" ({info.unit})"
        return text

    def rng(self, analysis: str, purpose: str) -> Any:
        """A numpy Generator for one resampling run of one analysis: seeded from the spec's seed
        and a digest of (analysis, purpose) through numpy's SeedSequence, so that every run gives
        the same draws and the runs of different analyses and questions are independent."""
        import numpy as np

        key = hashlib.sha256(f"{analysis}\x00{purpose}".encode()).digest()
        words = [int.from_bytes(key[i:i + 4], "little") for i in range(0, 16, 4)]
        return np.random.default_rng(np.random.SeedSequence([self.seed, *words]))

    def slice_for(self, analysis: str, cohort: str | None = None) -> dict[str, Any]:
        """The spec entries one analysis (on one cohort, if given) depends on; its digest decides
        whether the analysis' jobs rerun."""
        a = self.analysis(analysis)
        raw_a = next(x for x in self.raw["analyses"] if x["name"] == analysis)
        groupings = self.raw.get("groupings", {})
        variables = self.raw.get("variables", {})
        used = set(a.columns)
        cohort_csv = {c["name"]: c["csv"] for c in self.raw["cohorts"]
                      if c.get("csv") and cohort in (None, c["name"])}
        cohort_groupings = {c["name"]: {k: v for k, v in sorted((c.get("groupings") or {}).items())
                                        if k in used}
                            for c in self.raw["cohorts"]
                            if c.get("groupings") and cohort in (None, c["name"])}
        return {
            "study": self.study,
            "analysis": raw_a,
            **({"cohort_groupings": cohort_groupings} if any(cohort_groupings.values()) else {}),
            **({"cohort_csv": cohort_csv} if cohort_csv else {}),
            "groupings": {k: groupings[k] for k in sorted(groupings) if k in used},
            "variables": {k: variables[k] for k in sorted(variables) if k in used},
            "continuous": self.raw.get("continuous", {}),
            "risk_thresholds": self.raw.get("risk_thresholds", []),
            "disclosure": self.raw.get("disclosure", {}),
            "seed": self.seed,
            **{k: self.raw[k] for k in ("resampling", "cutpoint_search", "horizon", "weights",
                                        "cluster", "missing") if k in self.raw},
        }


def canonical_json(obj: Any) -> str:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=True, default=str)


def digest(obj: Any) -> str:
    """SHA-256 of the canonical JSON of ``obj`` (sorted keys, no whitespace)."""
    return hashlib.sha256(canonical_json(obj).encode()).hexdigest()


def _labels_for(g: dict[str, Any]) -> list[str] | None:
    if "labels" in g:
        return list(g["labels"])
    if "cuts" in g:
        return default_labels(tuple(float(c) for c in g["cuts"]), g.get("closed", "left"))
    if "quantiles" in g:
        return [f"Q{j + 1}" for j in range(int(g["quantiles"]))]
    return None


def default_labels(cuts: tuple[float, ...], closed: str) -> list[str]:
    """Group labels written from the cuts: '<30', '30-<45', '>=60' (closed left)."""
    f = [f"{c:g}" for c in cuts]
    if closed == "left":
        labels = [f"<{f[0]}"] + [f"{f[i]}-<{f[i + 1]}" for i in range(len(f) - 1)] + [f">={f[-1]}"]
    else:
        labels = [f"<={f[0]}"] + [f">{f[i]}-{f[i + 1]}" for i in range(len(f) - 1)] + [f">{f[-1]}"]
    return labels


_Named = TypeVar("_Named", Analysis, Cohort)


def _named(items: tuple[_Named, ...], name: str, section: str, what: str) -> _Named:
    """The item of a spec section with this name; a SpecError listing the names otherwise."""
    for item in items:
        if item.name == name:
            return item
    raise SpecError(f"{section}: no {what} named {name!r}; the spec has "
                    f"{[item.name for item in items]}.")
