"""The report's sections: ``Builder`` prepares each section's views from the study-level tables
and the spec and renders its template (``templates/<section>.html.j2``). A section that fails is
replaced by a note saying why; the rest of the report is still written."""

from __future__ import annotations

import logging
import traceback
from collections.abc import Callable
from functools import partial
from pathlib import Path

import pandas as pd
from markupsafe import Markup

from ...refit.sampling_design import design_notes
from .. import labels, summary, text
from ..figures import Context, FigureFile
from . import missing as M
from . import rows as R
from .html import (
    Block,
    Col,
    FigureView,
    TableView,
    figure_view,
    plain_table,
    records_table,
    render,
    slug,
    table,
)

log = logging.getLogger(__name__)

CAUTION = ("unbin supports statistical re-analysis. Decisions about the care of patients follow "
           "local clinical guidelines and licensed practice, not these tables or figures.")
# Tables this report lays out itself; any other study-level table with rows for an analysis is
# shown as a generic table in that analysis' section (so new questions appear without code here).
KNOWN_TABLES = frozenset({"fits", "information", "effects", "curves", "density", "samples",
                          "status", "ranges", "confounding", "cutpoints", "replication",
                          "thresholds", "net_benefit", "pooled_curves", "pooled_effects",
                          "heterogeneity", "harmonisation", "coefficients",
                          "common_contrasts", "information_bootstrap", "published_groups",
                          "published_fits", "published_curves", "calibration",
                          "decision_resampling", "missingness"})
FAMILY_TEXT = {"binary": "binary outcome (logistic model)",
               "continuous": "continuous outcome (linear model)",
               "count": "count outcome (Poisson model with person-time)",
               "survival": "time-to-event outcome (Cox model)"}
KEPT_NOTE = ("Information kept = LR χ²(legacy groups) / LR χ²(groups + spline): 100% means the "
             "grouping lost nothing; in brackets its bootstrap interval when one was computed. "
             "The p-values test whether a spline adds to the groups and whether the exposure's "
             "effect departs from a straight line.")


MISSING_NOTE = ("Share missing: of the rows the complete-case step starts from (after filters). "
                "Standardised difference: complete-case rows minus dropped rows where the "
                "column is observed (means: signed; levels: multi-category, unsigned); 0.1 or "
                "more is usually read as a notable imbalance. The share missing by exposure "
                "group and by outcome is in tables/missingness.parquet.")


