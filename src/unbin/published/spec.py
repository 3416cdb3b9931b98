"""The spec's ``published:`` section: studies known only from their published grouped table.

```yaml
published:
  open_rule: adjacent_width        # or scaled_bound (see unbin.published.exposure)
  studies:
    - name: harbour_study
      analysis: death_dose         # the analysis whose pooled curve the study joins
      unit: mg/day                 # the table's exposure unit (recorded)
      to_analysis_unit: 1.0        # multiply bounds, medians, means by this (default 1)
      scale: OR                    # OR, RR or HR
      design: case_control         # case_control | cohort_person_time | cohort_participants
      total_cases: 270             # optional: checked against the groups, used by Hamling
      groups:                      # in increasing exposure order
        - {upper: 10, median: 6, cases: 50, controls: 400, ratio: 1}      # the reference
        - {lower: 10, upper: 20, cases: 60, controls: 380, ratio: 1.3, ratio_lower: 0.9,
           ratio_upper: 1.9}
```

A group's counts: ``cases`` and ``controls`` (case-control), ``cases`` and ``person_time``
(cohort with person-time), ``cases`` and ``participants`` (cohort with participants); the
reference group (``reference: true``, else the first) has ratio 1 and no interval.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from .exposure import OPEN_RULES

SCALES = {"OR": "odds ratio", "RR": "risk ratio", "HR": "hazard ratio"}
DESIGNS = ("case_control", "cohort_person_time", "cohort_participants")
OTHER_COUNT = {"case_control": "controls", "cohort_person_time": "person_time",
               "cohort_participants": "participants"}
# The tables the pooling job writes for these studies (named here, in a module without the
# statistics, so that the workflow's set-up can name its outputs without importing them).
PUBLISHED_TABLES = ("published_groups", "published_fits", "published_curves")
GROUP_KEYS = ("lower", "upper", "median", "mean", "cases", "controls", "person_time",
              "participants", "ratio", "ratio_lower", "ratio_upper", "reference")


@dataclass(frozen=True)
class PublishedGroup:
    lower: float | None
    upper: float | None
    median: float | None
    mean: float | None
    cases: float | None
    other: float | None  # controls, person-time or participants (by design)
    ratio: float
    ratio_lower: float | None
    ratio_upper: float | None


@dataclass(frozen=True)
class PublishedStudy:
    name: str
    analysis: str
    unit: str
    scale: str  # OR | RR | HR
    design: str
    groups: tuple[PublishedGroup, ...]
    reference: int  # index into groups
    total_cases: float | None
    open_rule: str

    @property
    def scale_label(self) -> str:
        """The effect scale as the pooled tables name it (a risk ratio over person-time is a
        rate ratio)."""
        if self.scale == "RR" and self.design == "cohort_person_time":
            return "rate ratio"
        return SCALES[self.scale]

    @property
    def kind(self) -> str:
        """The covariance formulation (see unbin.published.covariance)."""
        if self.scale == "OR":
            return "odds"
        return "rate" if self.design == "cohort_person_time" else "risk"


def _num(v: Any) -> float | None:
    return None if v is None else float(v)


def published_studies(raw: dict[str, Any]) -> tuple[PublishedStudy, ...]:
    """The studies of a (checked) raw spec's ``published`` section; () when there is none."""
    sec = raw.get("published") or {}
    rule = sec.get("open_rule", "adjacent_width")
    out = []
    for s in sec.get("studies", []):
        f = float(s.get("to_analysis_unit", 1.0))
        groups = s["groups"]
        ref = next((i for i, g in enumerate(groups) if g.get("reference")), 0)
        other = OTHER_COUNT[s["design"]]

        def conv(v: Any, f: float = f) -> float | None:
            return None if v is None else float(v) * f

        out.append(PublishedStudy(
            name=s["name"], analysis=s["analysis"], unit=str(s.get("unit", "")),
            scale=s["scale"], design=s["design"],
            groups=tuple(PublishedGroup(conv(g.get("lower")), conv(g.get("upper")),
                                        conv(g.get("median")), conv(g.get("mean")),
                                        _num(g.get("cases")), _num(g.get(other)),
                                        float(g["ratio"]), _num(g.get("ratio_lower")),
                                        _num(g.get("ratio_upper")))
                         for g in groups),
            reference=ref, total_cases=_num(s.get("total_cases")), open_rule=rule))
    return tuple(out)


def published_problems(raw: dict[str, Any]) -> list[str]:
    """What the schema cannot check in ``published``: each message names the field, the
    problem and the fix."""
    sec = raw.get("published")
    if not isinstance(sec, dict):
        return []
    problems: list[str] = []
    if sec.get("open_rule", "adjacent_width") not in OPEN_RULES:
        problems.append(f"published.open_rule: {sec['open_rule']!r} is not one of "
                        f"{list(OPEN_RULES)}.")
    analyses = {a.get("name") for a in raw.get("analyses", []) if isinstance(a, dict)}
    names: list[str] = []
    for i, s in enumerate(sec.get("studies", []) or []):
        if not isinstance(s, dict):
            continue
        where = f"published.studies[{s.get('name', i)}]"
        names.append(str(s.get("name")))
        if s.get("analysis") not in analyses:
            problems.append(f"{where}.analysis: {s.get('analysis')!r} is not an analysis of this "
                            f"spec; use one of {sorted(str(a) for a in analyses)}.")
        if s.get("design") not in DESIGNS:
            continue  # the schema reports it
        if s.get("scale") == "OR" and s["design"] == "cohort_person_time":
            problems.append(f"{where}: odds ratios with person-time do not go together; a "
                            "person-time cohort reports rate or hazard ratios (RR or HR), or "
                            "give participants (cohort_participants).")
        problems += _group_problems(where, s)
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        problems.append(f"published.studies: the names {dup} are used more than once; give "
                        "every study its own name.")
    return problems


