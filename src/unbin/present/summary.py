"""The study summary, read from the study-level tables: the rows (pure functions of the tables,
shared by the terminal and the report) and the terminal's small tables (rich).

Every row names its cohort and analysis. Numbers go through ``present.text`` and codes through
``present.labels``, so the terminal and the report print the same cells.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from rich import box
from rich.console import Console
from rich.table import Table

from ..results.tables import read_table
from . import labels, text

Tables = Mapping[str, pd.DataFrame]
Rows = list[dict[str, str]]
RATIO_SCALES = ("odds ratio", "hazard ratio", "rate ratio", "risk ratio")
CAUTION = ("unbin supports statistical re-analysis; decisions follow local clinical guidelines "
           "and licensed practice.")
KEPT_NOTE = ("info kept = LR χ²(legacy groups) / LR χ²(groups + spline); 100% means the grouping "
             "lost nothing. FP = fractional polynomial")


def _t(tables: Tables, name: str) -> pd.DataFrame:
    df = tables.get(name)
    return df if df is not None else pd.DataFrame()


def _pairs(df: pd.DataFrame) -> list[tuple[str, str]]:
    if df.empty or "analysis" not in df:
        return []
    cohorts = df["cohort"] if "cohort" in df else pd.Series([""] * len(df), index=df.index)
    return list(dict.fromkeys(zip(cohorts.astype(str), df["analysis"].astype(str), strict=True)))


def _of(df: pd.DataFrame, cohort: str, analysis: str) -> pd.DataFrame:
    keep = df["analysis"].astype(str) == analysis
    if "cohort" in df:
        keep &= df["cohort"].astype(str) == cohort
    return df[keep]


def _per_analysis(tables: Tables, name: str, needed: str
                  ) -> list[tuple[str, str, pd.DataFrame]]:
    """(cohort, analysis, its rows) of table ``name``; none when it is empty or lacks ``needed``."""
    df = _t(tables, name)
    if df.empty or needed not in df:
        return []
    return [(cohort, analysis, _of(df, cohort, analysis)) for cohort, analysis in _pairs(df)]


def _flag(s: pd.Series) -> pd.Series:
    return s.astype("boolean").fillna(False).astype(bool)


def is_ratio(scale: Any) -> bool:
    return str(scale) in RATIO_SCALES


def effect(e: Any, lo: Any, hi: Any, scale: Any) -> str:
    """An effect with its interval on its scale (ratio rule for ratio scales)."""
    return text.interval(e, lo, hi, "ratio" if is_ratio(scale) else "number")


# --------------------------------------------------------------------------- information


def kept_interval(tables: Tables, cohort: str, analysis: str, adjustment: str = "legacy") -> str:
    """The bootstrap interval of the information kept, when the ``information_bootstrap`` table
    exists and has an ok row for this analysis whose own ``info_kept`` is the ``information``
    table's (an interval of another quantity, e.g. a resampled likelihood-ratio share beside a
    robust Wald share, is never printed beside the point); else an empty string."""
    boot = _t(tables, "information_bootstrap")
    need = {"cohort", "analysis", "adjustment", "info_kept", "info_kept_lower", "info_kept_upper"}
    if boot.empty or not need <= set(boot.columns):
        return ""
    rows = _of(boot, cohort, analysis)
    rows = rows[rows["adjustment"].astype(str) == adjustment]
    if "status" in rows:
        rows = rows[rows["status"].astype(str) == "ok"]
    if rows.empty:
        return ""
    r = rows.iloc[0]
    info = _t(tables, "information")
    if info.empty or not {"analysis", "adjustment", "info_kept"} <= set(info.columns):
        return ""
    point = _of(info, cohort, analysis)
    point = point.loc[point["adjustment"].astype(str) == adjustment, "info_kept"]
    if point.empty or not (text.finite(point.iloc[0]) and text.finite(r["info_kept"])
                           and math.isclose(float(point.iloc[0]), float(r["info_kept"]),
                                            rel_tol=1e-9, abs_tol=1e-12)):
        return ""
    return text.span(r["info_kept_lower"], r["info_kept_upper"], "percent")


def kept(tables: Tables, row: Any, cohort: str, analysis: str,
         adjustment: str = "legacy") -> str:
    """Information kept as a percent, with its bootstrap interval when one was computed."""
    if row is None or not text.finite(row.get("info_kept")):
        return text.DASH
    ci = kept_interval(tables, cohort, analysis, adjustment)
    return text.percent(row["info_kept"]) + (f" ({ci})" if ci else "")


def sample_counts(tables: Tables, cohort: str, analysis: str) -> dict[str, str]:
    """Rows used, events and person-time of the analysis sample (from the selected legacy fit;
    events only for binary, count and time-to-event outcomes)."""
    fits = _t(tables, "fits")
    out = {"n": text.DASH, "events": text.DASH, "person_time": ""}
    st = _t(tables, "status")
    if len(st):
        srow = _of(st, cohort, analysis)
        if len(srow) and "n_used" in srow:
            out["n"] = text.count(srow["n_used"].iloc[0])
    if fits.empty:
        return out
    f = _of(fits, cohort, analysis)
    f = f[(f["form"].astype(str) == "legacy") & _flag(f["selected"])] if "selected" in f else f
    if f.empty:
        return out
    r = f.iloc[0]
    if "events" in f and text.finite(r.get("events")):
        out["events"] = text.count(r["events"])
    for key in ("person_time", "follow_up"):
        if key in f and text.finite(r.get(key)):
            out["person_time"] = text.number(r[key])
    return out


def analysis_rows(tables: Tables, jobs: list[tuple[str, str]]) -> list[dict[str, Any]]:
    """One row per (cohort, analysis): status, counts and the legacy-adjusted information."""
    status, info = _t(tables, "status"), _t(tables, "information")
    rows = []
    for cohort, analysis in jobs:
        st = _of(status, cohort, analysis) if len(status) else status
        inf = _of(info, cohort, analysis) if len(info) else info
        if len(inf):
            inf = inf[inf["adjustment"].astype(str) == "legacy"]
        i = inf.iloc[0].to_dict() if len(inf) else None
        counts = sample_counts(tables, cohort, analysis)
        rows.append({
            "cohort": cohort, "analysis": analysis,
            "status": str(st["status"].iloc[0]) if len(st) else "missing",
            "message": str(st["message"].iloc[0] or "") if len(st) and "message" in st else "",
            "family": str(st["family"].iloc[0]) if len(st) and "family" in st else "",
            "n": counts["n"], "events": counts["events"], "person_time": counts["person_time"],
            "n_input": text.count(st["n_input"].iloc[0]) if len(st) and "n_input" in st
            else text.DASH,
            "lr_groups": text.with_df(*(i.get(k) for k in ("lr_legacy", "df_legacy")))
            if i else text.DASH,
            "lr_spline": text.with_df(*(i.get(k) for k in ("lr_spline", "df_spline")))
            if i else text.DASH,
            "kept": kept(tables, i, cohort, analysis),
            "added_p": text.pvalue(i.get("added_p")) if i else text.DASH,
            "nonlinear_p": text.pvalue(i.get("nonlinearity_p")) if i else text.DASH,
            "best": labels.form(str(i["best_form"])) if i and i.get("best_form") else text.DASH,
            "best_short": labels.short_form(str(i["best_form"])) if i and i.get("best_form")
            else text.DASH,
        })
    return rows


# --------------------------------------------------------------------------- the questions


def range_rows(tables: Tables) -> Rows:
    """Per analysis: the largest move of the legacy estimate and of the spline contrast when the
    exposure's range is trimmed (ratios as a factor, differences as ±)."""
    rows = []
    for cohort, analysis, g in _per_analysis(tables, "ranges", "form"):
        ok = g[(g["status"] == "ok") & ~_flag(g["extrapolated"])]
        ratio = is_ratio(g["scale"].iloc[0])

        moves = []
        for form in ("legacy", "spline"):
            ch = ok.loc[ok["form"] == form, "change"].abs().dropna()
            moves.append(float(ch.max()) if len(ch) else math.nan)
        if ratio:
            shown = [f"×{text.ratio(math.exp(v))}" if text.finite(v) else text.DASH
                     for v in moves]
        else:
            shown = [f"±{v}" if v != text.DASH else v for v in text.aligned(moves)]
        rows.append({"cohort": cohort, "analysis": analysis, "legacy groups move": shown[0],
                     "spline moves": shown[1],
                     "trims skipped": text.count(int((g["status"] == "skipped").sum()))})
    return rows


