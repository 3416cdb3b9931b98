"""Rows the report shows, prepared from the study-level tables: pure functions of data frames
(no HTML, no files), so each can be tested on a hand-made table."""

from __future__ import annotations

import math
from typing import Any

import pandas as pd

from .. import labels, text
from ..summary import effect, is_ratio

POOLING = ("fixed", "random", "random HKSJ")


def get(r: Any, key: str) -> Any:
    """A field of a row (dict or Series), None when the table has no such column."""
    if isinstance(r, pd.Series):
        return r[key] if key in r.index else None
    return r.get(key) if r is not None else None


def pooled_rows(rows: pd.DataFrame) -> list[dict[str, str]]:
    """One row per pooled contrast (form x contrast) with the fixed, random and random-HKSJ
    estimates side by side. A contrast that only one cohort reported is not pooled: its row
    says so instead of showing a "pooled" value."""
    if rows.empty:
        return []
    out = []
    keys = list(dict.fromkeys(zip(rows["form"].astype(str), rows["contrast"].astype(str),
                                  strict=True)))
    for form, contrast in keys:
        sub = rows[(rows["form"].astype(str) == form) & (rows["contrast"].astype(str) == contrast)]
        k = int(sub["k"].max()) if sub["k"].notna().any() else 0
        scale = sub["scale"].iloc[0]
        row = {"form": labels.form(form), "contrast": contrast, "cohorts": text.count(k)}
        for method in POOLING:
            m = sub[sub["method"].astype(str) == method]
            head = labels.METHODS[method]
            if k < 2:
                row[head] = "reported by one cohort only"
            elif m.empty:
                row[head] = text.DASH
            else:
                r = m.iloc[0]
                row[head] = effect(r["effect"], r["effect_lower"], r["effect_upper"], scale)
        out.append(row)
    return out


def pooled_selection(pe: pd.DataFrame, analysis: str) -> pd.DataFrame:
    """The pooled contrasts the report shows for one analysis: the group contrasts (legacy and
    continuous at the common group values), adjusted as in the legacy analysis when pooled that
    way, without the per-level models."""
    rows = pe[pe["analysis"] == analysis] if len(pe) else pe
    if rows.empty:
        return rows
    rows = rows[rows["contrast_type"].astype(str).isin(["group", "common group"])
                & ~rows["form"].astype(str).str.endswith(" x level")]
    if rows.empty:
        return rows
    adj = "legacy" if (rows["adjustment"] == "legacy").any() else rows["adjustment"].iloc[0]
    return rows[rows["adjustment"] == adj]


def heterogeneity_rows(het: pd.DataFrame) -> list[dict[str, str]]:
    """One row per pooled item: Q with its df and p, I², and τ² by each estimator side by side;
    items reported by one cohort only say so."""
    if het.empty:
        return []
    out = []
    for (adjustment, item), g in het.groupby(["adjustment", "item"], sort=False):
        r = g.iloc[0]
        single = str(get(r, "status")) == "single cohort" or (text.finite(get(r, "k"))
                                                            and int(r["k"]) < 2)
        row = {"adjustment": labels.code("adjustment", adjustment), "pooled item": item_text(item),
               "cohorts": text.count(get(r, "k"))}
        if single:
            row.update({"Q (df), p": "reported by one cohort only", "I²": text.DASH})
        else:
            row.update({"Q (df), p": f"{text.with_df(get(r, 'q'), get(r, 'q_df'))}, "
                                     f"p {text.pvalue(get(r, 'q_p'))}",
                        "I²": text.percent(get(r, "i2"))})
        for method in ("DL", "PM", "MM"):
            m = g[g["tau2_method"].astype(str) == method]
            if len(m):
                row[f"τ² ({method})"] = text.DASH if single else text.number(m["tau2"].iloc[0])
        out.append(row)
    return out


def item_text(item: object) -> str:
    """A pooled item ("form: contrast") with the form in words."""
    form, sep, rest = str(item).partition(": ")
    return f"{labels.form(form)}: {rest}" if sep else str(item)