def _group_problems(where: str, s: dict[str, Any]) -> list[str]:
    groups = [g for g in s.get("groups", []) if isinstance(g, dict)]
    problems: list[str] = []
    if len(groups) < 2:
        return [f"{where}.groups: a table needs the reference group and at least one other."]
    refs = [i for i, g in enumerate(groups) if g.get("reference")]
    if len(refs) > 1:
        problems.append(f"{where}.groups: groups {[r + 1 for r in refs]} are all marked "
                        "reference; mark exactly one.")
    ref = refs[0] if refs else 0
    other = OTHER_COUNT[s["design"]]
    for j, g in enumerate(groups):
        gw = f"{where}.groups[{j + 1}]"
        lo, hi = g.get("lower"), g.get("upper")
        if lo is not None and hi is not None and not lo < hi:
            problems.append(f"{gw}: lower bound {lo} is not below upper bound {hi}; "
                            "fix the bounds.")
        for key in ("median", "mean"):
            v = g.get(key)
            if v is not None and ((lo is not None and v < lo) or (hi is not None and v > hi)):
                problems.append(f"{gw}.{key}: {v} lies outside the group's bounds "
                                f"[{lo}, {hi}]; fix the {key} or the bounds.")
        r, rl, ru = g.get("ratio"), g.get("ratio_lower"), g.get("ratio_upper")
        if j == ref:
            if r != 1:
                problems.append(f"{gw}.ratio: the reference group's ratio is {r}, not 1; mark "
                                "the group whose ratio is 1 with 'reference: true', or re-express "
                                "the ratios against it.")
            continue
        if r is None or not isinstance(r, (int, float)) or not r > 0:
            problems.append(f"{gw}.ratio: {r!r} is not a positive ratio; give the adjusted ratio.")
            continue
        if rl is None or ru is None:
            problems.append(f"{gw}: the ratio needs its 95% interval (ratio_lower, ratio_upper).")
        elif not (0 < rl < ru):
            problems.append(f"{gw}: the interval [{rl}, {ru}] is not 0 < lower < upper; fix it.")
        elif not (rl <= r <= ru):
            problems.append(f"{gw}: the interval [{rl}, {ru}] does not contain the ratio {r}; "
                            "check the table (a transposed digit, or a ratio against another "
                            "reference).")
        elif abs(math.log(r) - (math.log(rl) + math.log(ru)) / 2) > \
                0.1 * (math.log(ru) - math.log(rl)) + 0.01:
            problems.append(f"{gw}: the ratio {r} is far from the log-scale middle of its "
                            f"interval [{rl}, {ru}]; unbin reads intervals as symmetric on the "
                            "log scale. Check the table.")
    counts = [(g.get("cases"), g.get(other)) for g in groups]
    have_cases = [c is not None for c, _ in counts]
    have_other = [o is not None for _, o in counts]
    if any(have_cases) and not all(have_cases):
        problems.append(f"{where}.groups: 'cases' is given for some groups only; give it for "
                        "every group or for none.")
    if any(have_other) and not all(have_other):
        problems.append(f"{where}.groups: {other!r} is given for some groups only; give it for "
                        "every group or for none.")
    for j, (c, o) in enumerate(counts):
        if c is not None and c <= 0:
            problems.append(f"{where}.groups[{j + 1}].cases: {c} cases; the covariance needs "
                            "positive counts in every group.")
        if o is not None and o <= 0:
            problems.append(f"{where}.groups[{j + 1}].{other}: {o}; must be positive.")
        if (s["design"] == "cohort_participants" and c is not None and o is not None
                and c >= o):
            problems.append(f"{where}.groups[{j + 1}]: {c} cases of {o} participants; "
                            "participants include the cases, so there must be more of them.")
    total = s.get("total_cases")
    if total is not None and all(have_cases):
        got = sum(float(c) for c, _ in counts if c is not None)
        if abs(got - float(total)) > 0.5:
            problems.append(f"{where}.total_cases: {total} but the groups' cases add up to "
                            f"{got:g}; fix the counts or the total.")
    bounds = [(g.get("lower"), g.get("upper")) for g in groups]
    for j in range(1, len(bounds)):
        prev_hi, lo = bounds[j - 1][1], bounds[j][0]
        if prev_hi is not None and lo is not None and lo < prev_hi:
            problems.append(f"{where}.groups[{j + 1}]: its lower bound {lo} is below the previous "
                            f"group's upper bound {prev_hi}; list the groups in increasing order, "
                            "without overlap.")
    return problems
