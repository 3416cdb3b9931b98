"""Range dependence: how the legacy estimate of the extreme group vs the reference group moves
when the exposure's range changes (as it does between studies with different entry criteria),
while a continuous model's contrast between two fixed exposure values stays put.

Direction: every contrast reads "comparison vs reference", as the legacy paper's "group vs
reference" and the effects table do — the comparison's effect over (ratio) or minus
(difference) the reference's. The reference is the legacy reference group; the comparison is
the extreme group (lowest or highest) farther from it (the highest when the reference is in
the exact middle). With a reference at the top (say eGFR >= 60) the contrast is the lowest
group vs it, not "high vs low".

The sample is trimmed at quantiles of the full analysis sample's exposure: the upper tail, the
lower tail, or both, by each share in ``TRIM_SHARES`` (plus the untrimmed sample). In every
trimmed sample, with the legacy adjustment (as the legacy paper had it), three models are refitted:

- ``legacy``: the legacy groups (fixed cuts stay; quantile groupings are re-derived in the trimmed
  sample, as a study with that range would have done), and the estimate is the comparison group
  vs the reference group (``x_value`` and ``x_reference``: their medians in the trimmed sample);
- ``linear`` and ``spline`` (restricted cubic spline, knots at the default quantiles of the
  trimmed sample, as many knots as the spline AIC chose in the full sample): the contrast between
  two fixed values, ``x_value`` (the full-sample median of the comparison group) vs
  ``x_reference`` (the full-sample median of the reference group).

A legacy row is skipped (``status = "skipped"``, with the reason) when a trim leaves a legacy
group with fewer than ``max(MIN_GROUP_ROWS, min_cell)`` rows or, for event outcomes, fewer than
``MIN_GROUP_EVENTS`` events (binary: or non-events). Continuous rows are still fitted then;
``extrapolated`` marks a fixed value outside the trimmed range. ``change`` is the shift from the
untrimmed estimate of the same form (model scale) and ``covers_untrimmed`` whether the row's 95%
interval still contains the untrimmed estimate.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from ..models import EFFECT_SCALE, fit
from ..models.base import FitResult
from ..refit.analysis import FormFit, Refit, adjustment_terms, design, legacy_term
from ..refit.contrasts import contrast, with_interval
from ..spec import Spec
from ..terms import LinearTerm, SplineTerm, Term

TABLE = "ranges"
TRIM_SHARES = (0.05, 0.10, 0.20)
MIN_GROUP_ROWS = 10
MIN_GROUP_EVENTS = 5
DEFAULT_SPLINE_KNOTS = 4


def trims(shares: tuple[float, ...] = TRIM_SHARES) -> list[tuple[str, float, float]]:
    """(name, share cut from below, share cut from above), the untrimmed sample first."""
    out = [("none", 0.0, 0.0)]
    for s in shares:
        out += [("upper", 0.0, s), ("lower", s, 0.0), ("both", s, s)]
    return out


def _spline_knots(r: Refit) -> int:
    sel = r.get("spline", "legacy")
    for t in sel.exposure_terms if sel is not None else ():
        if isinstance(t, SplineTerm):
            return len(t.knots)
    ks = r.analysis.continuous.spline_knots
    return ks[0] if ks else DEFAULT_SPLINE_KNOTS


def _too_small(r: Refit, codes: np.ndarray, labels: tuple[str, ...], y: np.ndarray | None,
               min_rows: int) -> str:
    for j, label in enumerate(labels):
        inside = codes == j
        n = int(inside.sum())
        if n < min_rows:
            what = "no rows" if n == 0 else f"fewer than {min_rows} rows"
            return f"legacy group {label!r} has {what} after trimming"
        if y is None:
            continue
        ev = float(y[inside].sum())
        if ev < MIN_GROUP_EVENTS:
            return (f"legacy group {label!r} has fewer than {MIN_GROUP_EVENTS} "
                    f"{'events' if r.family != 'count' else 'counts'} after trimming")
        if r.family == "binary" and n - ev < MIN_GROUP_EVENTS:
            return f"legacy group {label!r} has fewer than {MIN_GROUP_EVENTS} non-events after " \
                   "trimming"
    return ""


def comparison_group(reference: int, n_groups: int) -> int:
    """The extreme legacy group farther from the reference group (ties: the highest)."""
    top = n_groups - 1
    if reference == top:
        return 0
    if reference == 0:
        return top
    return top if top - reference >= reference else 0


def ranges_table(r: Refit, spec: Spec) -> pd.DataFrame:
    """Legacy and continuous contrasts refitted in range-trimmed samples (module docstring)."""
    a = r.analysis
    df_full = r.sample.frame
    x_full = r.x
    full_codes = r.legacy_codes
    labels = r.legacy.labels
    ref = r.legacy.reference
    comp = comparison_group(ref, len(labels))
    if not (np.any(full_codes == comp) and np.any(full_codes == ref)):
        return pd.DataFrame([{"trim": "none", "status": "failed",
                              "reason": f"the legacy comparison group {labels[comp]!r} or the "
                                        f"reference group {labels[ref]!r} is empty in the "
                                        "analysis sample"}])
    x_comp = float(np.median(x_full[full_codes == comp]))
    x_ref = float(np.median(x_full[full_codes == ref]))
    k = _spline_knots(r)
    min_rows = max(MIN_GROUP_ROWS, spec.min_cell)
    y_events = None if r.family == "continuous" else np.asarray(r.outcome.y, dtype=float)
    rows: list[dict[str, Any]] = []
    # a trimmed sample copies only the columns its models read (the exposure, the adjusters
    # and the modifier), not the whole analysis frame
    used = list(dict.fromkeys([a.exposure, *a.adjust, *([a.by] if a.by else [])]))
    for name, lo, hi in trims():
        keep = np.ones(len(x_full), dtype=bool)
        b_lo = float(np.quantile(x_full, lo)) if lo > 0 else float("nan")
        b_hi = float(np.quantile(x_full, 1 - hi)) if hi > 0 else float("nan")
        if lo > 0:
            keep &= x_full >= b_lo
        if hi > 0:
            keep &= x_full <= b_hi
        whole = lo == 0 and hi == 0
        # the untrimmed sample is the analysis sample itself: no copy, and its models are the
        # refit's own (the same design on the same rows; see _fitted)
        df = df_full if whole else df_full.loc[keep, used].reset_index(drop=True)
        x = x_full if whole else x_full[keep]
        outcome = r.outcome if whole else r.outcome.subset(keep)
        fitted = _fitted(r) if whole else {}
        columns: dict[str, np.ndarray] = {}  # the trim's adjustment columns, for all its forms
        base = {"trim": name, "share_lower": lo, "share_upper": hi, "bound_lower": b_lo,
                "bound_upper": b_hi, "n": int(keep.sum()),
                "events": int(round(float(y_events[keep].sum()))) if y_events is not None
                else None, "adjustment": "legacy"}
        adjust = adjustment_terms(df, a, spec, "legacy")
        # legacy groups, comparison vs reference group
        term = legacy_term(x, a.exposure, spec)
        codes = term.codes(x)
        reason = _too_small(r, codes, labels, y_events[keep] if y_events is not None else None,
                            min_rows)
        row = {**base, "form": "legacy", "detail": term.describe(),
               "contrast": f"{labels[comp]} vs {labels[ref]}"}
        if reason:
            rows.append({**row, "status": "skipped", "reason": reason})
        else:
            xc = float(np.median(x[codes == comp]))
            xr = float(np.median(x[codes == ref]))
            rows.append({**row, **_fit_contrast(r, df, x, outcome, (term,), adjust, xc, xr,
                                                fitted, columns),
                         "x_value": xc, "x_reference": xr})
        # continuous forms between the fixed values
        extrap = bool((lo > 0 and min(x_comp, x_ref) < b_lo)
                      or (hi > 0 and max(x_comp, x_ref) > b_hi))
        forms: list[tuple[str, tuple[Term, ...] | None, str]] = [
            ("linear", (LinearTerm(a.exposure),), "linear")]
        try:
            sp = SplineTerm.at_quantiles(a.exposure, x, k)
            forms.append(("spline", (sp,), sp.describe()))
        except ValueError as exc:
            forms.append(("spline", None, str(exc)))
        for form, terms, detail in forms:
            row = {**base, "form": form, "detail": detail, "x_value": x_comp,
                   "x_reference": x_ref, "contrast": f"{x_comp:g} vs {x_ref:g}",
                   "extrapolated": extrap}
            if terms is None:
                rows.append({**row, "status": "failed", "reason": detail})
                continue
            rows.append({**row, **_fit_contrast(r, df, x, outcome, terms, adjust, x_comp,
                                                x_ref, fitted, columns)})
    return _finish(pd.DataFrame(rows), r.family)


def _key(exposure: tuple[Term, ...], adjust: tuple[Term, ...]) -> tuple[str, ...]:
    return tuple(repr(t) for t in (*exposure, *adjust))


def _fitted(r: Refit) -> dict[tuple[str, ...], FitResult]:
    """The refit's fits by their terms: a model of the untrimmed sample with the same terms is
    the same design on the same rows, so its fit is reused rather than repeated."""
    return {_key(f.exposure_terms, f.adjust_terms): f.result for f in r.fits
            if f.exposure_terms}


def _fit_contrast(r: Refit, df: pd.DataFrame, x: np.ndarray, outcome: Any,
                  exposure: tuple[Term, ...], adjust: tuple[Term, ...], x1: float,
                  x0: float, fitted: dict[tuple[str, ...], FitResult] | None = None,
                  columns: dict[str, np.ndarray] | None = None) -> dict[str, Any]:
    """The contrast x1 vs x0 of one model of the (trimmed) sample: the refit's own fit when
    ``fitted`` has it, else a fit of its design (``columns``: the sample's adjustment columns,
    built once for all its models; see ``design``)."""
    res = (fitted or {}).get(_key(exposure, adjust))
    if res is None:
        X, names = design(df, x, exposure, adjust, columns)
        res = fit(r.family, X, outcome, names)
    if not res.ok:
        return {"status": "failed", "reason": res.message, "estimate": np.nan, "se": np.nan}
    f = FormFit("", "legacy", exposure, adjust, res)
    est, se = contrast(f, np.array([x1]), x0)
    return {"status": "ok", "reason": "", "estimate": float(est[0]), "se": float(se[0])}


COLUMNS = ("trim", "share_lower", "share_upper", "bound_lower", "bound_upper", "n", "events",
           "adjustment", "form", "detail", "contrast", "x_value", "x_reference", "estimate", "se",
           "lower", "upper", "effect", "effect_lower", "effect_upper", "change",
           "covers_untrimmed", "extrapolated", "scale", "status", "reason")


def _finish(out: pd.DataFrame, family: str) -> pd.DataFrame:
    for c in COLUMNS:
        if c not in out:
            out[c] = np.nan
    out["estimate"] = out["estimate"].astype(float)
    out["se"] = out["se"].astype(float)
    out = with_interval(out, family)
    ref = out[out["trim"] == "none"].set_index("form")["estimate"]
    full = out["form"].map(ref).astype(float)
    out["change"] = out["estimate"] - full
    out["covers_untrimmed"] = ((out["lower"] <= full) & (full <= out["upper"])).where(
        out["estimate"].notna() & full.notna())
    out["scale"] = EFFECT_SCALE[family]
    out["events"] = pd.array(out["events"], dtype="Int64")
    out["n"] = pd.array(out["n"], dtype="Int64")
    out["covers_untrimmed"] = out["covers_untrimmed"].astype("boolean")
    out["extrapolated"] = out["extrapolated"].astype("boolean")
    return out[list(COLUMNS)]


def summary_line(df: pd.DataFrame) -> str:
    """One line: per analysis, the largest move of the legacy estimate over the trims beside the
    largest move of the spline contrast (as ratios for ratio scales, differences otherwise;
    spline contrasts that extrapolate beyond the trimmed range are left out)."""
    if df.empty or "form" not in df:
        return "Range dependence: no analyses."
    parts = []
    for name, g in df.groupby("analysis", sort=False):
        ok = g[(g["status"] == "ok") & ~g["extrapolated"].fillna(False).astype(bool)]
        skipped = int((g["status"] == "skipped").sum())
        moves = {}
        for form in ("legacy", "spline"):
            ch = ok.loc[ok["form"] == form, "change"].abs()
            moves[form] = float(ch.max()) if len(ch) else float("nan")
        ratio = g["scale"].iloc[0] != "mean difference"
        def fmt(v: float, ratio: bool = ratio) -> str:
            if not np.isfinite(v):
                return "–"
            return f"×{np.exp(v):.2f}" if ratio else f"±{v:.2g}"

        text = f"{name} legacy {fmt(moves['legacy'])} vs spline {fmt(moves['spline'])}"
        if skipped:
            text += f" ({skipped} trim(s) skipped)"
        parts.append(text)
    return "Range dependence (largest move when the range is trimmed): " + "; ".join(parts)
