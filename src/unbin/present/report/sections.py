"""The HTML report of a finished run: one self-contained file (``<out>/report.html``) with a study
summary, one section per (cohort, analysis) with its figures and tables, the cautions, and a
provenance appendix. It reads only the study-level tables (``<out>/tables/*.parquet``) and the
spec, draws the figures into ``<out>/figures/`` and inlines them (SVG as data URIs), so the file
opens anywhere without network access; a Content-Security-Policy forbids every fetch.

No timestamps and no machine paths beyond the spec's own: the same tables and spec give the same
bytes.
"""

from __future__ import annotations

import html
import logging
import math
import re
import shutil
import traceback
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from functools import partial
from importlib import metadata
from pathlib import Path
from typing import Any

import pandas as pd
import yaml

from ... import __version__
from ...data import file_sha256
from ...errors import UnbinError
from ...results.tables import read_provenance
from ...spec import Spec, digest, load_spec
from ..figures import Context, FigureFile, draw_figures, finite, group_dir, load_tables, read_index

log = logging.getLogger(__name__)

REPORT_NAME = "report.html"
FIGURES_DIR = "figures"
CAUTION = ("unbin supports statistical re-analysis. Decisions about the care of patients follow "
           "local clinical guidelines and licensed practice, not these tables or figures.")
# Tables this report lays out itself; any other study-level table with rows for an analysis is
# shown as a plain table in that analysis' section (so new questions appear without code here).
KNOWN_TABLES = frozenset({"fits", "information", "effects", "curves", "density", "samples",
                          "status", "ranges", "confounding", "cutpoints", "replication",
                          "thresholds", "net_benefit", "pooled_curves", "pooled_effects",
                          "heterogeneity", "harmonisation", "coefficients",
                          "common_contrasts"})
FAMILY_TEXT = {"binary": "binary outcome (logistic model)",
               "continuous": "continuous outcome (linear model)",
               "count": "count outcome (Poisson model with person-time)",
               "survival": "time-to-event outcome (Cox model)"}
FORM_TEXT = {"legacy": "legacy groups", "linear": "linear", "spline": "spline",
             "fp": "fractional polynomial", "legacy+spline": "groups + spline"}


@dataclass(frozen=True)
class Report:
    path: Path
    figures: list[FigureFile]


# --------------------------------------------------------------------------- formatting


def esc(v: Any) -> str:
    return html.escape(str(v), quote=True)


def num(v: Any, digits: int = 3) -> str:
    if not finite(v):
        return "–"
    f = float(v)
    if f != 0 and (abs(f) >= 1e5 or abs(f) < 1e-3):
        return f"{f:.{digits}g}"
    return f"{f:.{digits}g}" if abs(f) < 1 else f"{f:,.{max(digits - 1 - int(math.log10(abs(f))), 0)}f}"


def pval(v: Any) -> str:
    if not finite(v):
        return "–"
    f = float(v)
    return "<0.001" if f < 0.001 else f"{f:.3f}"


def pct(v: Any) -> str:
    return f"{float(v):.0%}" if finite(v) else "–"


def interval(e: Any, lo: Any, hi: Any, digits: int = 3) -> str:
    if not finite(e):
        return "–"
    if finite(lo) and finite(hi) and float(hi) > float(lo):
        return f"{num(e, digits)} ({num(lo, digits)} to {num(hi, digits)})"
    return num(e, digits)


def slug(*parts: str | None) -> str:
    return "-".join(re.sub(r"[^A-Za-z0-9_-]+", "-", p) for p in parts if p)


@dataclass(frozen=True)
class Col:
    header: str
    value: Callable[[pd.Series], str]
    numeric: bool = False


def table(rows: pd.DataFrame | Iterable[pd.Series], cols: Sequence[Col], caption: str,
          note: str = "") -> str:
    """A real HTML table: caption, header cells with scope, numbers right-aligned."""
    frame = rows if isinstance(rows, pd.DataFrame) else pd.DataFrame(list(rows))
    head = "".join(f'<th scope="col"{" class=num" if c.numeric else ""}>{esc(c.header)}</th>'
                   for c in cols)
    body = []
    for _, r in frame.iterrows():
        cells = "".join(f'<td{" class=num" if c.numeric else ""}>{esc(c.value(r))}</td>'
                        for c in cols)
        body.append(f"<tr>{cells}</tr>")
    foot = f'<p class="note">{esc(note)}</p>' if note else ""
    return (f'<div class="scroll"><table><caption>{esc(caption)}</caption><thead><tr>{head}'
            f'</tr></thead><tbody>{"".join(body)}</tbody></table></div>{foot}')


def plain_table(df: pd.DataFrame, caption: str, limit: int = 60) -> str:
    """Any table as it is (for tables this report does not know): every column but the keys."""
    df = df.drop(columns=[c for c in ("cohort", "analysis") if c in df])
    shown = df.head(limit)
    cols = [Col(str(c), _getter(c, _cell),
                pd.api.types.is_numeric_dtype(df[c]) and not pd.api.types.is_bool_dtype(df[c]))
            for c in df.columns]
    note = f"First {limit} of {len(df)} rows." if len(df) > limit else ""
    return table(shown, cols, caption, note)


def _getter(key: Any, fmt: Callable[[Any], str]) -> Callable[[pd.Series], str]:
    def value(r: pd.Series) -> str:
        return fmt(r[key])
    return value


def _cell(v: Any) -> str:
    if v is None or v is pd.NA or (isinstance(v, float) and math.isnan(v)):
        return "–"
    if isinstance(v, float):
        return num(v, 4)
    return str(v)


def get(r: pd.Series, key: str) -> Any:
    return r[key] if key in r.index else None


# --------------------------------------------------------------------------- figures