class Builder:
    def __init__(self, ctx: Context, figures: list[FigureFile], out: Path) -> None:
        self.ctx = ctx
        self.spec = ctx.spec
        self.figures = figures
        self.out = out
        self.many = len(self.spec.cohorts) > 1
        self.has_pooled = False
        self.has_missing = False

    # ---- helpers
    def guarded(self, what: str, build: Callable[[], str]) -> Markup:
        """A section of the page, or a note in its place saying why it could not be written."""
        try:
            return Markup(build())
        except Exception as exc:
            log.warning("the report's %s could not be written (%s: %s)", what,
                        type(exc).__name__, exc)
            log.debug("%s", traceback.format_exc())
            note = Block(cautions=[f"{what}: this part could not be written "
                                   f"({type(exc).__name__}: {exc}); the numbers are in the "
                                   "tables under tables/. Please report this."])
            return render("block.html.j2", blocks=[note])

    def fig_views(self, cohort: str | None, analysis: str | None, kind: str) -> list[FigureView]:
        return [figure_view(f) for f in self.figures
                if f.cohort == cohort and f.analysis == analysis and f.kind == kind]

    def figs(self, cohort: str | None, analysis: str | None, kind: str) -> str:
        """The HTML of one kind of figure for one (cohort, analysis)."""
        return str(render("block.html.j2",
                          blocks=[Block(figures=self.fig_views(cohort, analysis, kind))]))

    def blocks(self, *blocks: Block) -> str:
        return str(render("block.html.j2", blocks=[b for b in blocks if not b.empty()]))

    def status_row(self, cohort: str, analysis: str) -> pd.Series | None:
        st = self.ctx.rows("status", cohort, analysis)
        return st.iloc[0] if len(st) else None

    def info_row(self, cohort: str, analysis: str, adjustment: str = "legacy") -> pd.Series | None:
        info = self.ctx.rows("information", cohort, analysis)
        if info.empty:
            return None
        rows = info[info["adjustment"] == adjustment]
        return rows.iloc[0] if len(rows) else None

    def heading(self, cohort: str, analysis: str) -> str:
        return analysis + (f" · {cohort}" if self.many else "")

    # ---- study summary
    def summary(self) -> str:
        rows = summary.analysis_rows(self.ctx.tables, self.ctx.jobs())
        cols = [Col("cohort", lambda r: r["cohort"])] if self.many else []
        cols += [Col("analysis", lambda r: r["analysis"]),
                 Col("outcome", lambda r: labels.code("family", r["family"])),
                 Col("exposure", lambda r: self.spec.label(self.spec.analysis(
                     r["analysis"]).exposure)),
                 Col("rows used / in extract", lambda r: f"{r['n']} / {r['n_input']}", True),
                 Col("events", lambda r: r["events"], True),
                 Col("status", lambda r: r["status"]),
                 Col("information kept", lambda r: r["kept"], True),
                 Col("spline adds, p", lambda r: r["added_p"], True),
                 Col("nonlinear, p", lambda r: r["nonlinear_p"], True),
                 Col("best by AIC", lambda r: r["best"])]
        overview = table(rows, cols, "Every analysis at a glance (adjusted as in the legacy "
                                     "analysis)", KEPT_NOTE)
        questions = [records_table(rs, title, note)
                     for title, rs, note in summary.question_tables(self.ctx.tables)]
        return str(render("summary.html.j2", lede=self.lede(), overview=overview,
                          figures=self.fig_views(None, None, "information"),
                          questions=questions))

    def lede(self) -> str:
        status = self.ctx.table("status")
        n_a, n_c = len(self.spec.analyses), len(self.spec.cohorts)
        counts = status["status"].value_counts().to_dict() if len(status) else {}
        state = ", ".join(f"{v} {k}" for k, v in sorted(counts.items()))
        return (f"{n_a} legacy grouped analys{'is' if n_a == 1 else 'es'} of "
                f"{n_c} cohort{'' if n_c == 1 else 's'} refitted with the exposure on its "
                f"continuous scale (restricted cubic spline, fractional polynomial, linear) beside "
                f"the legacy groups, on the same sample. Status: {state or 'no results'}.")

    # ---- one analysis
    def meta(self, analysis: str) -> str:
        a = self.spec.analysis(analysis)
        g = self.spec.groupings.get(a.exposure)
        grouping = ""
        if g is not None:
            if g.cuts:
                grouping = "cuts at " + ", ".join(text.number(c, 4) for c in g.cuts)
            elif g.quantiles:
                grouping = f"{g.quantiles} equal-frequency groups"
            if g.labels:
                grouping += f" ({', '.join(g.labels)}; reference {g.reference})"
            if g.derived_from_data:
                grouping += ", chosen from the data"
        meta = [f"{FAMILY_TEXT.get(a.family, a.family)}: {self._outcome(analysis)}",
                f"exposure {self.spec.label(a.exposure)}",
                f"legacy grouping {grouping}" if grouping else "",
                f"adjusted for {', '.join(self.spec.label(v) for v in a.adjust)}" if a.adjust
                else "no adjustment",
                f"by {self.spec.label(a.by)}" if a.by else "",
                f"strata {', '.join(self.spec.label(v) for v in a.strata)}" if a.strata else "",
                *design_notes(a, self.spec.label)]
        return " · ".join(m for m in meta if m)

    def _outcome(self, analysis: str) -> str:
        o = self.spec.analysis(analysis).outcome
        names = [o.event, o.value, o.count, o.time]
        out = ", ".join(self.spec.label(n) for n in names if n)
        if o.horizon:
            out += f" (horizon {text.number(o.horizon)})"
        return out

    def analysis(self, cohort: str, analysis: str) -> str:
        st = self.status_row(cohort, analysis)
        state = str(R.get(st, "status")) if st is not None else "missing"
        message = (str(R.get(st, "message")) if state not in ("ok", "missing")
                   and st is not None and R.get(st, "message") else "")
        pieces: list[tuple[str, Callable[[str, str], str]]] = [
            ("curves", partial(self.figs_of, "curves")),
            ("curves by level", partial(self.figs_of, "level-curves")),
            ("follow-up windows", partial(self.figs_of, "windows")),
            ("effects", self.effects), ("information", self.information),
            ("range dependence", self.ranges), ("residual confounding", self.confounding),
            ("cut points", self.cutpoints), ("replication", self.replication),
            ("decisions", self.decisions), ("other tables", self.others),
            ("fits and sample", self.fits_and_sample)]
        info = self.info_row(cohort, analysis)
        cards = (R.cards(info, summary.kept_interval(self.ctx.tables, cohort, analysis),
                         summary.sample_counts(self.ctx.tables, cohort, analysis))
                 if info is not None else [])
        return str(render(
            "analysis.html.j2", id=slug("a", cohort, analysis),
            heading=self.heading(cohort, analysis), state=state, meta=self.meta(analysis),
            message=message, cards=cards,
            pieces=[self.guarded(what, partial(build, cohort, analysis))
                    for what, build in pieces]))

    def figs_of(self, kind: str, cohort: str, analysis: str) -> str:
        return self.figs(cohort, analysis, kind)

    def effects(self, cohort: str, analysis: str) -> str:
        rows, scale = R.effect_rows(self.ctx.rows("effects", cohort, analysis))
        if not rows:
            return ""
        numeric = [k for k in rows[0] if k != "contrast"]
        return self.blocks(Block(tables=[records_table(
            rows, f"Contrasts, {scale} (95% CI), adjusted as in the legacy analysis",
            "Continuous forms evaluate each group contrast between the groups' medians. The "
            "last column shows how far the spline's effect varies inside a group that the "
            "legacy analysis treats as flat.", numeric)]))

    def kept_intervals(self, cohort: str, analysis: str) -> dict[str, str]:
        return {adj: summary.kept_interval(self.ctx.tables, cohort, analysis, adj)
                for adj in ("legacy", "continuous", "none")}

    def information(self, cohort: str, analysis: str) -> str:
        info = self.ctx.rows("information", cohort, analysis)
        if info.empty:
            return ""
        rows = R.information_rows(info, self.kept_intervals(cohort, analysis))
        note = ("FP: " + "; ".join(str(x) for x in info["fp_detail"].dropna().unique())
                if "fp_detail" in info else "")
        return self.blocks(Block(fold="Information by form and adjustment", tables=[
            records_table(rows, "Exposure LR χ² (df) by form and adjustment coding", note,
                          [k for k in rows[0] if k not in ("adjustment", "best by AIC")])]))

    def ranges(self, cohort: str, analysis: str) -> str:
        df = self.ctx.rows("ranges", cohort, analysis)
        if df.empty:
            return ""
        if "form" not in df:  # the question could not be answered: say why
            reasons = "; ".join(dict.fromkeys(str(v) for v in df.get("reason", []) if v))
            return self.blocks(Block("Range dependence", cautions=[
                f"Not estimated: {reasons or 'no rows to compare'}"]))
        scale = df["scale"].iloc[0]
        cols = [Col("trim", R.trim_text), Col("form", lambda r: labels.form(str(r["form"]))),
                Col("contrast", lambda r: str(r["contrast"])),
                Col("rows", lambda r: text.count(R.get(r, "n")), True),
                Col("events", lambda r: text.count(R.get(r, "events")), True),
                Col("effect (95% CI)", lambda r: summary.effect(
                    r["effect"], r["effect_lower"], r["effect_upper"], scale), True),
                Col("note", lambda r: str(R.get(r, "reason") or "")
                    + (" fixed value outside the trimmed range" if R.get(r, "extrapolated")
                       is True else ""))]
        return self.blocks(
            Block("Range dependence", figures=self.fig_views(cohort, analysis, "ranges")),
            Block(fold="All trimmed refits", tables=[
                table(df, cols, "Estimates after trimming the exposure range")]))

    def confounding(self, cohort: str, analysis: str) -> str:
        df = self.ctx.rows("confounding", cohort, analysis)
        if df.empty:
            return ""
        cols = [Col("exposure", lambda r: f"{labels.form(str(r['exposure_form']))}: "
                                          f"{r['contrast']}"),
                Col("grouped", lambda r: str(r["scope"]) if r["scope"] != "all"
                    else "all grouped confounders"),
                Col("scale", lambda r: f"{R.get(r, 'scale_kind') or ''} {r['scale']}".strip()),
                Col("rows", lambda r: text.count(R.get(r, "n")), True),
                Col("crude", lambda r: summary.effect(R.get(r, "effect_crude"), None, None,
                                                      r["scale"]), True),
                Col("grouped adjustment", lambda r: summary.effect(
                    R.get(r, "effect_grouped"), None, None, r["scale"]), True),
                Col("continuous adjustment", lambda r: summary.effect(
                    R.get(r, "effect_continuous"), None, None, r["scale"]), True),
                Col("share of confounding left",
                    lambda r: text.interval(R.get(r, "share_left"), R.get(r, "share_left_lower"),
                                            R.get(r, "share_left_upper"), "percent")
                    if R.get(r, "confounding_clear") is True else "not estimable", True),
                Col("bootstrap replicates refitted", lambda r: f"{text.count(R.get(r, 'bootstrap_ok'))} of "
                    f"{text.count(R.get(r, 'bootstrap'))}", True)]
        return self.blocks(
            Block("Residual confounding",
                  figures=self.fig_views(cohort, analysis, "confounding")),
            Block(fold="Confounding table", tables=[table(
                df, cols, "Exposure effect by adjustment coding: marginal = standardised (the "
                          "share to read), conditional = model scale")]))

    def cutpoints(self, cohort: str, analysis: str) -> str:
        df = self.ctx.rows("cutpoints", cohort, analysis)
        if df.empty or "row_type" not in df:
            return ""
        cuts, groups = df[df["row_type"] == "cut"], df[df["row_type"] == "group"]
        tables = []
        if len(cuts):
            tables.append(table(cuts, [
                Col("variable", lambda r: self.spec.label(str(r["variable"]))),
                Col("role", lambda r: str(r["role"])),
                Col("cut", lambda r: text.number(r["cut"], 4), True),
                Col("percentile", lambda r: text.number(r["percentile"]), True),
                Col("distance to the median", lambda r: text.number(r["distance_to_median"]),
                    True)], "Legacy cuts in the analysis sample"))
        if len(groups):
            tables.append(table(groups, [
                Col("variable", lambda r: self.spec.label(str(r["variable"]))),
                Col("group", lambda r: str(r["group"])),
                Col("rows", lambda r: R.suppressed(r, "n", self.spec.min_cell), True),
                Col("events", lambda r: R.suppressed(r, "events", self.spec.min_cell), True),
            ], "Legacy groups", f"Counts below {self.spec.min_cell} are suppressed."))
        figs = (self.fig_views(cohort, analysis, "cut-positions")
                + self.fig_views(cohort, analysis, "cut-profile"))
        return self.blocks(Block("Cut points", figures=figs, tables=tables))

    def replication(self, cohort: str, analysis: str) -> str:
        df = self.ctx.rows("replication", cohort, analysis)
        if df.empty:
            return ""
        scale = df["scale"].iloc[0]
        cols = [Col("contrast", lambda r: str(r["contrast"])),
                Col("published", lambda r: summary.effect(
                    r["reported_effect"], r["reported_lower"], r["reported_upper"], scale), True),
                Col("refit on this extract", lambda r: summary.effect(
                    r["refit_effect"], r["refit_lower"], r["refit_upper"], scale), True),
                Col("rows", lambda r: text.count(R.get(r, "n")), True),
                Col("events", lambda r: text.count(R.get(r, "events")), True),
                Col("verdict", lambda r: str(r["verdict"])),
                Col("note", lambda r: str(R.get(r, "message") or ""))]
        return self.blocks(Block("Replication of the published estimate", tables=[
            table(df, cols, f"Published legacy estimate beside its refit ({scale})")]))

    def decisions(self, cohort: str, analysis: str) -> str:
        th = self.ctx.rows("thresholds", cohort, analysis)
        nb = self.ctx.rows("net_benefit", cohort, analysis)
        th_ok = th[th["status"] == "ok"] if len(th) else th
        nb_ok = nb[nb["status"] == "ok"] if len(nb) else nb
        if th_ok.empty and nb_ok.empty:
            return ""
        figs = (self.fig_views(cohort, analysis, "thresholds")
                + self.fig_views(cohort, analysis, "decision-curves")
                + self.fig_views(cohort, analysis, "calibration"))
        out = [Block("Decisions on predicted risk", figures=figs)]
        if len(th_ok):
            cross = th_ok[th_ok["position"] == "crossing"]
            out.append(Block(fold="Implied thresholds", tables=[table(cross, [
                Col("model", lambda r: labels.form(str(r["model"]))),
                Col("level", lambda r: str(R.get(r, "level") or text.DASH)),
                Col("risk threshold", lambda r: summary.threshold_value(
                    r["threshold"], R.get(r, "risk_scale")), True),
                Col("rest of risk at", lambda r: text.percent(r["profile_quantile"]), True),
                Col("crossing", lambda r: text.count(R.get(r, "crossing")), True),
                Col("exposure value", lambda r: text.number(r["exposure_value"], 4), True),
                Col("direction", lambda r: str(R.get(r, "direction"))),
                Col("nearest legacy cut", lambda r: text.number(R.get(r, "nearest_cut"), 4),
                    True),
            ], "Exposure values at which predicted risk crosses each threshold")]))
        if len(nb_ok):
            out.append(self.net_benefit_block(nb_ok))
        boot = R.decision_resampling_rows(self.ctx.rows("decision_resampling", cohort, analysis))
        if boot:
            out.append(Block(fold="Bootstrap intervals and optimism", tables=[records_table(
                boot, "Decision numbers: bootstrap percentile intervals and Harrell's optimism "
                "correction (corrected = apparent − optimism)", CAUTION)]))
        return self.blocks(*out)

    def net_benefit_block(self, nb_ok: pd.DataFrame) -> Block:
        at = nb_ok[nb_ok["threshold"].round(6).isin([round(t, 6) for t in
                                                     self.spec.risk_thresholds])]
        if at.empty:
            return Block()
        wide = at.pivot_table(index="rule", columns="threshold", values="net_benefit",
                              sort=False).reset_index()
        thresholds = list(wide.columns[1:])
        rows = []
        for r in wide.to_dict("records"):
            values = text.aligned([r[t] for t in thresholds])
            rows.append({"rule": str(r["rule"]), **{f"net benefit at {text.percent(t)}": v
                                                   for t, v in zip(thresholds, values,
                                                                   strict=True)}})
        note = (str(nb_ok["note"].iloc[0]) if "note" in nb_ok and nb_ok["note"].iloc[0]
                else "")
        return Block(tables=[records_table(
            rows, "Net benefit per patient at the study's risk thresholds", note,
            [k for k in rows[0] if k != "rule"])])

    def others(self, cohort: str, analysis: str) -> str:
        tables: list[TableView] = []
        for name in sorted(self.ctx.tables):
            if name in KNOWN_TABLES:
                continue
            df = self.ctx.rows(name, cohort, analysis)
            if len(df) and "analysis" in self.ctx.tables[name]:
                shown, note = R.generic_rows(df, name)
                tables.append(plain_table(shown, labels.column(name).capitalize(), note=note))
        return self.blocks(Block(fold="Other tables", tables=tables))

    def fits_and_sample(self, cohort: str, analysis: str) -> str:
        fits = self.ctx.rows("fits", cohort, analysis)
        samples = self.ctx.rows("samples", cohort, analysis)
        out = []
        if len(samples):
            out.append(Block(tables=[table(samples, [
                Col("step", lambda r: str(r["step"])),
                Col("rows", lambda r: text.count(r["rows"]), True)],
                "How the analysis sample was built")]))
        if len(fits):
            cols = [Col("form", lambda r: labels.form(str(r["form"]))),
                    Col("model", lambda r: str(r["detail"])),
                    Col("adjustment", lambda r: labels.code("adjustment", r["adjustment"])),
                    Col("selected", lambda r: "yes" if r["selected"] is True else ""),
                    Col("rows", lambda r: text.count(R.get(r, "n")), True),
                    Col("events", lambda r: text.count(R.get(r, "events")), True),
                    Col("parameters", lambda r: text.count(R.get(r, "n_params")), True),
                    Col("log-likelihood", lambda r: text.number(R.get(r, "loglik"), 6), True),
                    Col("AIC", lambda r: text.number(R.get(r, "aic"), 6), True),
                    Col("status", lambda r: str(R.get(r, "status")))]
            out.append(Block(fold="Every fitted model", tables=[
                table(fits, cols, "Fitted models")]))
        return self.blocks(*out)

    # ---- pooled
    def pooled(self) -> str:
        pe = self.ctx.table("pooled_effects")
        if not any(f.kind == "pooled-curves" for f in self.figures) and pe.empty:
            return ""
        self.has_pooled = True
        blocks = []
        for a in self.spec.analyses:
            rows = R.pooled_rows(R.pooled_selection(pe, a.name))
            scale = (pe.loc[pe["analysis"] == a.name, "scale"].iloc[0]
                     if len(pe) and (pe["analysis"] == a.name).any() else "")
            tables = ([records_table(rows, f"{a.name}: pooled group contrasts ({scale}, 95% CI)",
                                     numeric=[k for k in rows[0] if k not in ("form",
                                                                             "contrast")])]
                      if rows else [])
            blocks.append(Block(a.name, figures=self.fig_views(None, a.name, "pooled-curves"),
                                tables=tables))
            het = R.heterogeneity_rows(self.ctx.rows("heterogeneity", None, a.name))
            if het:
                blocks.append(Block(fold="Heterogeneity between cohorts", tables=[
                    records_table(het, f"{a.name}: heterogeneity (Q, I², τ²)")]))
            pub = R.published_fit_rows(self.ctx.rows("published_fits", None, a.name))
            if pub:
                blocks.append(Block(
                    f"{a.name}: published grouped tables",
                    figures=self.fig_views(None, a.name, "published-tables"),
                    tables=[records_table(pub, f"{a.name}: published-only studies beside the "
                                               "data cohorts (GLS trends on the common knots)",
                                          numeric=["per unit", "nonlinear, p",
                                                   "goodness of fit, p", "I²",
                                                   "shift without published"])]))
        harm = self.ctx.table("harmonisation")
        if len(harm):
            blocks.append(Block(fold="Where each cohort's legacy cuts sit", tables=[
                plain_table(harm, "Cut percentiles by cohort and analysis", limit=200,
                            keep_keys=True)]))
        return str(render("pooled.html.j2", blocks=blocks))

    # ---- missing values
    def missing(self) -> str:
        """Which rows the complete-case step dropped and what they were like, and each imputed
        analysis beside its complete-case twin."""
        cohorts = [c.name for c in self.spec.cohorts]
        twins = M.imputation_twins(self.spec.raw.get("analyses", []))
        effects, status = self.ctx.table("effects"), self.ctx.table("status")
        tables = []
        for a in self.spec.analyses:
            cols = M.column_rows(self.ctx.table("missingness"), a.name, self.spec.label,
                                 self.spec.min_cell)
            if cols:
                tables.append(records_table(
                    cols, f"{a.name}: share missing and the largest differences, complete "
                    "vs dropped rows",
                    numeric=["rows", "missing", "share missing", "standardised difference"]))
        blocks = [Block(notes=[MISSING_NOTE], tables=tables)] if tables else []
        for complete, imputed in twins:
            rows = M.twin_rows(effects, cohorts, complete, imputed) if len(effects) else []
            if not rows:
                continue
            blocks.append(Block(
                f"{imputed} beside {complete}",
                notes=[M.twin_reading(effects, status, c, complete, imputed) for c in cohorts
                       if len(M.paired(effects, c, complete, imputed))],
                tables=[records_table(
                    rows, "Complete cases and multiple imputation, side by side (adjusted as in "
                    "the legacy analysis, 95% CI)",
                    "Shift: |imputed − complete-case| on the model scale (log for ratios) over "
                    "the complete-case interval's half-width. Quartiles: 75th vs 25th "
                    "percentile, a summary of each continuous curve.",
                    ["complete cases", "imputed", "shift (share of the half-interval)"])]))
        if not blocks:
            return ""
        self.has_missing = True
        return str(render("missing.html.j2", blocks=blocks))

    # ---- cautions
    def caution_items(self, cohort: str, analysis: str) -> list[str]:
        who = self.heading(cohort, analysis)
        st = self.status_row(cohort, analysis)
        if st is None:
            return [f"{who}: no results."]
        items = []
        if st["status"] != "ok" or R.get(st, "message"):
            items.append(f"{who} ({st['status']}): {R.get(st, 'message') or 'see the log'}")
        rep = self.ctx.rows("replication", cohort, analysis)
        for r in rep.to_dict("records"):
            if bool(r["disagrees"]) or r["verdict"] != "agrees":
                items.append(f"{who}: the published {r['contrast']} "
                             f"({text.ratio(r['reported_effect'])}) and its refit "
                             f"({text.ratio(r['refit_effect'])}): {r['verdict']}. "
                             f"{r.get('message') or ''}".strip())
        con = self.ctx.rows("confounding", cohort, analysis)
        if len(con) and "message" in con:
            items += [f"{who}, residual confounding: {m}." for m in
                      con["message"].dropna().unique() if m]
        rng = self.ctx.rows("ranges", cohort, analysis)
        if len(rng) and "status" in rng:
            skipped = rng[rng["status"] == "skipped"]
            if len(skipped):
                reasons = "; ".join(str(x) for x in skipped["reason"].dropna().unique())
                items.append(f"{who}, range dependence: {len(skipped)} legacy refit(s) "
                             f"skipped ({reasons}).")
        cut = self.ctx.rows("cutpoints", cohort, analysis)
        if len(cut) and "row_type" in cut:
            for r in cut[cut["row_type"] == "search"].to_dict("records"):
                items.append(f"{who}: the legacy cut of {self.spec.label(r['variable'])} was "
                             f"chosen from the data; its naive p-value "
                             f"({text.pvalue(r['p_naive'])}) overstates the evidence "
                             f"(corrected {text.pvalue(r['p_lausen'])}).")
        return items + self.caution_counts(cohort, analysis, who)

    def caution_counts(self, cohort: str, analysis: str, who: str) -> list[str]:
        items = []
        den = self.ctx.rows("density", cohort, analysis)
        if len(den) and den["suppressed"].fillna(False).astype(bool).any():
            items.append(f"{who}: {int(den['suppressed'].fillna(False).sum())} bin(s) of the "
                         f"exposure's distribution hold fewer than {self.spec.min_cell} rows "
                         "and are not shown.")
        fits = self.ctx.rows("fits", cohort, analysis)
        if len(fits) and "warnings" in fits:
            warned = fits[fits["warnings"].fillna("").astype(str).str.len() > 2]
            if len(warned):
                items.append(f"{who}: {len(warned)} fitted model(s) reported warnings "
                             "(see every fitted model).")
        return items

    def cautions(self) -> str:
        items = [x for c, a in self.ctx.jobs() for x in self.caution_items(c, a)]
        return str(render("cautions.html.j2", caution=CAUTION, items=items))

    # ---- page
    def nav(self) -> list[tuple[str, str]]:
        items = [("summary", "Study summary")]
        if self.has_pooled:
            items.append(("pooled", "Pooled across cohorts"))
        if self.has_missing:
            items.append(("missing", "Missing values"))
        items += [(slug("a", c, a), self.heading(c, a)) for c, a in self.ctx.jobs()]
        return items + [("cautions", "Cautions"), ("provenance", "Provenance")]

    def page(self) -> str:
        from .page import assemble

        return assemble(self)

