"""Effects: each legacy contrast (group vs reference) beside the continuous forms' estimate of
the same contrast (between the groups' medians), the spread of the continuous effect inside each
group (how far "flat within a group" is off), and standard contrasts (IQR, per unit).

Every contrast reads "comparison vs reference": the estimate is the comparison value's effect
over (ratio) or minus (difference) the reference value's, as the legacy paper's "group vs
reference". A contrast the data cannot give is a row with ``status = "not_estimable"``, a NaN
estimate and a ``message`` — an empty legacy group, or a legacy-group IQR contrast whose two
percentiles fall in the same group (the grouped model gives them the same value by
construction, so 0 ± 0 would be an artefact, not an estimate). The per-unit contrast of the
linear form is taken at the sample median, so it never depends on the grouping."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..models import EFFECT_SCALE
from ..models.robust import variance_label
from ..refit.analysis import Refit
from ..refit.contrasts import contrast, with_interval
from ..refit.interaction import LEGACY, SPLINE, level_models, level_reference
from ..spec import Spec

FORMS = ("legacy", "linear", "spline", "fp")
COLUMNS = ("adjustment", "form", "status", "message", "contrast_type", "contrast", "group",
           "x_value", "x_reference", "estimate", "se", "within_p10", "within_p90", "by_level",
           "lower", "upper", "effect", "effect_lower", "effect_upper", "scale", "variance")


def effects_table(r: Refit, spec: Spec | None = None) -> pd.DataFrame:
    """Legacy group contrasts beside each continuous form's, and IQR and per-unit contrasts."""
    rows = []
    term = r.legacy
    labels = term.labels
    ref_vals = r.group_values(term.reference)
    x_ref = float(np.median(ref_vals)) if len(ref_vals) else float("nan")
    x_mid = float(np.median(r.x))  # per-unit reference: independent of the grouping
    q25, q75 = np.quantile(r.x, [0.25, 0.75])
    codes_iqr = term.codes(np.array([q25, q75]))
    iqr_one_group = bool(codes_iqr[0] == codes_iqr[1])
    # each group's rows, median and 10th/90th percentiles, once for every form and coding
    # (the same values each time; at registry size each is a pass over the sample)
    groups = [r.group_values(g) for g in range(len(labels))]
    medians = [float(np.median(v)) if len(v) else float("nan") for v in groups]
    spreads = [np.quantile(v, [0.10, 0.90]) if len(v) else np.full(2, np.nan) for v in groups]
    for coding in ("legacy", "continuous", "none"):
        for form in FORMS:
            f = r.get(form, coding)
            if f is None:
                continue
            base = {"adjustment": coding, "form": form, "status": f.result.status,
                    "message": f.result.message,
                    "variance": variance_label(f.result)}
            for g in range(len(labels)):
                vals = groups[g]
                is_ref = g == term.reference
                if len(vals) == 0 or not len(ref_vals):
                    empty = labels[g] if len(vals) == 0 else labels[term.reference]
                    rows.append({**base, "status": "not_estimable",
                                 "message": f"legacy group {empty!r} has no rows in the analysis "
                                            "sample",
                                 "contrast_type": "group",
                                 "contrast": (f"{labels[g]} (reference)" if is_ref
                                              else f"{labels[g]} vs {labels[term.reference]}"),
                                 "group": labels[g], "x_value": np.nan, "x_reference": x_ref,
                                 "estimate": np.nan, "se": np.nan,
                                 "within_p10": np.nan, "within_p90": np.nan})
                    continue
                x_g = medians[g]
                if form == "legacy":
                    est, se = contrast(f, np.array([x_g]), x_ref)
                    spread = (np.nan, np.nan)
                else:
                    est, se = contrast(f, np.array([x_g]), x_ref)
                    p10, p90 = spreads[g]
                    sp, _ = contrast(f, np.array([p10, p90]), x_ref)
                    spread = (float(sp[0]), float(sp[1]))
                rows.append({**base, "contrast_type": "group",
                             "contrast": (f"{labels[g]} (reference)" if is_ref
                                          else f"{labels[g]} vs {labels[term.reference]}"),
                             "group": labels[g], "x_value": x_g, "x_reference": x_ref,
                             "estimate": float(est[0]), "se": float(se[0]),
                             "within_p10": spread[0], "within_p90": spread[1]})
            est, se = contrast(f, np.array([q75]), q25)
            iqr = dict(base)
            if form == "legacy" and iqr_one_group:
                est, se = np.array([np.nan]), np.array([np.nan])
                iqr.update(status="not_estimable",
                           message=f"the 25th and 75th percentiles ({q25:g}, {q75:g}) fall in "
                                   f"the same legacy group {labels[int(codes_iqr[0])]!r}: the "
                                   "grouped model cannot contrast them")
            rows.append({**iqr, "contrast_type": "iqr", "contrast": "75th vs 25th percentile",
                         "group": "", "x_value": float(q75), "x_reference": float(q25),
                         "estimate": float(est[0]), "se": float(se[0]),
                         "within_p10": np.nan, "within_p90": np.nan})
            if form == "linear":
                est, se = contrast(f, np.array([x_mid + 1.0]), x_mid)
                rows.append({**base, "contrast_type": "per_unit", "contrast": "per unit",
                             "group": "", "x_value": x_mid + 1.0, "x_reference": x_mid,
                             "estimate": float(est[0]), "se": float(se[0]),
                             "within_p10": np.nan, "within_p90": np.nan})
    for row in rows:
        row["by_level"] = ""
    rows += _level_effects(r)
    out = pd.DataFrame(rows)
    if out.empty:
        return pd.DataFrame(columns=list(COLUMNS))
    out = with_interval(out, r.family)
    ratio = r.family != "continuous"
    for c in ("within_p10", "within_p90"):
        out[c] = np.exp(out[c]) if ratio else out[c]
    out["scale"] = EFFECT_SCALE[r.family]
    return out[list(COLUMNS)]