_URI_ESCAPES = {c: f"%{ord(c):02X}" for c in '%"#<>&\n\r\t'}


def svg_data_uri(svg: bytes) -> str:
    """The SVG as a UTF-8 data URI with only the characters that would end the attribute or
    the URI escaped: about a tenth larger than the file, where base64 is a third larger."""
    text = svg.decode("utf-8")
    return "data:image/svg+xml;charset=utf-8," + "".join(_URI_ESCAPES.get(c, c) for c in text)


def figure_html(f: FigureFile) -> str:
    if f.svg is None:
        return (f'<figure id="{slug("fig", f.cohort, f.analysis, f.kind)}" class="not-drawn">'
                f"<p><b>Figure not drawn.</b> {esc(f.problem)}</p></figure>")
    svg = f.svg.read_bytes()
    m = re.search(rb'<svg[^>]*\swidth="([\d.]+)pt"[^>]*\sheight="([\d.]+)pt"', svg)
    size = ""
    if m:
        w, h = (round(float(v) * 4 / 3) for v in m.groups())
        size = f' width="{w}" height="{h}"'
    data = svg_data_uri(svg)
    return (f'<figure id="{slug("fig", f.cohort, f.analysis, f.kind)}"><img '
            f'src="{data}"{size} alt="{esc(f.alt)}">'
            f'<figcaption><b>{esc(f.title)}.</b> {esc(f.caption)}</figcaption></figure>')


# --------------------------------------------------------------------------- sections


