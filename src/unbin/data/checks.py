"""Checking an extract against the spec: columns present, types, categorical columns, and the
legacy groupings' cells before any fit (the grouping preflight)."""

from __future__ import annotations

import difflib

import numpy as np
import pandas as pd

from ..errors import DataError
from ..questions.disclosure import is_small
from ..spec import Analysis, Spec
from ..terms.grouped import GroupedTerm
from ..terms.legacy import legacy_term
from ..terms.roles import is_grouped
from .extracts import extract_columns, joined_header_hint, read_extract
from .sample import (
    analysis_sample,
    coerce_dates,
    coerce_numeric,
    design_weights,
    filtered,
)


def data_problems(spec: Spec, frames: dict[str, pd.DataFrame] | None = None) -> list[str]:
    """Check every variable of every analysis against every cohort's extract (no fitting).

    A problem found in several cohorts is reported once, naming the cohorts."""
    problems: list[str] = []
    found: dict[str, list[str]] = {}  # message -> cohorts where it occurs
    for cohort in spec.cohorts:
        where = f"cohorts[{cohort.name}]"
        if not cohort.path.is_file():
            problems.append(f"{where}.path: {cohort.path_as_written!r} does not exist (looked at "
                            f"{cohort.path}); fix the path (relative to the spec file).")
            continue
        try:
            present = extract_columns(cohort.path, cohort.csv)
        except Exception as exc:  # unreadable file: report, don't crash
            problems.append(f"{where}.path: cannot read {cohort.path.name!r}: {exc}")
            continue
        usable: list[str] = []
        cspec = spec.for_cohort(cohort.name)
        for a in cspec.analyses:
            for col, field in _column_fields(a):
                if col not in present:
                    close = difflib.get_close_matches(col, present, n=1, cutoff=0.6)
                    hint = f" Did you mean {close[0]!r}?" if close else ""
                    msg = (f"analyses[{a.name}].{field}: column {col!r} is not in the extract."
                           f"{hint} Its columns are: {', '.join(present[:30])}"
                           f"{' ...' if len(present) > 30 else ''}"
                           f"{joined_header_hint(present)}")
                    found.setdefault(msg, []).append(cohort.name)
                else:
                    usable.append(col)
        cols = list(dict.fromkeys(usable))
        if not cols:
            continue
        df = frames[cohort.name] if frames else read_extract(cohort.path, cols, cohort.csv)
        date_format = cohort.csv.date_format if cohort.csv else None
        for a in cspec.analyses:
            for p in _type_problems(a, df, cspec) + date_problems(a, df, date_format):
                found.setdefault(f"analyses[{a.name}]: {p}", []).append(cohort.name)
    for msg, cohorts in found.items():
        label = "cohort" if len(cohorts) == 1 else "cohorts"
        problems.append(f"{msg} ({label} {', '.join(cohorts)})")
    return list(dict.fromkeys(problems))


def _column_fields(a: Analysis) -> list[tuple[str, str]]:
    f = a.outcome.followup
    if f is not None:  # the extract's follow-up columns, not the sample's built ones
        out = [(c, field) for c, field in
               ((a.outcome.event, "outcome.event"), (f.start, "outcome.time.start"),
                (f.end, "outcome.time.end"), (f.entry_date, "outcome.time.entry"),
                (f.duration, "outcome.time"),
                (f.entry, "outcome.entry"), (f.age, "outcome.age")) if c]
    else:
        out = [(c, f"outcome.{k}") for k, c in vars(a.outcome).items()
               if k in ("event", "value", "count", "persontime", "time", "entry") and c]
    out.append((a.exposure, "exposure"))
    out += [(c, f"adjust[{i}]") for i, c in enumerate(a.adjust)]
    out += [(c, f"strata[{i}]") for i, c in enumerate(a.strata)]
    if a.by:
        out.append((a.by, "by"))
    out += [(f.variable, f"filters[{i}].variable") for i, f in enumerate(a.filters)]
    if a.weights is not None:
        out.append((a.weights.column, "weights.column"))
    if a.cluster:
        out.append((a.cluster, "cluster"))
    if a.design.matched_set:
        out.append((a.design.matched_set, "design.matched_set"))
    return out