def confounding_rows(tables: Tables) -> Rows:
    """Per analysis: the share of the confounding the legacy adjustment leaves (linear exposure
    contrast, standardised scale) and the confounder whose grouping leaves the most."""
    rows = []
    for cohort, analysis, lin in _per_analysis(tables, "confounding", "scope"):
        lin = lin[lin["exposure_form"] == "linear"]
        if "primary" in lin:
            lin = lin[_flag(lin["primary"])]
        allrow = lin[lin["scope"] == "all"]
        share, worst = text.DASH, text.DASH
        if len(allrow) and text.finite(allrow["share_left"].iloc[0]):
            r = allrow.iloc[0]
            clear = r.get("confounding_clear")
            if clear is not None and not pd.isna(clear) and not bool(clear):
                share = "little confounding"
            else:
                share = text.interval(r["share_left"], r.get("share_left_lower"),
                                      r.get("share_left_upper"), "percent")
                big = lin[_flag(lin["largest"])] if "largest" in lin else lin[:0]
                worst = str(big["scope"].iloc[0]) if len(big) else text.DASH
        rows.append({"cohort": cohort, "analysis": analysis, "share left (95% CI)": share,
                     "most left by": worst})
    return rows


def cut_rows(tables: Tables) -> Rows:
    """Per legacy cut chosen from the data: the cut search's optimum and its corrected p-values
    beside the legacy cuts."""
    df = _t(tables, "cutpoints")
    if df.empty or "row_type" not in df:
        return []
    cuts = df[(df["row_type"] == "cut") & (df["role"] == "exposure")]
    rows = []
    for s in df[df["row_type"] == "search"].to_dict("records"):
        mine = _of(cuts, str(s["cohort"]), str(s["analysis"])) if len(cuts) else cuts
        legacy = ", ".join(f"{text.number(c['cut'])} ({text.number(c['percentile'], 2)}th pct)"
                           for c in mine.to_dict("records"))
        ok = s.get("status") == "ok"
        resampled = s.get("p_permutation")
        if not text.finite(resampled):
            resampled = s.get("p_simulated")
        rows.append({
            "cohort": str(s["cohort"]), "analysis": str(s["analysis"]),
            "variable": str(s["variable"]), "legacy cuts": legacy or text.DASH,
            "best cut": text.number(s["cut"]) if ok else "search failed",
            "naive p": text.pvalue(s.get("p_naive")) if ok else text.DASH,
            "corrected p": text.pvalue(s.get("p_lausen")) if ok else text.DASH,
            "resampled p": text.pvalue(resampled) if ok else text.DASH,
            "bootstrap cut (95%)": (f"{text.number(s.get('boot_cut_p2_5'))} to "
                                    f"{text.number(s.get('boot_cut_p97_5'))}")
            if ok and text.finite(s.get("boot_cut_p2_5")) else text.DASH})
    return rows


