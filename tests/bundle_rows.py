"""Rows of hand-made bundles for the pooled-table tests (imported as ``bundle_rows``; tests/ is on
the import path): curves, spline coefficients, contrasts and legacy cuts in the
shapes the cohorts' bundles carry, and the restricted cubic spline basis written out."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd


def curve_rows(cohort: str, analysis: str, xs: np.ndarray, est: np.ndarray, se: np.ndarray,
               in_range: np.ndarray, form: str = "spline", ref: float = 2.0) -> pd.DataFrame:
    return pd.DataFrame({"cohort": cohort, "analysis": analysis, "adjustment": "legacy",
                         "form": form, "x": xs, "x_reference": ref, "in_range": in_range,
                         "estimate": est, "se": se, "scale": "odds ratio"})


def coef_rows(cohort: str, analysis: str, b: np.ndarray, V: np.ndarray,
              knots: list[float]) -> pd.DataFrame:
    basis = json.dumps([{"term": "spline", "variable": "x", "knots": knots}], sort_keys=True)
    return pd.DataFrame([{"cohort": cohort, "analysis": analysis, "adjustment": "legacy",
                          "basis": basis, "row": f"c{i}", "col": f"c{j}", "i": i, "j": j,
                          "coef": b[i], "cov": V[i, j]}
                         for i in range(len(b)) for j in range(len(b))])


def contrast_row(cohort: str, form: str, ctype: str, label: str, est: float, se: float,
                 xv: float = np.nan, xr: float = np.nan) -> dict[str, object]:
    return {"cohort": cohort, "analysis": "a", "adjustment": "legacy", "form": form,
            "contrast_type": ctype, "contrast": label, "x_value": xv, "x_reference": xr,
            "estimate": est, "se": se, "scale": "odds ratio"}


def cut_rows(cohort: str, cuts: list[float], median: float, role: str = "exposure",
             variable: str = "x", first_percentile: float = 40.0) -> list[dict[str, object]]:
    return [{"cohort": cohort, "analysis": "a", "variable": variable, "role": role, "cut": c,
             "percentile": first_percentile + 10 * j, "median": median,
             "derived_from_data": False}
            for j, c in enumerate(cuts)]


def rcs_basis(x: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Restricted cubic spline basis, Durrleman & Simon 1989 (Stat Med 8:551), written out."""
    k = len(t)
    cols = [x]
    for j in range(k - 2):
        s = (np.maximum(x - t[j], 0) ** 3
             - np.maximum(x - t[k - 2], 0) ** 3 * (t[k - 1] - t[j]) / (t[k - 1] - t[k - 2])
             + np.maximum(x - t[k - 1], 0) ** 3 * (t[k - 2] - t[j]) / (t[k - 1] - t[k - 2]))
        cols.append(s / (t[k - 1] - t[0]) ** 2)
    return np.column_stack(cols)
