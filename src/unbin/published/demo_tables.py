"""The demo's two invented published-only studies (Saltmere, Kettleby): older cohorts of the
same invented consortium whose rows are lost; only their papers' grouped tables of clinic
visits by body-mass index survive. Simulated with the demo's true log-linear visit rate, so the
pooled curve with them can be checked against the truth; every number is invented and seeded.

Saltmere's table gives visits and person-years per group (Greenland–Longnecker covariance) and
its reference group is the second; Kettleby's gives person-years only (Hamling effective
counts) and open-ended groups at both ends.
"""

from __future__ import annotations

from typing import Any

import numpy as np


def _table(seed: int, n: int, bmi_median: float, cuts: list[float], reference: int,
           slope: float) -> list[dict[str, Any]]:
    rng = np.random.default_rng(seed)
    bmi = np.clip(rng.lognormal(np.log(bmi_median), 0.17, n), 16, 55).round(1)
    pyears = rng.uniform(0.5, 2.0, n)
    visits = rng.poisson(1.2 * np.exp(slope * (bmi - 27)) * pyears)
    g = np.searchsorted(np.asarray(cuts), bmi, side="right")
    a = np.bincount(g, weights=visits, minlength=len(cuts) + 1)
    t = np.bincount(g, weights=pyears, minlength=len(cuts) + 1)
    rows: list[dict[str, Any]] = []
    bounds = [None, *cuts, None]
    for j in range(len(cuts) + 1):
        row: dict[str, Any] = {"lower": bounds[j], "upper": bounds[j + 1]}
        if 0 < j < len(cuts):
            row["median"] = round(float(np.median(bmi[g == j])), 1)
        row["cases"] = int(a[j])
        row["person_time"] = round(float(t[j]), 1)
        if j == reference:
            row.update(ratio=1, reference=True)
        else:
            lr = np.log((a[j] / t[j]) / (a[reference] / t[reference]))
            se = np.sqrt(1 / a[j] + 1 / a[reference])
            row.update(ratio=round(float(np.exp(lr)), 2),
                       ratio_lower=round(float(np.exp(lr - 1.959964 * se)), 2),
                       ratio_upper=round(float(np.exp(lr + 1.959964 * se)), 2))
        rows.append(row)
    return rows


def demo_published(seed: int, slope: float) -> dict[str, Any]:
    """The demo spec's ``published`` section (``slope``: the true log rate ratio per kg/m²)."""
    saltmere = _table(seed + 11, 900, 26.0, [22.0, 25.0, 30.0, 35.0], 1, slope)
    kettleby = _table(seed + 12, 700, 27.5, [25.0, 27.5, 30.0], 0, slope)
    for row in kettleby:  # the paper gave person-years per group, not the visits
        del row["cases"]
    return {"open_rule": "adjacent_width", "studies": [
        {"name": "saltmere", "analysis": "visits_bmi", "unit": "kg/m²", "scale": "RR",
         "design": "cohort_person_time", "groups": saltmere},
        {"name": "kettleby", "analysis": "visits_bmi", "unit": "kg/m²", "scale": "RR",
         "design": "cohort_person_time", "groups": kettleby},
    ]}