def replication_rows(tables: Tables) -> Rows:
    """Per published estimate: the estimate beside its refit and the verdict."""
    df = _t(tables, "replication")
    if df.empty or "verdict" not in df:
        return []
    rows = []
    for r in df.to_dict("records"):
        ok = r.get("status") == "ok"
        rows.append({
            "cohort": str(r.get("cohort", "")), "analysis": str(r["analysis"]),
            "contrast": str(r["contrast"]),
            "published": effect(r["reported_effect"], r.get("reported_lower"),
                                r.get("reported_upper"), r.get("scale")),
            "refit": effect(r["refit_effect"], r.get("refit_lower"), r.get("refit_upper"),
                            r.get("scale")) if ok else "not refitted",
            "verdict": str(r["verdict"]) if ok else text.DASH})
    return rows


def threshold_value(v: Any, risk_scale: Any) -> str:
    return text.percent(v) if str(risk_scale).startswith("probability") else text.number(v)


def threshold_rows(tables: Tables) -> Rows:
    """Per analysis, risk threshold and level: the exposure values at which the spline's
    predicted risk at the median risk profile crosses the threshold."""
    df = _t(tables, "thresholds")
    if df.empty or "status" not in df:
        return []
    ok = df[(df["status"] == "ok") & (df["model"] == "spline")
            & np.isclose(df["profile_quantile"].astype(float), 0.5)]
    rows = []
    for cohort, analysis in _pairs(ok):
        g = _of(ok, cohort, analysis)
        for (t, level), gl in g.groupby(["threshold", "level"], sort=True):
            vals = gl["exposure_value"].dropna()
            cuts = sorted(set(gl["nearest_cut"].dropna()))
            rows.append({
                "cohort": cohort, "analysis": analysis,
                "risk threshold": threshold_value(t, gl["risk_scale"].iloc[0]),
                "level": "all" if level == "all" else f"{gl['by'].iloc[0]} {level}",
                "exposure value": (", ".join(text.number(v) for v in vals) if len(vals)
                                   else str(gl["position"].iloc[0])),
                "nearest legacy cut": ", ".join(text.number(c) for c in cuts) or text.DASH})
    return rows