def effect_rows(eff: pd.DataFrame) -> tuple[list[dict[str, str]], str]:
    """The contrasts of one analysis (adjusted as in the legacy analysis), one row per contrast
    and one column per form, and the scale they are on."""
    if "by_level" in eff:
        eff = eff[eff["by_level"].fillna("") == ""]
    if eff.empty:
        return [], ""
    if (eff["adjustment"] == "legacy").any():
        eff = eff[eff["adjustment"] == "legacy"]
    scale = str(eff["scale"].iloc[0])
    forms = [f for f in ("legacy", "spline", "fp", "linear") if (eff["form"] == f).any()]
    rows = []
    for ctype, contrast in dict.fromkeys(zip(eff["contrast_type"], eff["contrast"],
                                             strict=True)):
        sub = eff[(eff["contrast_type"] == ctype) & (eff["contrast"] == contrast)]
        row = {"contrast": str(contrast)}
        for f in forms:
            r = sub[sub["form"] == f]
            row[labels.form(f)] = (effect(r["effect"].iloc[0], r["effect_lower"].iloc[0],
                                          r["effect_upper"].iloc[0], scale)
                                   if len(r) and (f != "legacy" or ctype == "group")
                                   else text.DASH)
        sp = sub[sub["form"] == "spline"]
        row["spline within the group (10th to 90th pct)"] = (
            text.span(sp["within_p10"].iloc[0], sp["within_p90"].iloc[0],
                      "ratio" if is_ratio(scale) else "number")
            if len(sp) and text.finite(sp["within_p10"].iloc[0]) else text.DASH)
        rows.append(row)
    return rows, scale


def information_rows(info: pd.DataFrame, kept_ci: dict[str, str]) -> list[dict[str, str]]:
    """Per adjustment coding: every form's LR χ² (df), information kept (with its bootstrap
    interval when there is one), the two tests, discrimination and the best form."""
    rows = []
    for r in info.to_dict("records"):
        row = {"adjustment": labels.code("adjustment", r["adjustment"])}
        for form, head in (("legacy", "groups"), ("linear", "linear"), ("spline", "spline"),
                           ("fp", "FP"), ("legacy_plus_spline", "groups + spline")):
            row[f"LR χ² {head} (df)"] = text.with_df(r.get(f"lr_{form}"), r.get(f"df_{form}"))
        ci = kept_ci.get(str(r["adjustment"]), "")
        row["information kept"] = (text.percent(r.get("info_kept"))
                                   + (f" ({ci})" if ci else ""))
        row["spline adds, p"] = text.pvalue(r.get("added_p"))
        row["nonlinear, p"] = text.pvalue(r.get("nonlinearity_p"))
        row["C groups"] = text.number(r.get("c_legacy"))
        row["C spline"] = text.number(r.get("c_spline"))
        row["best by AIC"] = labels.form(str(r.get("best_form") or text.DASH))
        rows.append(row)
    return rows


def cards(info: Any, kept_ci: str, counts: dict[str, str]) -> list[dict[str, str]]:
    """The key numbers of one analysis."""
    sample = counts["n"] + " rows"
    if counts["events"] != text.DASH:
        sample += f", {counts['events']} events"
    if counts.get("person_time"):
        sample += f", {counts['person_time']} person-time"
    return [
        {"label": "information kept by the legacy groups",
         "value": text.percent(get(info, "info_kept")),
         "sub": (f"bootstrap interval {kept_ci}; " if kept_ci else "")
         + f"LR χ² {text.number(get(info, 'lr_legacy'))} of "
           f"{text.number(get(info, 'lr_legacy_plus_spline'))}"},
        {"label": "a spline adds to the groups", "value": "p " + text.pvalue(get(info, "added_p")),
         "sub": f"LR χ² {text.number(get(info, 'added_lr'))} on "
                f"{text.count(get(info, 'added_df'))} df"},
        {"label": "departure from a straight line",
         "value": "p " + text.pvalue(get(info, "nonlinearity_p")),
         "sub": f"spline vs linear, {text.count(get(info, 'nonlinearity_df'))} df"},
        {"label": "best form by AIC", "value": labels.form(str(get(info, "best_form") or "–")),
         "sub": (f"ΔC (spline − groups) {text.number(get(info, 'delta_c'))}"
                 if text.finite(get(info, "delta_c")) else "discrimination not defined")},
        {"label": "analysis sample", "value": counts["n"], "sub": sample},
    ]


def trim_text(r: Any) -> str:
    if r["trim"] == "none":
        return "full range"
    side = {"lower": "low tail", "upper": "high tail", "both": "both tails"}.get(r["trim"],
                                                                               str(r["trim"]))
    share = max(float(r["share_lower"]), float(r["share_upper"]))
    return f"{side} {text.percent(share)}"


def suppressed(r: Any, key: str, min_cell: int) -> str:
    if get(r, "suppressed") is True:
        return f"<{min_cell}"
    return text.count(get(r, key))


