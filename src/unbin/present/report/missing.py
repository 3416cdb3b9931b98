"""Rows of the report's "Missing values" section, prepared from the study-level tables: pure
functions of data frames (and the spec's analyses), tested on hand-made tables.

- ``column_rows``: per cohort and analysis with missing values, the share missing per column
  and the columns whose complete-case rows differ most from the dropped rows (standardised
  differences of the ``missingness`` table's ``all`` rows);
- ``imputation_twins``: an analysis under ``missing: {method: impute}`` and the analysis that
  is the same in every other key (its complete-case twin);
- ``twin_rows`` and ``twin_reading``: the twins' estimates side by side (the legacy group
  contrasts and each continuous form's contrasts, the quartile contrast summarising its curve)
  and one line saying how far imputation moved them against the complete-case intervals.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import pandas as pd

from .. import labels, text
from ..summary import effect

FORMS = ("legacy", "linear", "spline", "fp")
# Contrasts compared between the twins: the legacy groups' own contrasts and, per continuous
# form, the same group contrasts and the quartile contrast (75th vs 25th percentile).
CONTRAST_TYPES = ("group", "iqr")
# A shift below this share of the complete-case interval's half-width reads as small.
SMALL_SHIFT = 0.25


def _withheld(r: Any) -> bool:
    return bool(r.get("suppressed")) is True


def has_missing(rows: pd.DataFrame) -> bool:
    """Whether the complete-case step dropped rows for missing values (a withheld count is a
    small positive one)."""
    if rows.empty:
        return False
    miss = pd.to_numeric(rows["missing"], errors="coerce").fillna(0)
    return bool((miss > 0).any() or rows["suppressed"].fillna(False).astype(bool).any())


def column_rows(miss: pd.DataFrame, analysis: str, label: Callable[[str], str], min_cell: int,
                top: int = 3) -> list[dict[str, str]]:
    """Per cohort whose complete-case step dropped rows of ``analysis``: every column with
    missing values, then the ``top`` other columns with the largest absolute standardised
    difference (complete-case rows minus dropped rows), ordered by share missing, then by that
    size."""
    if miss.empty or "subset" not in miss:
        return []
    every = miss[(miss["subset"] == "all") & (miss["analysis"] == analysis)]
    out: list[dict[str, str]] = []
    for cohort, g in every.groupby("cohort", sort=False):
        if not has_missing(g):
            continue
        g = g.assign(_miss=pd.to_numeric(g["missing"], errors="coerce"),
                     _size=pd.to_numeric(g["smd"], errors="coerce").abs())
        dropped = (g["_miss"].fillna(0) > 0) | g["suppressed"].fillna(False).astype(bool)
        others = g[~dropped & g["_size"].notna()].sort_values("_size", ascending=False,
                                                             kind="stable").head(top)
        shown = pd.concat([g[dropped].sort_values(["share_missing", "_size"],
                                                  ascending=False, kind="stable",
                                                  na_position="last"), others])
        for r in shown.to_dict("records"):
            out.append({
                "cohort": str(cohort), "analysis": str(analysis),
                "column": label(str(r["column"])), "role": str(r["role"]),
                "rows": text.count(r["rows"]),
                "missing": (f"{text.DASH} (withheld, <{min_cell})" if _withheld(r)
                            else text.count(r["missing"])),
                "share missing": (text.DASH if _withheld(r)
                                  else text.percent(r["share_missing"], 1)),
                "standardised difference": smd_text(r),
                "note": str(r.get("note") or ""),
            })
    return out


def smd_text(r: dict[str, Any]) -> str:
    """A standardised difference as the table prints it: signed for means, unsigned for levels
    (Yang & Dalton's multi-category difference has no sign)."""
    v = r.get("smd")
    if not text.finite(v):
        return text.DASH
    kind = "means" if r.get("smd_method") == "means" else "levels"
    return f"{text.number(v, 2)} ({kind})"


def imputation_twins(raw_analyses: Sequence[dict[str, Any]]) -> list[tuple[str, str]]:
    """(complete-case analysis, imputed analysis) pairs: an analysis whose ``missing`` method
    is ``impute`` and another, not imputed, with every other key of the spec equal (the
    published estimate, ``reported``, aside: it changes no fit)."""
    def imputed(a: dict[str, Any]) -> bool:
        return str((a.get("missing") or {}).get("method", "complete_case")) == "impute"

    def rest(a: dict[str, Any]) -> dict[str, Any]:
        return {k: v for k, v in a.items() if k not in ("name", "missing", "reported")}

    pairs = []
    for imp in raw_analyses:
        if not imputed(imp):
            continue
        for cc in raw_analyses:
            if not imputed(cc) and rest(cc) == rest(imp):
                pairs.append((str(cc["name"]), str(imp["name"])))
                break
    return pairs


def _contrasts(effects: pd.DataFrame, cohort: str, analysis: str) -> pd.DataFrame:
    e = effects[(effects["cohort"] == cohort) & (effects["analysis"] == analysis)]
    if e.empty:
        return e
    if "by_level" in e:
        e = e[e["by_level"].fillna("").astype(str) == ""]
    if (e["adjustment"] == "legacy").any():
        e = e[e["adjustment"] == "legacy"]
    e = e[e["form"].isin(FORMS) & e["contrast_type"].isin(CONTRAST_TYPES)
          & ~e["contrast"].astype(str).str.endswith("(reference)")]
    if "status" in e:
        e = e[e["status"] == "ok"]
    return e[np.isfinite(e["estimate"].astype(float))]


def paired(effects: pd.DataFrame, cohort: str, complete: str, imputed: str) -> pd.DataFrame:
    """The contrasts both twins estimated, one row each: the complete-case (``_cc``) and the
    imputed (``_mi``) estimate, interval and effect; ``shift`` = |imputed − complete-case| on
    the model scale over the complete-case interval's half-width; ``inside`` = the imputed
    estimate lies inside the complete-case interval."""
    keys = ["form", "contrast_type", "contrast"]
    cols = [*keys, "estimate", "lower", "upper", "effect", "effect_lower", "effect_upper",
            "scale"]
    cc = _contrasts(effects, cohort, complete)[cols]
    mi = _contrasts(effects, cohort, imputed)[cols].drop(columns="scale")
    both = cc.merge(mi, on=keys, suffixes=("_cc", "_mi"), sort=False)
    both["form"] = pd.Categorical(both["form"], FORMS, ordered=True)
    both = both.sort_values(["form"], kind="stable").reset_index(drop=True)
    both["form"] = both["form"].astype(str)
    half = (both["upper_cc"] - both["lower_cc"]) / 2
    both["shift"] = (both["estimate_mi"] - both["estimate_cc"]).abs() / half.where(half > 0)
    both["inside"] = ((both["estimate_mi"] >= both["lower_cc"])
                      & (both["estimate_mi"] <= both["upper_cc"]))
    return both


def twin_rows(effects: pd.DataFrame, cohorts: Sequence[str], complete: str,
              imputed: str) -> list[dict[str, str]]:
    """The twins' estimates side by side, per cohort, form and contrast."""
    out = []
    for cohort in cohorts:
        for r in paired(effects, cohort, complete, imputed).to_dict("records"):
            scale = str(r["scale"])
            contrast = (str(r["contrast"]) if r["contrast_type"] == "group"
                        else f"{r['contrast']} ({labels.code('contrast_type', r['contrast_type'])})")
            out.append({
                "cohort": cohort, "analysis": complete,
                "form": labels.form(str(r["form"])), "contrast": contrast,
                "complete cases": effect(r["effect_cc"], r["effect_lower_cc"],
                                         r["effect_upper_cc"], scale),
                "imputed": effect(r["effect_mi"], r["effect_lower_mi"], r["effect_upper_mi"],
                                  scale),
                "shift (share of the half-interval)": text.percent(r["shift"]),
            })
    return out


def twin_reading(effects: pd.DataFrame, status: pd.DataFrame, cohort: str, complete: str,
                 imputed: str) -> str:
    """One line per cohort: the rows each twin used, the largest shift of an estimate against
    the complete-case interval and how many imputed estimates lie inside those intervals."""
    both = paired(effects, cohort, complete, imputed)
    if both.empty:
        return f"{cohort}: no contrast estimated by both analyses."

    def rows(analysis: str) -> str:
        st = status[(status["cohort"] == cohort) & (status["analysis"] == analysis)]
        return text.count(st["n_used"].iloc[0]) if len(st) and "n_used" in st else text.DASH

    if not both["shift"].notna().any():
        return (f"{cohort}: {rows(complete)} rows with complete values, {rows(imputed)} with "
                "imputation; no complete-case interval has a width to measure the shifts by.")
    worst = both.loc[both["shift"].fillna(-1).idxmax()]
    size = ("small against the intervals" if float(worst["shift"]) < SMALL_SHIFT
            else "not small against the intervals: read both analyses")
    return (f"{cohort}: {rows(complete)} rows with complete values, {rows(imputed)} with "
            f"imputation; the largest shift is {text.percent(worst['shift'])} of the "
            f"complete-case half-interval ({labels.form(str(worst['form']))}, "
            f"{worst['contrast']}), {size}; {int(both['inside'].sum())} of {len(both)} imputed "
            "estimates lie inside the complete-case interval.")