def net_benefit_rows(tables: Tables) -> Rows:
    """Per analysis and risk threshold: the net benefit of the legacy rule, of the spline's risk
    rule and of treating everyone (apparent, in the fitted rows)."""
    th, nb = _t(tables, "thresholds"), _t(tables, "net_benefit")
    if nb.empty or "status" not in nb or th.empty:
        return []
    nb = nb[nb["status"] == "ok"]
    wanted = sorted(set(th["threshold"].dropna()))
    rows = []
    for cohort, analysis in _pairs(nb):
        g = _of(nb, cohort, analysis)
        for t in wanted:
            at = g[np.isclose(g["threshold"].astype(float), t)]
            legacy = at[at["rule_type"] == "legacy"]
            spline = at[at["rule"] == "risk: spline"]
            treat_all = at[at["rule"] == "treat all"]
            if legacy.empty or spline.empty or treat_all.empty:
                continue
            values = text.aligned([legacy["net_benefit"].iloc[0], spline["net_benefit"].iloc[0],
                                   treat_all["net_benefit"].iloc[0]])
            mine = _of(th, cohort, analysis)
            scale = (mine["risk_scale"].iloc[0] if "risk_scale" in mine and len(mine) else "")
            rows.append({
                "cohort": cohort, "analysis": analysis,
                "risk threshold": threshold_value(t, scale),
                "legacy rule": values[0], "spline risk rule": values[1], "treat all": values[2]})
    return rows


# Each question's small table: title, rows, footnote.
QUESTIONS: tuple[tuple[str, Any, str], ...] = (
    ("Range dependence: the largest move when the exposure's range is trimmed", range_rows,
     "× a factor on the ratio scale; ± a difference on the mean scale."),
    ("Residual confounding the legacy adjustment leaves", confounding_rows,
     "Share of the confounding of the exposure's quartile contrast (standardised) left by "
     "grouped confounders; the confounder whose grouping leaves the most."),
    ("Legacy cuts chosen from the data", cut_rows,
     "The naive p of a searched cut overstates the evidence; read the corrected ones."),
    ("Published estimates refitted on this extract", replication_rows, ""),
    ("Implied thresholds (spline, median risk profile)", threshold_rows,
     "Exposure values at which predicted risk crosses each threshold."),
    ("Net benefit per patient at the study's risk thresholds", net_benefit_rows,
     "Apparent net benefit, in the rows the models were fitted on. " + CAUTION),
)


def question_tables(tables: Tables) -> list[tuple[str, Rows, str]]:
    """The small tables of the questions whose tables have rows."""
    out = []
    for title, build, note in QUESTIONS:
        rows = build(tables)
        if rows:
            out.append((title, rows, note))
    return out


def messages(tables: Tables) -> list[str]:
    """One line per cause: analyses that did not finish with the same message share a line."""
    st = _t(tables, "status")
    if st.empty:
        return []
    bad = st[st["status"] != "ok"]
    out = []
    for (state, msg), g in bad.groupby(["status", bad["message"].fillna("")], sort=False):
        who = ", ".join(f"{c}/{a}" for c, a in zip(g["cohort"], g["analysis"], strict=True))
        out.append(f"{who} {state}: {msg or 'see the log'}")
    return out