COVARIANCE_TEXT = {"greenland_longnecker": "Greenland–Longnecker", "hamling": "Hamling",
                   "independence": "independence (flagged)"}


def published_fit_rows(fits: pd.DataFrame) -> list[dict[str, str]]:
    """The published-tables block: per contributor and form, where its evidence comes from,
    its per-unit ratio (linear form), the nonlinearity and goodness-of-fit p-values; the pooled
    rows with I² and how far the published tables move the pooled curve."""
    if fits.empty:
        return []
    adj = "continuous" if (fits["adjustment"] == "continuous").any() else \
        str(fits["adjustment"].iloc[0])
    out = []
    for _, r in fits[fits["adjustment"] == adj].iterrows():
        slope = get(r, "slope")
        scale = str(get(r, "scale") or "")
        per_unit = text.DASH
        if text.finite(slope):
            per_unit = (text.ratio(math.exp(float(slope))) if scale.endswith("ratio")
                        else text.number(slope))
        failed = str(get(r, "status")) not in ("ok",)
        out.append({
            "contributor": str(get(r, "study")),
            "evidence": str(get(r, "evidence")),
            "form": str(get(r, "form")),
            "covariance from": COVARIANCE_TEXT.get(str(get(r, "covariance_method") or ""),
                                                   text.DASH),
            "per unit": per_unit,
            "nonlinear, p": text.pvalue(get(r, "nonlinear_p")),
            "goodness of fit, p": text.pvalue(get(r, "gof_p")),
            "I²": text.percent(get(r, "i2")) if text.finite(get(r, "i2")) else text.DASH,
            "shift without published": (text.number(get(r, "max_shift_without_published"))
                                        if text.finite(get(r, "max_shift_without_published"))
                                        else text.DASH),
            "note": str(get(r, "message") or "") if failed else
            ("independence approximation" if get(r, "covariance_method") == "independence"
             else ""),
        })
    return out


def decision_resampling_rows(df: pd.DataFrame) -> list[dict[str, str]]:
    """The bootstrap of the decision numbers (``decision_resampling``, status ok): per quantity
    and model or rule, the estimate with its percentile interval, the optimism and the
    optimism-corrected value; implied thresholds flagged outside the 1st–99th percentile."""
    if df.empty or "quantity" not in df:
        return []
    rows = []
    for r in df[df["status"] == "ok"].to_dict("records"):
        what = str(r.get("rule") or "") or labels.form(str(r.get("model") or ""))
        adj = str(r.get("adjustment") or "")
        if adj:
            what += f", {labels.code('adjustment', adj)}"
        thr = r.get("threshold")
        at = text.percent(thr, 1 if text.finite(thr) and round(thr * 100) != thr * 100 else 0)
        flag = r.get("beyond_central_range")
        note = ("outside the 1st–99th percentile" if flag is True or flag == 1.0 else "")
        rows.append({
            "quantity": str(r["quantity"]), "model or rule": what,
            "risk threshold": at if text.finite(thr) else text.DASH,
            "estimate (95% bootstrap interval)": text.interval(r.get("estimate"), r.get("lower"),
                                                              r.get("upper")),
            "optimism": text.number(r.get("optimism")),
            "corrected": text.number(r.get("corrected")),
            "note": note})
    return rows


# Row kinds of a generic table that hold a curve's grid (one row per grid point): left out of
# the report's generic tables, kept in the parquet.
GRID_ROW_TYPES = ("curve",)


def generic_rows(df: pd.DataFrame, name: str, limit: int = 60) -> tuple[pd.DataFrame, str]:
    """What a generic table (one the report does not lay out itself) shows of one analysis'
    rows: no grid rows of a curve, at most ``limit`` rows, no column empty in every shown row;
    and the note saying what was left out and where every row is."""
    shown, left = df, []
    if "row_type" in df:
        grid = df["row_type"].astype(str).isin(GRID_ROW_TYPES)
        if grid.any() and not grid.all():
            shown = df[~grid]
            left.append(f"{int(grid.sum())} curve rows (one per grid point)")
    if len(shown) > limit:
        left.append(f"{len(shown) - limit} rows after the first {limit}")
        shown = shown.head(limit)
    shown = shown.dropna(axis=1, how="all")
    note = (f"Not shown: {' and '.join(left)}; every row is in tables/{name}.parquet."
            if left else "")
    return shown.reset_index(drop=True), note