class Builder:
    def __init__(self, ctx: Context, figures: list[FigureFile], out: Path) -> None:
        self.ctx = ctx
        self.spec = ctx.spec
        self.figures = figures
        self.out = out
        self.many = len(self.spec.cohorts) > 1
        self._sections: set[str] = set()

    # ---- helpers
    def guarded(self, what: str, build: Callable[[], str]) -> str:
        """A section of the page, or a note in its place saying why it could not be written
        (the rest of the report is still written)."""
        try:
            return build()
        except Exception as exc:
            log.warning("the report's %s could not be written (%s: %s)", what,
                        type(exc).__name__, exc)
            log.debug("%s", traceback.format_exc())
            return (f'<div class="not-drawn"><p><b>{esc(what)}</b>: this part could not '
                    f"be written ({esc(type(exc).__name__)}: {esc(str(exc))}); the numbers are "
                    "in the tables under <code>tables/</code>. Please report this.</p></div>")

    def figs(self, cohort: str | None, analysis: str | None, kind: str) -> str:
        return "".join(figure_html(f) for f in self.figures
                       if f.cohort == cohort and f.analysis == analysis and f.kind == kind)

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
        status = self.ctx.table("status")
        rows = []
        for cohort, analysis in self.ctx.jobs():
            st = self.status_row(cohort, analysis)
            info = self.info_row(cohort, analysis)
            a = self.spec.analysis(analysis)
            rows.append({
                "key": (cohort, analysis), "cohort": cohort, "analysis": analysis,
                "outcome": a.family, "exposure": self.spec.label(a.exposure),
                "status": get(st, "status") if st is not None else "missing",
                "n_used": get(st, "n_used") if st is not None else None,
                "n_input": get(st, "n_input") if st is not None else None,
                **({k: get(info, k) for k in ("info_kept", "added_p", "nonlinearity_p",
                                                "best_form", "delta_c", "lr_legacy",
                                                "lr_spline")} if info is not None else {}),
            })
        frame = pd.DataFrame(rows)
        cols = [Col("analysis", lambda r: str(r["analysis"]))]
        if self.many:
            cols.append(Col("cohort", lambda r: str(r["cohort"])))
        cols += [
            Col("outcome", lambda r: str(r["outcome"])),
            Col("exposure", lambda r: str(r["exposure"])),
            Col("rows used / in extract", lambda r: f"{_int(r.get('n_used'))} / "
                f"{_int(r.get('n_input'))}", True),
            Col("status", lambda r: str(r["status"])),
            Col("kept", lambda r: pct(r.get("info_kept")), True),
            Col("spline adds, p", lambda r: pval(r.get("added_p")), True),
            Col("nonlinear, p", lambda r: pval(r.get("nonlinearity_p")), True),
            Col("best by AIC", lambda r: FORM_TEXT.get(str(r.get("best_form")),
                                                            _cell(r.get("best_form")))),
        ]
        parts = [
            '<section id="summary"><h2>Study summary</h2>',
            f"<p>{esc(self.lede(status))}</p>",
            table(frame, cols, "Every analysis at a glance (adjusted as in the legacy analysis)",
                  "Kept = LR χ²(legacy groups) / LR χ²(groups + spline): 100% means "
                  "the grouping lost nothing. The p-values test whether a spline adds to the "
                  "groups and whether the exposure's effect departs from a straight line."),
            self.figs(None, None, "information"),
        ]
        lines = self.question_lines()
        if lines:
            parts.append("<h3>Across the questions</h3><ul class=lines>"
                         + "".join(f"<li>{esc(x)}</li>" for x in lines) + "</ul>")
        parts.append("</section>")
        return "".join(parts)

    def lede(self, status: pd.DataFrame) -> str:
        n_a, n_c = len(self.spec.analyses), len(self.spec.cohorts)
        counts = status["status"].value_counts().to_dict() if len(status) else {}
        state = ", ".join(f"{v} {k}" for k, v in sorted(counts.items()))
        return (f"{n_a} legacy grouped analys{'is' if n_a == 1 else 'es'} of "
                f"{n_c} cohort{'' if n_c == 1 else 's'} refitted with the exposure on its "
                f"continuous scale (restricted cubic spline, fractional polynomial, linear) beside "
                f"the legacy groups, on the same sample. Status: {state or 'no results'}.")

    def question_lines(self) -> list[str]:
        """The one-line summaries the question modules write for the terminal, when their
        tables exist."""
        import importlib

        lines: list[str] = []
        for name in ("ranges", "confounding", "cutpoints", "replication"):
            df = self.ctx.table(name)
            if df.empty:
                continue
            mod = importlib.import_module(f"unbin.questions.{name}")
            fn = getattr(mod, "summary_line", None)
            if fn is not None:
                lines.append(str(fn(df)))
        th, nb = self.ctx.table("thresholds"), self.ctx.table("net_benefit")
        if len(th) or len(nb):
            mod = importlib.import_module("unbin.questions.decisions")
            fn2 = getattr(mod, "summary_lines", None)
            if fn2 is not None:
                lines += [str(x) for x in fn2(th, nb)]
        return lines

    # ---- one analysis
    def analysis(self, cohort: str, analysis: str) -> str:
        a = self.spec.analysis(analysis)
        st = self.status_row(cohort, analysis)
        state = str(get(st, "status")) if st is not None else "missing"
        g = self.spec.groupings.get(a.exposure)
        grouping = ""
        if g is not None:
            if g.cuts:
                grouping = "cuts at " + ", ".join(f"{c:g}" for c in g.cuts)
            elif g.quantiles:
                grouping = f"{g.quantiles} equal-frequency groups"
            if g.labels:
                grouping += f" ({', '.join(g.labels)}; reference {g.reference})"
            if g.derived_from_data:
                grouping += ", chosen from the data"
        meta = [f"{FAMILY_TEXT.get(a.family, a.family)}: {self._outcome(analysis)}",
                f"exposure {self.spec.label(a.exposure)}",
                f"legacy grouping {grouping}" if grouping else "",
                f"adjusted for {', '.join(a.adjust)}" if a.adjust else "no adjustment",
                f"by {a.by}" if a.by else "",
                f"strata {', '.join(a.strata)}" if a.strata else ""]
        sid = slug("a", cohort, analysis)
        parts = [f'<section class="analysis" id="{sid}"><h2>{esc(self.heading(cohort, analysis))}'
                 f' <span class="badge {esc(state)}">{esc(state)}</span></h2>',
                 f'<p class="meta">{esc(" · ".join(m for m in meta if m))}</p>']
        if state not in ("ok", "missing") and st is not None and get(st, "message"):
            parts.append(f'<p class="caution">{esc(get(st, "message"))}</p>')
        pieces: list[tuple[str, Callable[[str, str], str]]] = [
            ("key numbers", self.cards), ("curves", self.curves_figure),
            ("curves by level", self.level_curves_figure),
            ("effects", self.effects), ("information", self.information),
            ("range dependence", self.ranges), ("residual confounding", self.confounding),
            ("cut points", self.cutpoints), ("replication", self.replication),
            ("decisions", self.decisions), ("other figures", self.others),
            ("fits and sample", self.fits_and_sample)]
        parts += [self.guarded(what, partial(build, cohort, analysis))
                  for what, build in pieces]
        parts.append("</section>")
        return "".join(parts)

    def curves_figure(self, cohort: str, analysis: str) -> str:
        return self.figs(cohort, analysis, "curves")

    def level_curves_figure(self, cohort: str, analysis: str) -> str:
        return self.figs(cohort, analysis, "level-curves")

    def _outcome(self, analysis: str) -> str:
        o = self.spec.analysis(analysis).outcome
        names = [o.event, o.value, o.count, o.time]
        text = ", ".join(self.spec.label(n) for n in names if n)
        if o.horizon:
            text += f" (horizon {o.horizon:g})"
        return text

    def cards(self, cohort: str, analysis: str) -> str:
        info = self.info_row(cohort, analysis)
        if info is None:
            return ""
        cards = [
            ("information kept by the legacy groups", pct(get(info, "info_kept")),
             f"LR χ² {num(get(info, 'lr_legacy'))} of {num(get(info, 'lr_legacy_plus_spline'))}"),
            ("a spline adds to the groups", "p " + pval(get(info, "added_p")),
             f"LR χ² {num(get(info, 'added_lr'))} on {_int(get(info, 'added_df'))} df"),
            ("departure from a straight line", "p " + pval(get(info, "nonlinearity_p")),
             f"spline vs linear, {_int(get(info, 'nonlinearity_df'))} df"),
            ("best form by AIC", FORM_TEXT.get(str(get(info, "best_form")), "–"),
             f"ΔC (spline − groups) {num(get(info, 'delta_c'))}"
             if finite(get(info, "delta_c")) else "discrimination not defined"),
        ]
        return ('<div class="cards">' + "".join(
            f'<div class="card"><span class="label">{esc(lab)}</span><span class="value">'
            f'{esc(val)}</span><span class="sub">{esc(sub)}</span></div>'
            for lab, val, sub in cards) + "</div>")

    def effects(self, cohort: str, analysis: str) -> str:
        eff = self.ctx.rows("effects", cohort, analysis)
        if "by_level" in eff:  # per-level contrasts: in the table's parquet, not in this summary
            eff = eff[eff["by_level"].fillna("") == ""]
        if eff.empty:
            return ""
        eff = eff[eff["adjustment"] == "legacy"] if (eff["adjustment"] == "legacy").any() else eff
        scale = str(eff["scale"].iloc[0])
        forms = [f for f in ("legacy", "spline", "fp", "linear") if (eff["form"] == f).any()]
        keys = list(dict.fromkeys(zip(eff["contrast_type"], eff["contrast"], strict=True)))
        rows = []
        for ctype, contrast in keys:
            sub = eff[(eff["contrast_type"] == ctype) & (eff["contrast"] == contrast)]
            row: dict[str, Any] = {"contrast": contrast}
            for f in forms:
                r = sub[sub["form"] == f]
                row[f] = (interval(r["effect"].iloc[0], r["effect_lower"].iloc[0],
                                   r["effect_upper"].iloc[0])
                          if len(r) and (f != "legacy" or ctype == "group") else "–")
            sp = sub[sub["form"] == "spline"]
            row["within"] = (f"{num(sp['within_p10'].iloc[0])} to {num(sp['within_p90'].iloc[0])}"
                             if len(sp) and finite(sp["within_p10"].iloc[0]) else "–")
            rows.append(row)
        cols = [Col("contrast", lambda r: str(r["contrast"]))]
        cols += [Col(FORM_TEXT[f], _getter(f, str), True) for f in forms]
        cols.append(Col("spline within the group (p10 to p90)",
                        lambda r: str(r["within"]), True))
        return table(pd.DataFrame(rows), cols,
                     f"Contrasts, {scale} (95% CI), adjusted as in the legacy analysis",
                     "Continuous forms evaluate each group contrast between the groups' medians. "
                     "The last column shows how far the spline's effect varies inside a group "
                     "that the legacy analysis treats as flat.")

    def information(self, cohort: str, analysis: str) -> str:
        info = self.ctx.rows("information", cohort, analysis)
        if info.empty:
            return ""

        def lr(form: str) -> Callable[[pd.Series], str]:
            def f(r: pd.Series) -> str:
                v, df = get(r, f"lr_{form}"), get(r, f"df_{form}")
                return "–" if not finite(v) else (f"{num(v)} ({_int(df)})" if finite(df)
                                                  else num(v))
            return f

        cols = [Col("adjustment", lambda r: str(r["adjustment"])),
                Col("groups", lr("legacy"), True), Col("linear", lr("linear"), True),
                Col("spline", lr("spline"), True), Col("FP", lr("fp"), True),
                Col("groups + spline", lr("legacy_plus_spline"), True),
                Col("kept", lambda r: pct(get(r, "info_kept")), True),
                Col("spline adds, p", lambda r: pval(get(r, "added_p")), True),
                Col("nonlinear, p", lambda r: pval(get(r, "nonlinearity_p")), True),
                Col("C groups", lambda r: num(get(r, "c_legacy")), True),
                Col("C spline", lambda r: num(get(r, "c_spline")), True),
                Col("best by AIC", lambda r: FORM_TEXT.get(str(get(r, "best_form")), "–"))]
        return ("<details><summary>Information by form and adjustment</summary>"
                + table(info, cols, "Exposure LR χ² (df) by form and adjustment coding",
                        "FP: " + "; ".join(str(x) for x in info["fp_detail"].dropna().unique())
                        if "fp_detail" in info else "")
                + "</details>")

    def ranges(self, cohort: str, analysis: str) -> str:
        df = self.ctx.rows("ranges", cohort, analysis)
        if df.empty:
            return ""
        if "form" not in df:  # the question could not be answered: say why
            reasons = "; ".join(dict.fromkeys(str(v) for v in df.get("reason", []) if v))
            return ('<h3>Range dependence</h3><p class="caution">Not estimated: '
                    f"{esc(reasons or 'no rows to compare')}</p>")
        cols = [Col("trim", lambda r: _trim(r)), Col("form", lambda r: str(r["form"])),
                Col("contrast", lambda r: str(r["contrast"])),
                Col("rows", lambda r: _int(get(r, "n")), True),
                Col("effect (95% CI)", lambda r: interval(r["effect"], r["effect_lower"],
                                                           r["effect_upper"]), True),
                Col("note", lambda r: str(get(r, "reason") or "")
                    + (" fixed value outside the trimmed range" if get(r, "extrapolated") is True
                       else ""))]
        return ('<h3>Range dependence</h3>' + self.figs(cohort, analysis, "ranges")
                + "<details><summary>All trimmed refits</summary>"
                + table(df, cols, "Estimates after trimming the exposure range") + "</details>")

    def confounding(self, cohort: str, analysis: str) -> str:
        df = self.ctx.rows("confounding", cohort, analysis)
        if df.empty:
            return ""
        cols = [Col("exposure", lambda r: f"{r['exposure_form']}: {r['contrast']}"),
                Col("grouped", lambda r: str(r["scope"]) if r["scope"] != "all"
                    else "all grouped confounders"),
                Col("scale", lambda r: f"{get(r, 'scale_kind') or ''} {r['scale']}".strip()),
                Col("crude", lambda r: num(get(r, "effect_crude")), True),
                Col("grouped adjustment", lambda r: num(get(r, "effect_grouped")), True),
                Col("continuous adjustment", lambda r: num(get(r, "effect_continuous")), True),
                Col("share of confounding left",
                    lambda r: interval(get(r, "share_left"), get(r, "share_left_lower"),
                                       get(r, "share_left_upper"), 2)
                    if get(r, "confounding_clear") is True else "not estimable", True),
                Col("bootstrap fits", lambda r: f"{_int(get(r, 'bootstrap_ok'))} of "
                    f"{_int(get(r, 'bootstrap'))}", True)]
        return ('<h3>Residual confounding</h3>' + self.figs(cohort, analysis, "confounding")
                + "<details><summary>Confounding table</summary>"
                + table(df, cols, "Exposure effect by adjustment coding: marginal = "
                        "standardised (the share to read), conditional = model scale")
                + "</details>")

    def cutpoints(self, cohort: str, analysis: str) -> str:
        df = self.ctx.rows("cutpoints", cohort, analysis)
        if df.empty or "row_type" not in df:
            return ""
        cuts = df[df["row_type"] == "cut"]
        groups = df[df["row_type"] == "group"]
        parts = ['<h3>Cut points</h3>', self.figs(cohort, analysis, "cut-positions"),
                 self.figs(cohort, analysis, "cut-profile")]
        if len(cuts):
            parts.append(table(cuts, [
                Col("variable", lambda r: self.spec.label(str(r["variable"]))),
                Col("role", lambda r: str(r["role"])),
                Col("cut", lambda r: num(r["cut"], 4), True),
                Col("percentile", lambda r: num(r["percentile"], 3), True),
                Col("distance to the median", lambda r: num(r["distance_to_median"], 3), True),
            ], "Legacy cuts in the analysis sample"))
        if len(groups):
            parts.append(table(groups, [
                Col("variable", lambda r: self.spec.label(str(r["variable"]))),
                Col("group", lambda r: str(r["group"])),
                Col("rows", lambda r: _suppressed(r, "n", self.spec.min_cell), True),
                Col("events", lambda r: _suppressed(r, "events", self.spec.min_cell), True),
            ], "Legacy groups", f"Counts below {self.spec.min_cell} are suppressed."))
        return "".join(parts)

    def replication(self, cohort: str, analysis: str) -> str:
        df = self.ctx.rows("replication", cohort, analysis)
        if df.empty:
            return ""
        cols = [Col("contrast", lambda r: str(r["contrast"])),
                Col("published", lambda r: interval(r["reported_effect"], r["reported_lower"],
                                                    r["reported_upper"]), True),
                Col("refit on this extract", lambda r: interval(r["refit_effect"],
                                                                r["refit_lower"],
                                                                r["refit_upper"]), True),
                Col("verdict", lambda r: str(r["verdict"])),
                Col("note", lambda r: str(get(r, "message") or ""))]
        return ("<h3>Replication of the published estimate</h3>"
                + table(df, cols, f"Published legacy estimate beside its refit "
                                  f"({df['scale'].iloc[0]})"))

    def decisions(self, cohort: str, analysis: str) -> str:
        th = self.ctx.rows("thresholds", cohort, analysis)
        nb = self.ctx.rows("net_benefit", cohort, analysis)
        th_ok = th[th["status"] == "ok"] if len(th) else th
        nb_ok = nb[nb["status"] == "ok"] if len(nb) else nb
        if th_ok.empty and nb_ok.empty:
            return ""
        parts = ["<h3>Decisions on predicted risk</h3>",
                 self.figs(cohort, analysis, "thresholds"),
                 self.figs(cohort, analysis, "decision-curves")]
        if len(th_ok):
            cross = th_ok[th_ok["position"] == "crossing"]
            parts.append("<details><summary>Implied thresholds</summary>" + table(cross, [
                Col("model", lambda r: str(r["model"])),
                Col("level", lambda r: _cell(get(r, "level"))),
                Col("risk threshold", lambda r: num(r["threshold"]), True),
                Col("rest of risk at", lambda r: f"{float(r['profile_quantile']):.0%}", True),
                Col("crossing", lambda r: _int(get(r, "crossing")), True),
                Col("exposure value", lambda r: num(r["exposure_value"], 4), True),
                Col("direction", lambda r: str(get(r, "direction"))),
                Col("nearest legacy cut", lambda r: num(get(r, "nearest_cut"), 4), True),
            ], "Exposure values at which predicted risk crosses each threshold") + "</details>")
        if len(nb_ok):
            at = nb_ok[nb_ok["threshold"].round(6).isin([round(t, 6) for t in
                                                         self.spec.risk_thresholds])]
            if len(at):
                wide = at.pivot_table(index="rule", columns="threshold", values="net_benefit",
                                      sort=False)
                wide = wide.reset_index()
                cols = [Col("rule", lambda r: str(r["rule"]))] + [
                    Col(f"net benefit at {float(t):.0%}", _getter(t, num), True)
                    for t in wide.columns[1:]]
                parts.append(table(wide, cols, "Net benefit per patient at the study's risk "
                                               "thresholds", str(nb_ok["note"].iloc[0])
                                   if "note" in nb_ok and nb_ok["note"].iloc[0] else ""))
        return "".join(parts)

    def pooled(self) -> str:
        pe = self.ctx.table("pooled_effects")
        if not any(f.kind == "pooled-curves" for f in self.figures) and pe.empty:
            return ""
        self._sections.add("pooled")
        parts = ['<section id="pooled"><h2>Pooled across cohorts</h2>',
                 "<p>Each cohort contributed only share-safe aggregates (curves on a common "
                 "basis, coefficients, counts); nothing below pooled individual rows.</p>"]
        for a in self.spec.analyses:
            parts.append(f"<h3>{esc(a.name)}</h3>" + self.figs(None, a.name, "pooled-curves"))
            rows = pe[(pe["analysis"] == a.name)] if len(pe) else pe
            if len(rows):
                rows = rows[(rows["contrast_type"] == "group")
                            & ~rows["form"].astype(str).str.endswith(" x level")
                            & (rows["adjustment"] == ("legacy" if (rows["adjustment"] == "legacy")
                                                      .any() else rows["adjustment"].iloc[0]))]
                parts.append(table(rows, [
                    Col("form", lambda r: FORM_TEXT.get(str(r["form"]), str(r["form"]))),
                    Col("contrast", lambda r: str(r["contrast"])),
                    Col("pooling", lambda r: f"{r['method']} effects"),
                    Col("cohorts", lambda r: _int(r["k"]), True),
                    Col("effect (95% CI)", lambda r: interval(r["effect"], r["effect_lower"],
                                                               r["effect_upper"]), True),
                ], f"Pooled group contrasts ({rows['scale'].iloc[0] if len(rows) else ''})"))
            het = self.ctx.rows("heterogeneity", None, a.name)
            if len(het):
                parts.append("<details><summary>Heterogeneity between cohorts</summary>"
                             + plain_table(het, "Heterogeneity (Q, I², τ²)") + "</details>")
        harm = self.ctx.table("harmonisation")
        if len(harm):
            parts.append("<details><summary>Where each cohort's legacy cuts sit</summary>"
                         + plain_table(harm, "Cut percentiles by cohort", limit=200)
                         + "</details>")
        parts.append("</section>")
        return "".join(parts)

    def others(self, cohort: str, analysis: str) -> str:
        parts = []
        for name in sorted(self.ctx.tables):
            if name in KNOWN_TABLES:
                continue
            df = self.ctx.rows(name, cohort, analysis)
            if len(df) and "analysis" in self.ctx.tables[name]:
                parts.append(f"<details><summary>{esc(name.replace('_', ' '))}</summary>"
                             + plain_table(df, f"Table {name}") + "</details>")
        return "".join(parts)

    def fits_and_sample(self, cohort: str, analysis: str) -> str:
        fits = self.ctx.rows("fits", cohort, analysis)
        samples = self.ctx.rows("samples", cohort, analysis)
        parts = []
        if len(samples):
            parts.append(table(samples, [Col("step", lambda r: str(r["step"])),
                                         Col("rows", lambda r: _int(r["rows"]), True)],
                               "How the analysis sample was built"))
        if len(fits):
            cols = [Col("form", lambda r: _cell(r["form"])),
                    Col("detail", lambda r: str(r["detail"])),
                    Col("adjustment", lambda r: str(r["adjustment"])),
                    Col("selected", lambda r: "yes" if r["selected"] is True else ""),
                    Col("parameters", lambda r: _int(get(r, "n_params")), True),
                    Col("log-likelihood", lambda r: num(get(r, "loglik"), 6), True),
                    Col("AIC", lambda r: num(get(r, "aic"), 6), True),
                    Col("status", lambda r: str(get(r, "status")))]
            parts.append("<details><summary>Every fitted model</summary>"
                         + table(fits, cols, "Fitted models") + "</details>")
        return "".join(parts)

    # ---- cautions
    def cautions(self) -> str:
        items: list[str] = []
        for cohort, analysis in self.ctx.jobs():
            who = self.heading(cohort, analysis)
            st = self.status_row(cohort, analysis)
            if st is None:
                items.append(f"{who}: no results.")
                continue
            if st["status"] != "ok" or get(st, "message"):
                items.append(f"{who} ({st['status']}): {get(st, 'message') or 'see the log'}")
            rep = self.ctx.rows("replication", cohort, analysis)
            for r in rep.itertuples():
                if bool(r.disagrees) or r.verdict != "agrees":
                    items.append(f"{who}: the published {r.contrast} ({num(r.reported_effect)}) "
                                 f"and its refit ({num(r.refit_effect)}): {r.verdict}. "
                                 f"{r.message or ''}".strip())
            con = self.ctx.rows("confounding", cohort, analysis)
            if len(con) and "message" in con:
                for msg in con["message"].dropna().unique():
                    if msg:
                        items.append(f"{who}, residual confounding: {msg}.")
            rng = self.ctx.rows("ranges", cohort, analysis)
            if len(rng):
                skipped = rng[rng["status"] == "skipped"]
                if len(skipped):
                    reasons = "; ".join(str(x) for x in skipped["reason"].dropna().unique())
                    items.append(f"{who}, range dependence: {len(skipped)} legacy refit(s) "
                                 f"skipped ({reasons}).")
            cut = self.ctx.rows("cutpoints", cohort, analysis)
            if len(cut) and "derived_from_data" in cut:
                derived = cut[(cut["row_type"] == "search")]
                for r in derived.itertuples():
                    items.append(f"{who}: the legacy cut of {r.variable} was chosen from the data;"
                                 f" its naive p-value ({pval(r.p_naive)}) overstates the evidence "
                                 f"(corrected {pval(r.p_lausen)}).")
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
                                 "(see the fits table).")
        lis = "".join(f"<li>{esc(x)}</li>" for x in items)
        return (f'<section id="cautions"><h2>Cautions</h2><p class="caution">{esc(CAUTION)}</p>'
                + (f"<ul>{lis}</ul>" if lis else "<p>No analysis raised a caution.</p>")
                + "</section>")

    # ---- provenance
    def provenance(self) -> str:
        tables_dir = self.out / "tables"
        prov = read_provenance(tables_dir / "status.parquet")
        inputs = pd.DataFrame(prov.get("inputs", []))
        parts = ['<section id="provenance"><h2>Appendix: provenance</h2>',
                 "<p>Every number in this report comes from the study-level tables listed "
                 "below; each carries the same provenance in its parquet metadata (key "
                 "<code>unbin</code>). The report and its figures hold no timestamps: the same "
                 "tables and spec give the same bytes.</p>"]
        if len(inputs):
            parts.append(table(inputs, [
                Col("cohort", lambda r: str(get(r, "cohort"))),
                Col("path (as in the spec)", lambda r: str(get(r, "path"))),
                Col("rows", lambda r: _int(get(r, "rows")), True),
                Col("SHA-256", lambda r: str(get(r, "sha256")))], "Inputs"))
        facts = pd.DataFrame([
            {"k": "study", "v": prov.get("study", self.spec.study)},
            {"k": "spec digest (SHA-256 of its canonical JSON)",
             "v": prov.get("spec_digest", "")},
            {"k": "seed", "v": prov.get("seed", self.spec.seed)},
            {"k": "disclosure threshold (min cell)", "v": self.spec.min_cell},
        ])
        parts.append(table(facts, [Col("item", lambda r: str(r["k"])),
                                   Col("value", lambda r: str(r["v"]))], "Run"))
        versions = dict(prov.get("versions", {}))
        versions["matplotlib (figures)"] = _version("matplotlib")
        parts.append(table(pd.DataFrame([{"k": k, "v": v} for k, v in versions.items()]),
                           [Col("package", lambda r: str(r["k"])),
                            Col("version", lambda r: str(r["v"]))], "Versions"))
        files = sorted(tables_dir.glob("*.parquet"))
        parts.append(table(pd.DataFrame([{"name": p.name, "rows": len(self.ctx.table(p.stem)),
                                          "sha": file_sha256(p)} for p in files]),
                           [Col("table", lambda r: str(r["name"])),
                            Col("rows", lambda r: _int(r["rows"]), True),
                            Col("SHA-256", lambda r: str(r["sha"]))],
                           "Study-level tables read by this report"))
        spec_text = yaml.safe_dump(self.spec.raw, sort_keys=False, allow_unicode=True)
        parts.append("<details><summary>The spec as loaded</summary><pre>"
                     f"{esc(spec_text)}</pre></details></section>")
        return "".join(parts)

    # ---- page
    def nav(self) -> str:
        items = ['<li><a href="#summary">Study summary</a></li>']
        if "pooled" in self._sections:
            items.append('<li><a href="#pooled">Pooled across cohorts</a></li>')
        for cohort, analysis in self.ctx.jobs():
            items.append(f'<li><a href="#{slug("a", cohort, analysis)}">'
                         f"{esc(self.heading(cohort, analysis))}</a></li>")
        items += ['<li><a href="#cautions">Cautions</a></li>',
                  '<li><a href="#provenance">Provenance</a></li>']
        return f'<nav aria-label="Contents"><p class="kicker">Contents</p><ol>{"".join(items)}</ol></nav>'

    def page(self) -> str:
        status = self.ctx.table("status")
        n_used = int(status["n_used"].sum()) if len(status) and "n_used" in status else 0
        facts = [("cohorts", str(len(self.spec.cohorts))),
                 ("analyses", str(len(self.spec.analyses))),
                 ("rows analysed", f"{n_used:,}"),
                 ("figures", str(len(self.figures)))]
        header = (f'<header class="study"><p class="kicker">unbin report</p><h1>'
                  f"{esc(self.spec.study)}</h1><p>Legacy grouped analyses of continuous "
                  f"predictors, refitted on the continuous scale.</p><dl class=facts>"
                  + "".join(f"<div><dt>{esc(k)}</dt><dd>{esc(v)}</dd></div>" for k, v in facts)
                  + "</dl></header>")
        body = [header, self.guarded("study summary", self.summary),
                self.guarded("pooled results", self.pooled)]
        body += [self.guarded(f"{a} ({c})", partial(self.analysis, c, a))
                 for c, a in self.ctx.jobs()]
        body += [self.guarded("cautions", self.cautions),
                 self.guarded("provenance", self.provenance)]
        nav = self.nav()
        return (
            "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; "
            "img-src data:; style-src 'unsafe-inline'\">"
            f"<meta name=\"generator\" content=\"unbin {esc(__version__)}\">"
            f"<title>{esc(self.spec.study)} · unbin report</title><style>{CSS}</style></head>"
            f"<body><div class=\"layout\">{nav}<main>{''.join(body)}"
            f"<footer>Written by unbin {esc(__version__)} from the study-level tables and the "
            f"spec.</footer></main></div></body></html>\n")