def _type_problems(a: Analysis, df: pd.DataFrame, spec: Spec) -> list[str]:
    problems: list[str] = []
    if (a.weights is not None and a.weights.column in df) or (a.cluster and a.cluster in df):
        try:  # bad weights or clusters stop the analysis: a problem, not a note
            design_weights(filtered(df, a)[0], a)
        except DataError as exc:
            problems.append(str(exc))
    numeric_roles = [(a.exposure, "exposure")]
    o = a.outcome
    f = o.followup
    time, entry = (f.duration, f.entry) if f else (o.time, o.entry)
    numeric_roles += [(c, f"outcome.{k}") for k, c in
                      (("value", o.value), ("count", o.count), ("persontime", o.persontime),
                       ("time", time), ("entry", entry), ("event", o.event),
                       ("age", f.age if f else None)) if c]
    numeric_roles += [(var, "adjust (grouped)") for var in a.adjust if is_grouped(var, spec)]
    if a.by and is_grouped(a.by, spec):
        numeric_roles.append((a.by, "by (grouped)"))
    for col, role in numeric_roles:
        if col not in df:
            continue
        try:
            s = coerce_numeric(df, col, role)
        except DataError as exc:
            problems.append(str(exc))
            continue
        if s.notna().sum() == 0:
            problems.append(f"column {col!r} ({role}) is missing in every row; check the extract.")
            continue
        if role == "outcome.event" and a.outcome.has_competing:
            problems += event_code_problems(col, s, a)
        elif role == "outcome.event":
            vals = set(np.unique(s.dropna()))
            if not vals <= {0.0, 1.0}:
                shown = ", ".join(f"{float(v):g}" for v in sorted(vals)[:6])
                problems.append(f"column {col!r} (outcome.event) must be coded 0/1; found values "
                                f"{shown}{' ...' if len(vals) > 6 else ''}; recode it (1 = event).")
        if role == "outcome.count" and ((s.dropna() < 0).any() or (s.dropna() % 1 != 0).any()):
            problems.append(f"column {col!r} (outcome.count) must hold non-negative whole counts.")
        if role == "exposure" and s.dropna().nunique() < 2:
            problems.append(f"column {col!r} (exposure) is constant ({s.dropna().iloc[0]:g}); "
                            "there is nothing to refit.")
    return problems


def event_code_problems(col: str, s: pd.Series, a: Analysis) -> list[str]:
    """A competing-risks event column holds only 0 (censored), the event of interest and the
    competing codes."""
    o = a.outcome
    allowed = {0.0, float(o.event_of_interest), *(float(c) for c in o.competing)}
    vals = set(np.unique(s.dropna()))
    if vals <= allowed:
        return []
    other = ", ".join(f"{float(v):g}" for v in sorted(vals - allowed)[:6])
    return [f"column {col!r} (outcome.event) holds codes {other} that are neither 0 (censored), "
            f"the event of interest ({o.event_of_interest}) nor competing ({list(o.competing)}); "
            "add them to outcome.competing or recode them."]


def date_problems(a: Analysis, df: pd.DataFrame, date_format: str | None = None) -> list[str]:
    """The follow-up's date columns must hold dates (a CSV's text in ISO 8601 or the cohort's
    csv.date_format)."""
    f = a.outcome.followup
    problems: list[str] = []
    dated = (("outcome.time.start", f.start), ("outcome.time.end", f.end),
             ("outcome.time.entry", f.entry_date)) if f else ()
    for role, col in dated:
        if not col or col not in df:
            continue
        try:
            s = coerce_dates(df, col, role, date_format)
        except DataError as exc:
            problems.append(str(exc))
            continue
        if s.notna().sum() == 0:
            problems.append(f"column {col!r} ({role}) is missing in every row; check the extract.")
    return problems