def _level_effects(r: Refit) -> list[dict[str, object]]:
    """Group contrasts within each level of ``by``: from the spline x level model (between the
    group's and the reference group's medians within the level, with the spline's spread inside
    the group) and from the legacy groups x level model (each group vs the reference group within
    the level: the legacy analysis' own subgroup contrasts). unbin.refit.interaction."""
    lm = level_models(r)
    term = r.legacy
    labels, ref = term.labels, term.reference
    codes = r.legacy_codes
    rows: list[dict[str, object]] = []
    for coding in ("legacy", "continuous"):
        for form in (LEGACY, SPLINE):
            m = lm.get(form, coding)
            if m is None:
                continue
            lv = m.levels
            for j, level in enumerate(lv.labels):
                x_ref = level_reference(r, lv, j)
                where = f"{lv.variable} = {level}"
                for g in range(len(labels)):
                    vals = r.x[(codes == g) & (lv.codes == j)]
                    if len(vals) == 0:
                        continue
                    x_g = float(np.median(vals))
                    status = m.full.status if m.ok else "failed"
                    spread = (np.nan, np.nan)
                    if not np.isfinite(x_ref):
                        est, se = np.array([np.nan]), np.array([np.nan])
                        status = "not_estimable"
                    else:
                        est, se = m.contrast(j, np.array([x_g]), x_ref)
                        if form == SPLINE:
                            p10, p90 = np.quantile(vals, [0.10, 0.90])
                            sp, _ = m.contrast(j, np.array([p10, p90]), x_ref)
                            spread = (float(sp[0]), float(sp[1]))
                    rows.append({
                        "adjustment": coding, "form": form, "status": status,
                        "variance": variance_label(m.full),
                        "contrast_type": "group",
                        "contrast": (f"{labels[g]} ({where}) (reference)" if g == ref
                                     else f"{labels[g]} vs {labels[ref]} ({where})"),
                        "group": labels[g], "x_value": x_g, "x_reference": x_ref,
                        "estimate": float(est[0]), "se": float(se[0]),
                        "within_p10": spread[0], "within_p90": spread[1], "by_level": level})
    return rows