def _int(v: Any) -> str:
    return f"{int(float(v)):,}" if finite(v) else "–"


def _suppressed(r: pd.Series, key: str, min_cell: int) -> str:
    if get(r, "suppressed") is True or not finite(get(r, key)):
        return f"<{min_cell}" if get(r, "suppressed") is True else "–"
    return _int(r[key])


def _trim(r: pd.Series) -> str:
    if r["trim"] == "none":
        return "full range"
    side = {"lower": "low tail", "upper": "high tail", "both": "both tails"}.get(r["trim"],
                                                                               str(r["trim"]))
    share = max(float(r["share_lower"]), float(r["share_upper"]))
    return f"{side} {share:.0%}"


def _version(package: str) -> str:
    try:
        return metadata.version(package)
    except metadata.PackageNotFoundError:
        return "not installed"


CSS = """
:root{--ink:#23262b;--muted:#5b6068;--rule:#e4e1da;--paper:#fbfaf7;--legacy:#e07a2a;
--spline:#1a365d;--fp:#1c6b64;--warn:#fdf1e6}
*{box-sizing:border-box}
body{margin:0;color:var(--ink);background:#fff;
font:15px/1.55 "DejaVu Sans","Noto Sans","Segoe UI",Helvetica,Arial,sans-serif}
.layout{display:grid;grid-template-columns:15rem minmax(0,1fr);max-width:88rem;margin:0 auto}
nav{position:sticky;top:0;align-self:start;max-height:100vh;overflow:auto;padding:2rem 1rem;
border-right:1px solid var(--rule);font-size:.88rem}
nav ol{list-style:none;padding:0;margin:0}nav li{margin:.3rem 0}
a{color:var(--spline)}nav a{text-decoration:none}nav a:hover{text-decoration:underline}
main{padding:1.5rem 2.5rem 4rem;min-width:0}
.kicker{text-transform:uppercase;letter-spacing:.14em;font-size:.72rem;font-weight:700;
color:var(--legacy);margin:0 0 .3rem}
header.study{border-bottom:5px solid var(--spline);padding-bottom:1rem;margin-bottom:1rem}
h1{font-size:2rem;margin:.1rem 0 .3rem}h2{font-size:1.45rem;margin:2rem 0 .4rem}
h3{font-size:1.1rem;margin:2rem 0 .3rem;color:var(--spline)}
.facts{display:flex;flex-wrap:wrap;gap:2.2rem;margin:1rem 0 0}.facts dt{font-size:.75rem;
color:var(--muted);text-transform:uppercase;letter-spacing:.08em}.facts dd{margin:0;
font-size:1.5rem;font-weight:700;font-variant-numeric:tabular-nums}
section.analysis{border-top:1px solid var(--rule);margin-top:3rem}
.meta{color:var(--muted);font-size:.9rem;margin:.2rem 0 1rem}
.badge{font-size:.72rem;vertical-align:middle;padding:.12rem .5rem;border-radius:1rem;
border:1px solid var(--muted);color:var(--muted);font-weight:600;letter-spacing:.04em}
.badge.ok{border-color:var(--fp);color:var(--fp)}.badge.failed,.badge.error,.badge.partial{
border-color:var(--legacy);color:#8a3d0c}
.cards{display:grid;grid-template-columns:repeat(auto-fit,minmax(12rem,1fr));gap:.8rem;
margin:1rem 0 1.2rem}.card{background:var(--paper);border-top:3px solid var(--spline);
padding:.6rem .85rem}.card .label,.card .sub{display:block;font-size:.78rem;color:var(--muted)}
.card .value{display:block;font-size:1.45rem;font-weight:700;font-variant-numeric:tabular-nums}
.scroll{overflow-x:auto}
.not-drawn{background:var(--warn);border-left:4px solid var(--legacy);padding:.5rem .9rem;
margin:1rem 0}
table{border-collapse:collapse;font-size:.84rem;font-variant-numeric:tabular-nums;
margin:.8rem 0 .3rem}
caption{caption-side:top;text-align:left;font-weight:700;padding:0 0 .4rem}
th,td{padding:.28rem .7rem;border-bottom:1px solid var(--rule);text-align:left;
vertical-align:top}
thead th{border-bottom:2px solid var(--ink);font-weight:600;vertical-align:bottom}
.num{text-align:right;white-space:nowrap}
tbody tr:hover{background:var(--paper)}
.note{font-size:.8rem;color:var(--muted);margin:.2rem 0 1.2rem;max-width:60rem}
figure{margin:1.2rem 0 1.8rem}figure img{display:block;max-width:100%;height:auto}
figcaption{font-size:.85rem;color:var(--muted);max-width:62rem;margin-top:.3rem}
.caution{border-left:4px solid var(--legacy);background:var(--warn);padding:.55rem 1rem}
details{margin:.6rem 0}summary{cursor:pointer;color:var(--spline);font-weight:600}
ul.lines li{margin:.25rem 0}
pre{overflow:auto;background:var(--paper);padding:1rem;font-size:.8rem}
code{font-size:.9em}
footer{margin-top:3rem;padding-top:1rem;border-top:1px solid var(--rule);color:var(--muted);
font-size:.8rem}
@media (max-width:62rem){.layout{display:block}nav{position:static;max-height:none;
border-right:0;border-bottom:1px solid var(--rule)}main{padding:1rem}}
@media print{nav{display:none}.layout{display:block}details{display:block}}
"""


