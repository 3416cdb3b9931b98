"""Windows: the exposure's effect by follow-up window (``outcome.follow_up_windows``).

For a survival analysis with windows, the legacy groups and the test spline (fixed knots) are
refitted with one exposure block per window on the episode-split sample (unbin.refit.windows),
under each adjustment coding: per window, each legacy group's contrast with the reference
group (``group`` rows) and the spline's curve on the curves' grid relative to the curves'
reference value (``curve`` rows); per form and coding, the likelihood-ratio test that the
exposure's effect is the same in every window (``test`` rows). Events per window below
``min_cell`` are suppressed. Other analyses give an empty table."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..models import EFFECT_SCALE
from ..refit.analysis import FormFit, Refit, design
from ..refit.contrasts import with_interval
from ..refit.windows import WindowFit, fit_windows, window_labels
from ..spec import Spec
from ..terms import GroupedTerm
from .curves import grid

COLUMNS = ("row_type", "form", "adjustment", "window", "window_lower", "window_upper", "events",
           "group", "x", "x_reference", "estimate", "se", "lower", "upper", "effect",
           "effect_lower", "effect_upper", "scale", "lr", "df", "p", "detail", "status",
           "message")
CODINGS = ("legacy", "continuous", "none")
FORMS = ("legacy", "test_spline")


def windows_table(r: Refit, spec: Spec | None = None) -> pd.DataFrame:
    """Per-window contrasts and curves and the change-over-time tests (module notes)."""
    cuts = r.analysis.outcome.follow_up_windows
    if r.family != "survival" or not cuts:
        return pd.DataFrame(columns=list(COLUMNS))
    if any(b <= a for a, b in zip(cuts[:-1], cuts[1:], strict=True)):
        return _frame([_test_row("", "", np.nan, 0, np.nan, "", "failed",
                                 f"analyses.{r.analysis.name}.outcome.follow_up_windows: the cuts "
                                 f"{list(cuts)} do not increase; list them in increasing order, "
                                 "e.g. [1, 3]")], r)
    min_cell = spec.min_cell if spec is not None else 0
    rows: list[dict[str, object]] = []
    for coding in CODINGS:
        for form in FORMS:
            f = r.get(form, coding)
            if f is not None and f.result.ok:
                rows += _form_rows(r, f, form, coding, cuts, min_cell)
    return _frame(rows, r)


def _frame(rows: list[dict[str, object]], r: Refit) -> pd.DataFrame:
    out = pd.DataFrame(rows)
    for c in ("estimate", "se"):
        if c not in out:
            out[c] = np.nan
    out["group"] = out["group"].fillna("") if "group" in out else ""
    out = with_interval(out, r.family)
    out["scale"] = EFFECT_SCALE[r.family]
    return out.reindex(columns=list(COLUMNS))


def _test_row(form: str, coding: str, lr: float, df: int, p: float, detail: str, status: str,
              message: str) -> dict[str, object]:
    return {"row_type": "test", "form": form, "adjustment": coding, "window": "all",
            "lr": lr, "df": df, "p": p, "detail": detail, "status": status, "message": message}


def _form_rows(r: Refit, f: FormFit, form: str, coding: str, cuts: tuple[float, ...],
               min_cell: int) -> list[dict[str, object]]:
    E, _ = design(r.sample.frame, r.x, f.exposure_terms, ())
    A, _ = design(r.sample.frame, r.x, (), f.adjust_terms)
    o = r.outcome
    assert o.time is not None
    wf = fit_windows(E, A, o.time, o.y, o.entry, o.strata, o.weights, cuts)
    status = "ok" if not wf.message else "failed"
    rows = [_test_row(form, coding, wf.lr, wf.df, wf.p, f.detail, status, wf.message)]
    if wf.message:
        return rows
    labels = window_labels(cuts)
    lows = [0.0, *cuts]
    highs = [*cuts, np.inf]
    for w, label in enumerate(labels):
        n_ev = int(wf.events[w])
        base = {"form": form, "adjustment": coding, "window": label, "window_lower": lows[w],
                "window_upper": highs[w], "events": n_ev if n_ev >= min_cell else np.nan,
                "detail": f.detail, "status": "ok", "message": ""}
        if form == "legacy":
            rows += _group_rows(r, f, wf, w, base)
        else:
            rows += _curve_rows(r, f, wf, w, base)
    return rows


def _group_rows(r: Refit, f: FormFit, wf: WindowFit, w: int, base: dict[str, object]
                ) -> list[dict[str, object]]:
    """Each group's contrast in window ``w``, placed (``x``, ``x_reference``) at the group's and
    the reference group's median exposure."""
    term = f.exposure_terms[0]
    assert isinstance(term, GroupedTerm)
    se = np.sqrt(np.clip(np.diag(wf.cov[w]), 0.0, None))

    def median(g: int) -> float:
        v = r.x[term.codes(r.x) == g]
        return float(np.median(v)) if v.size else np.nan

    return [{**base, "row_type": "group",
             "group": f"{term.labels[g]} vs {term.labels[term.reference]}",
             "x": median(g), "x_reference": median(term.reference),
             "estimate": float(wf.coef[w][j]), "se": float(se[j])}
            for j, g in enumerate(term.others)]


def _curve_rows(r: Refit, f: FormFit, wf: WindowFit, w: int, base: dict[str, object]
                ) -> list[dict[str, object]]:
    points = r.analysis.continuous.grid_points
    xs = r.basis.grid(points) if r.basis is not None else grid(r.x, points)
    x_ref = r.curve_reference
    D = f.exposure_basis(xs) - f.exposure_basis(np.array([x_ref]))
    est = D @ wf.coef[w]
    se = np.sqrt(np.clip(np.einsum("ij,jk,ik->i", D, wf.cov[w], D), 0.0, None))
    return [{**base, "row_type": "curve", "x": float(x), "x_reference": x_ref,
             "estimate": float(e), "se": float(s)} for x, e, s in zip(xs, est, se, strict=True)]