def group_problems(x: np.ndarray, term: GroupedTerm, min_cell: int) -> tuple[list[str], list[str]]:
    """What is wrong with a legacy grouping in one analysis sample, before anything is fitted:
    (problems that make a legacy contrast impossible, warnings). Problems: an empty group (naming
    the cut that lies outside the observed range when that is the cause), an empty reference
    group. Warnings: groups with fewer rows than ``min_cell``."""
    problems: list[str] = []
    warnings: list[str] = []
    if len(x) == 0:
        return problems, warnings
    lo, hi = float(np.min(x)), float(np.max(x))
    counts = np.bincount(term.codes(x), minlength=len(term.labels))
    outside = [c for c in term.cuts if c <= lo or c > hi]
    empty = [term.labels[j] for j in range(len(term.labels)) if counts[j] == 0]
    if empty:
        ref = term.labels[term.reference]
        names = ", ".join(repr(e) for e in empty)
        what = (f"the reference group {names} is" if empty == [ref] else
                f"groups {names} are" if len(empty) > 1 else f"group {names} is")
        cause = (f" because cut(s) {', '.join(f'{c:g}' for c in outside)} lie outside the "
                 f"observed range {lo:g} to {hi:g}" if outside else "")
        fix = ("check the cuts (and the unit of the column) against the data" if outside else
               "check the cuts against the data")
        if ref in empty:
            fix += ", or choose another `reference` in groupings"
        problems.append(f"{what} empty in the analysis sample{cause}: the legacy contrasts "
                        f"{'against' if ref in empty else 'of'} it cannot be estimated; {fix}.")
    small = [(term.labels[j], int(counts[j])) for j in range(len(term.labels))
             if is_small(counts[j], min_cell)]
    if small:
        warnings.append(
            f"group(s) {', '.join(f'{lab!r} ({n} rows)' for lab, n in small)} of "
            f"{term.variable!r} hold fewer than disclosure.min_cell = {min_cell} rows: their "
            "counts are suppressed in outputs and their contrasts are imprecise.")
    return problems, warnings


def grouping_warnings(spec: Spec) -> list[str]:
    """Build each cohort's analysis samples and legacy groups (exposure, grouped adjusters and a
    grouped ``by``) and report, per cohort, empty groups, cuts outside the observed range, an
    empty reference group and groups below ``disclosure.min_cell``. Call after
    :func:`data_problems` found nothing. The analyses still run: the failing legacy contrasts are
    recorded with their status."""
    found: dict[str, list[str]] = {}
    for cohort in spec.cohorts:
        cspec = spec.for_cohort(cohort.name)
        cols = list(dict.fromkeys(c for a in cspec.analyses for c, _ in _column_fields(a)))
        df = read_extract(cohort.path, cols, cohort.csv)
        for a in cspec.analyses:
            try:
                sample = analysis_sample(df, a, cspec)
            except DataError as exc:
                found.setdefault(f"analyses[{a.name}]: {exc}", []).append(cohort.name)
                continue
            if sample.n == 0:
                found.setdefault(f"analyses[{a.name}]: no rows are left after filters, complete "
                                 "cases and follow-up checks.", []).append(cohort.name)
                continue
            grouped = [(a.exposure, "exposure")] + [(v, "adjust") for v in a.adjust
                                                    if is_grouped(v, cspec)]
            if a.by and is_grouped(a.by, cspec):
                grouped.append((a.by, "by"))
            for var, role in grouped:
                x = coerce_numeric(sample.frame, var, role).to_numpy(float)
                term = legacy_term(x, var, cspec)
                probs, warns = group_problems(x, term, cspec.min_cell)
                for m in probs + warns:
                    found.setdefault(f"analyses[{a.name}].{role} ({var}): {m}",
                                     []).append(cohort.name)
    out = []
    for msg, cohorts in found.items():
        label = "cohort" if len(cohorts) == 1 else "cohorts"
        out.append(f"{msg} ({label} {', '.join(cohorts)})")
    return out