# --------------------------------------------------------------------------- entry points


def check_spec_matches(spec: Spec, tables_dir: Path) -> None:
    """The spec must be the one the tables were written with (same digest)."""
    path = tables_dir / "status.parquet"
    if not path.is_file():
        raise UnbinError(f"{tables_dir} holds no study-level tables (status.parquet is missing); "
                         "run the workflow first.")
    want = read_provenance(path).get("spec_digest")
    if want and want != digest(spec.raw):
        raise UnbinError(f"the spec {spec.source} is not the one the tables in {tables_dir} were "
                         "written with (its digest differs); give the spec of that run, or rerun "
                         "the workflow.")


def draw_cohort_figures(out: str | Path, spec_path: str | Path, cohort: str) -> list[FigureFile]:
    """One cohort's figures (a workflow job of their own) into ``out/figures/<cohort>/``."""
    out = Path(out)
    spec = load_spec(spec_path)
    check_spec_matches(spec, out / "tables")
    ctx = Context(load_tables(out / "tables"), spec)
    return draw_figures(ctx, out / FIGURES_DIR, cohorts=[cohort], study=False)


def build_report(out: str | Path, spec_path: str | Path, draw_cohorts: bool = True) -> Report:
    """Write ``out/report.html`` from ``out``'s study-level tables and the spec, with the study's
    figures drawn into ``out/figures/_study/``. With ``draw_cohorts`` (the command line) every
    cohort's figures are drawn afresh too (the figures folder is replaced); without (the
    workflow, where each cohort's figures are a job of their own) they are read from
    ``out/figures/<cohort>/index.json``."""
    out = Path(out)
    spec = load_spec(spec_path)
    check_spec_matches(spec, out / "tables")
    ctx = Context(load_tables(out / "tables"), spec)
    figures_dir = out / FIGURES_DIR
    if draw_cohorts:
        if figures_dir.is_dir():
            shutil.rmtree(figures_dir)
        figures = draw_figures(ctx, figures_dir)
    else:
        study_dir = group_dir(figures_dir, None)
        if study_dir.is_dir():
            shutil.rmtree(study_dir)
        figures = draw_figures(ctx, figures_dir, cohorts=[], study=True)
        for c in spec.cohorts:
            figures += read_index(group_dir(figures_dir, c.name), figures_dir)
    text = Builder(ctx, figures, out).page()
    path = out / REPORT_NAME
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_text(text, encoding="utf-8")
    tmp.replace(path)
    return Report(path, figures)


def find_spec(out: Path, spec: str | Path | None) -> Path:
    """The spec to rebuild ``out``'s report with: the one given, else ``out/spec.yaml``."""
    if spec is not None:
        return Path(spec)
    guess = out / "spec.yaml"
    if guess.is_file():
        return guess
    raise UnbinError(f"no spec given and none at {guess}; give the spec of the run with --spec.")
