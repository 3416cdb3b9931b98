"""Replication: the legacy paper's reported estimate beside the refit of the same legacy contrast.

When an analysis gives ``reported: {contrast: "<group> vs <reference>", estimate, lower, upper}``,
the legacy model (legacy groups, legacy adjustment — the model the paper fitted) is refitted on the
extract and the same contrast (the coefficient of <group> minus that of <reference>) is set beside
the published number. The comparison is on the model scale (log for odds, hazard and rate ratios).

The rule:

- ``disagrees`` is true when the reported estimate lies outside the refit's 95% confidence
  interval, i.e. |refit - reported| > 1.96 SE(refit) on the model scale. If the extract were the
  paper's data, the two would agree up to the rounding of the published number; a larger gap says
  the extract, the sample definition, the grouping or the model differs from the paper's.
- ``se_ratio`` = SE(reported) / SE(refit), with SE(reported) = (ln upper - ln lower) / (2 x 1.96)
  (the upper minus the lower limit for mean differences) — common practice for a symmetric Wald
  interval; ``implied_n_ratio`` = 1 / se_ratio^2 is the paper's sample size relative to the
  extract's under equal information per row.
- ``verdict``: "estimate differs" when ``disagrees``; otherwise "precision differs" when
  ``se_ratio`` lies outside [1/SE_RATIO_TOLERANCE, SE_RATIO_TOLERANCE] (1.5: the sample sizes
  differ by a factor of more than 2.25); otherwise "agrees".
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from ..models import EFFECT_SCALE, RATIO_FAMILIES
from ..refit.analysis import Refit
from ..refit.contrasts import Z95, contrast
from ..spec import Spec

TABLE = "replication"
SE_RATIO_TOLERANCE = 1.5

COLUMNS = ("contrast", "adjustment", "reported_effect", "reported_lower", "reported_upper",
           "refit_effect", "refit_lower", "refit_upper", "reported_estimate", "reported_se",
           "estimate", "se", "difference", "difference_se_units", "reported_inside_refit_ci",
           "refit_inside_reported_ci", "se_ratio", "implied_n_ratio", "disagrees", "verdict",
           "n", "events", "scale", "status", "message")


def reported_se(lower: float | None, upper: float | None, ratio: bool) -> float:
    """SE of a published estimate from its 95% interval (symmetric Wald interval on the model
    scale): (g(upper) - g(lower)) / (2 x 1.96), g = log for ratios."""
    if lower is None or upper is None:
        return float("nan")
    if ratio:
        if lower <= 0 or upper <= 0:
            return float("nan")
        return float((np.log(upper) - np.log(lower)) / (2 * Z95))
    return float((upper - lower) / (2 * Z95))


def replication_table(r: Refit, spec: Spec) -> pd.DataFrame:
    """The reported estimate beside the refit legacy estimate (empty without ``reported``)."""
    rep = r.analysis.reported
    if rep is None:
        return pd.DataFrame(columns=list(COLUMNS))
    ratio = r.family in RATIO_FAMILIES
    g = np.log if ratio else (lambda v: v)
    row: dict[str, Any] = {"contrast": rep.contrast, "adjustment": "legacy",
                           "reported_effect": rep.estimate, "reported_lower": rep.lower,
                           "reported_upper": rep.upper, "scale": EFFECT_SCALE[r.family],
                           "n": int(round(r.outcome.counted()))}  # persons: frequency weights
    if r.family != "continuous":
        row["events"] = int(round(r.outcome.counted(np.asarray(r.outcome.y, dtype=float))))
    row["reported_estimate"] = float(g(rep.estimate))
    row["reported_se"] = reported_se(rep.lower, rep.upper, ratio)
    group, ref = rep.groups()
    labels = list(r.legacy.labels)
    f = r.get("legacy", "legacy")
    problem = ""
    if group not in labels or ref not in labels:
        problem = f"the contrast {rep.contrast!r} names groups not among {labels}"
    elif f is None or not f.result.ok:
        problem = ("the legacy model could not be refitted"
                   + (f": {f.result.message}" if f is not None else ""))
    else:
        xa, xb = r.group_values(labels.index(group)), r.group_values(labels.index(ref))
        if len(xa) == 0 or len(xb) == 0:
            problem = f"group {group if len(xa) == 0 else ref!r} is empty in the extract"
    if problem:
        return pd.DataFrame([{**row, "status": "failed", "message": problem}],
                            columns=list(COLUMNS))
    assert f is not None
    est_a, se_a = contrast(f, np.array([np.median(xa)]), float(np.median(xb)))
    est, se = float(est_a[0]), float(se_a[0])
    tr = np.exp if ratio else (lambda v: v)
    lo, hi = est - Z95 * se, est + Z95 * se
    diff = est - row["reported_estimate"]
    inside = bool(lo <= row["reported_estimate"] <= hi)
    se_ratio = row["reported_se"] / se if se > 0 else float("nan")
    refit_in = (bool(rep.lower <= tr(est) <= rep.upper)
                if rep.lower is not None and rep.upper is not None else None)
    if not inside:
        verdict = "estimate differs"
    elif np.isfinite(se_ratio) and not (1 / SE_RATIO_TOLERANCE <= se_ratio <= SE_RATIO_TOLERANCE):
        verdict = "precision differs"
    else:
        verdict = "agrees"
    row.update(refit_effect=float(tr(est)), refit_lower=float(tr(lo)), refit_upper=float(tr(hi)),
               estimate=est, se=se, difference=diff,
               difference_se_units=diff / se if se > 0 else float("nan"),
               reported_inside_refit_ci=inside, refit_inside_reported_ci=refit_in,
               se_ratio=se_ratio,
               implied_n_ratio=1 / se_ratio ** 2 if np.isfinite(se_ratio) and se_ratio > 0
               else float("nan"),
               disagrees=not inside, verdict=verdict, status="ok",
               message="" if inside else "the extract may not be the data the paper used "
                                         "(or the sample, grouping or model differ)")
    out = pd.DataFrame([row], columns=list(COLUMNS))
    out["events"] = out["events"].astype("Int64")
    out["refit_inside_reported_ci"] = out["refit_inside_reported_ci"].astype("boolean")
    return out


def summary_line(df: pd.DataFrame) -> str:
    """One line: how many reported estimates were compared and which disagree."""
    if df.empty or "verdict" not in df:
        return "Replication: no reported estimates in the spec."
    parts = []
    for r in df.itertuples():
        if r.status != "ok":
            parts.append(f"{r.analysis} {r.contrast}: not refitted")
            continue
        parts.append(f"{r.analysis} {r.contrast}: reported {r.reported_effect:.3g}, refit "
                     f"{r.refit_effect:.3g} ({r.refit_lower:.3g}–{r.refit_upper:.3g}) "
                     f"{r.verdict}")
    return "Replication: " + "; ".join(parts)