# --------------------------------------------------------------------------- the terminal


def _load(out: Path) -> dict[str, pd.DataFrame]:
    return {p.stem: read_table(p) for p in sorted((out / "tables").glob("*.parquet"))}


def _jobs(tables: Tables) -> list[tuple[str, str]]:
    return _pairs(_t(tables, "status"))


def _table(title: str, columns: list[str], rows: list[list[str]], right: set[str]) -> Table:
    """A borderless rich table whose cells never wrap (each column is as wide as its widest
    cell); long headers wrap instead."""
    t = Table(title=title, title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False,
              collapse_padding=True, title_style="bold")
    for i, col in enumerate(columns):
        width = max([len(r[i]) for r in rows] + [len(w) for w in col.split()])
        t.add_column(col, justify="right" if col in right else "left", min_width=width,
                     max_width=max(width, -(-len(col) // 2)))
    for r in rows:
        t.add_row(*r)
    return t


def information_summary(out: Path, tables: Tables | None = None) -> Table:
    """What the legacy grouping kept, one row per cohort x analysis."""
    tables = tables if tables is not None else _load(out)
    rows = analysis_rows(tables, _jobs(tables))
    many = len({r["cohort"] for r in rows}) > 1
    states = any(r["status"] != "ok" for r in rows)   # all ok: no status column
    cols = (["cohort"] if many else []) + ["analysis"] + (["status"] if states else []) + [
        "n", "events", "LR χ² groups (df)", "LR χ² spline (df)", "info kept", "spline adds p",
        "nonlinear p", "best by AIC"]
    cells = [[*([r["cohort"]] if many else []), r["analysis"], *([r["status"]] if states else []),
              r["n"], r["events"], r["lr_groups"], r["lr_spline"], r["kept"], r["added_p"],
              r["nonlinear_p"], r["best_short"]] for r in rows]
    return _table("What the legacy grouping kept (adjusted as in the legacy analysis)", cols,
                  cells, {"n", "events", "LR χ² groups (df)", "LR χ² spline (df)", "info kept",
                          "spline adds p", "nonlinear p"})


def cost_summary(tables: Tables) -> Table | None:
    """One row per cohort x analysis, one column per question: the terminal's short form of the
    question tables (the report shows each in full)."""
    cols: dict[str, dict[tuple[str, str], str]] = {}
    for r in range_rows(tables):
        cols.setdefault("range move: groups / spline", {})[(r["cohort"], r["analysis"])] = \
            f"{r['legacy groups move']} / {r['spline moves']}"
    for r in confounding_rows(tables):
        cols.setdefault("confounding left", {})[(r["cohort"], r["analysis"])] = \
            r["share left (95% CI)"]
    for r in cut_rows(tables):
        cols.setdefault("cut from data: corrected p", {})[(r["cohort"], r["analysis"])] = \
            f"{r['corrected p']} (best {r['best cut']})"
    for r in replication_rows(tables):
        cols.setdefault("published vs refit", {})[(r["cohort"], r["analysis"])] = \
            f"{r['verdict']}"
    for r in net_benefit_rows(tables):
        key = f"net benefit at {r['risk threshold']}: groups / spline"
        cols.setdefault(key, {})[(r["cohort"], r["analysis"])] = \
            f"{r['legacy rule']} / {r['spline risk rule']}"
    if not cols:
        return None
    nb = [k for k in cols if k.startswith("net benefit")]
    for k in nb[1:]:
        del cols[k]
    jobs = _jobs(tables)
    cells = [[*job, *(cols[k].get(job, "") for k in cols)] for job in jobs]
    return _table("What the grouping cost, by question", ["cohort", "analysis", *cols], cells,
                  set())


def print_summary(out: Path, console: Console | None = None) -> None:
    console = console or Console()
    tables = _load(out)
    console.print(information_summary(out, tables))
    for line in messages(tables):
        console.print(line, markup=False)
    console.print(KEPT_NOTE + ".", markup=False)
    cost = cost_summary(tables)
    if cost is not None:
        console.print(cost)
        console.print("Every question in full: the report (report.html). " + CAUTION,
                      markup=False)
    console.print(f"Tables: {out / 'tables'}", markup=False)
