"""Effects: each legacy contrast (group vs reference) beside the continuous forms' estimate of
the same contrast (between the groups' medians), the spread of the continuous effect inside each
group (how far "flat within a group" is off), and standard contrasts (IQR, per unit)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .contrasts import contrast, with_interval
from .models import EFFECT_SCALE
from .refit import Refit
from .spec import Spec

FORMS = ("legacy", "linear", "spline", "fp")


def effects_table(r: Refit, spec: Spec | None = None) -> pd.DataFrame:
    rows = []
    term = r.legacy
    x_ref = r.reference_value
    labels = term.labels
    q25, q75 = np.quantile(r.x, [0.25, 0.75])
    for coding in ("legacy", "continuous", "none"):
        for form in FORMS:
            f = r.get(form, coding)
            if f is None:
                continue
            base = {"adjustment": coding, "form": form, "status": f.result.status}
            for g in range(len(labels)):
                vals = r.group_values(g)
                if len(vals) == 0:
                    continue
                x_g = float(np.median(vals))
                if form == "legacy":
                    est, se = contrast(f, np.array([x_g]), x_ref)
                    spread = (np.nan, np.nan)
                else:
                    est, se = contrast(f, np.array([x_g]), x_ref)
                    p10, p90 = np.quantile(vals, [0.10, 0.90])
                    sp, _ = contrast(f, np.array([p10, p90]), x_ref)
                    spread = (float(sp[0]), float(sp[1]))
                is_ref = g == term.reference
                rows.append({**base, "contrast_type": "group",
                             "contrast": (f"{labels[g]} (reference)" if is_ref
                                          else f"{labels[g]} vs {labels[term.reference]}"),
                             "group": labels[g], "x_value": x_g, "x_reference": x_ref,
                             "estimate": float(est[0]), "se": float(se[0]),
                             "within_p10": spread[0], "within_p90": spread[1]})
            est, se = contrast(f, np.array([q75]), q25)
            rows.append({**base, "contrast_type": "iqr", "contrast": "75th vs 25th percentile",
                         "group": "", "x_value": float(q75), "x_reference": float(q25),
                         "estimate": float(est[0]), "se": float(se[0]),
                         "within_p10": np.nan, "within_p90": np.nan})
            if form == "linear":
                est, se = contrast(f, np.array([x_ref + 1.0]), x_ref)
                rows.append({**base, "contrast_type": "per_unit", "contrast": "per unit",
                             "group": "", "x_value": x_ref + 1.0, "x_reference": x_ref,
                             "estimate": float(est[0]), "se": float(se[0]),
                             "within_p10": np.nan, "within_p90": np.nan})
    out = pd.DataFrame(rows)
    if out.empty:
        return out
    out = with_interval(out, r.family)
    ratio = r.family != "continuous"
    for c in ("within_p10", "within_p90"):
        out[c] = np.exp(out[c]) if ratio else out[c]
    out["scale"] = EFFECT_SCALE[r.family]
    return out
