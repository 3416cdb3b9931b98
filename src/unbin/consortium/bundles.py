"""Share-safe cohort bundles: what a site sends to the coordinating centre.

A bundle holds only aggregates of one cohort's results — curves on the common grid relative to
the common reference value with their standard errors, the common-knot spline coefficients and
their covariance, the legacy (and continuous) contrasts with standard errors, n and events,
each legacy cut's percentile and the cohort median — with every count below the disclosure
threshold suppressed. No column has one entry per person. The functions here are pure: they
turn a cohort's result tables into bundle tables (``jobs`` does the reading and writing).
"""

from __future__ import annotations

import json
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from ..questions.disclosure import is_small, primary_value

if TYPE_CHECKING:
    from ..refit.analysis import Refit
    from ..spec import Spec

BUNDLE_TABLES = ("curves", "coefficients", "contrasts", "counts", "cuts")
POOLED_TABLES = ("pooled_curves", "pooled_effects", "heterogeneity", "harmonisation")
CURVE_FORMS = ("legacy", "linear", "spline", "fp", "common_spline")


COEFFICIENTS_COLUMNS = ("adjustment", "basis", "row", "col", "i", "j", "coef", "cov")
COMMON_CONTRASTS_COLUMNS = ("adjustment", "form", "contrast_type", "contrast", "x_value",
                            "x_reference", "estimate", "se", "scale")


def coefficients_table(refit: Refit, spec: Spec | None = None) -> pd.DataFrame:
    """The common-knot spline's exposure coefficients and covariance, one row per (i, j)."""
    # Also written by every job (``coefficients.parquet``) so bundles can be built from tables.
    rows = []
    for coding in ("legacy", "continuous"):
        form_fit = refit.get("common_spline", coding)
        if form_fit is None or not form_fit.result.ok:
            continue
        b, V = form_fit.exposure_coef()
        names = form_fit.exposure_names
        basis = json.dumps([t.to_dict() for t in form_fit.exposure_terms], sort_keys=True)
        for i, ni in enumerate(names):
            for j, nj in enumerate(names):
                rows.append({"adjustment": coding, "basis": basis, "row": ni, "col": nj,
                             "i": i, "j": j, "coef": float(b[i]), "cov": float(V[i, j])})
    return pd.DataFrame(rows, columns=list(COEFFICIENTS_COLUMNS))


COMMON_FORMS = ("linear", "spline", "fp", "common_spline")
COMMON_QUARTILES = "common Q3 vs Q1"


def common_contrasts_table(refit: Refit, spec: Spec | None = None) -> pd.DataFrame:
    """Each continuous form's contrasts at the common basis' values, the ones that pool."""
    # At the common exposure values of the common basis (``unbin.consortium.basis``), so that
    # every cohort estimates the same quantity and the contrasts pool: the common upper vs lower
    # quartile (``contrast_type`` "common quartiles") and each legacy group's common median vs the
    # common reference value ("common group"). NaN where a form is not defined at a value (a
    # fractional polynomial below its origin).
    from ..refit.contrasts import contrast

    basis = refit.basis
    cols = list(COMMON_CONTRASTS_COLUMNS)
    if basis is None:
        return pd.DataFrame(columns=cols)
    from ..models import EFFECT_SCALE

    q1, q3 = basis.contrast_quartiles()
    points = [("common quartiles", COMMON_QUARTILES, q3, q1)]
    ref_label = refit.legacy.labels[refit.legacy.reference]
    points += [("common group", f"{g} vs {ref_label} (common values)", v, basis.reference)
               for g, v in basis.group_values if g != ref_label]
    rows = []
    for coding in ("legacy", "continuous"):
        for form in COMMON_FORMS:
            form_fit = refit.get(form, coding)
            if form_fit is None:
                continue
            x1 = np.array([p[2] for p in points])
            x0 = np.array([p[3] for p in points])
            est, se = contrast(form_fit, x1, x0)
            for (ctype, label, a, b), e, s_ in zip(points, est, se, strict=True):
                rows.append({"adjustment": coding, "form": form, "contrast_type": ctype,
                             "contrast": label, "x_value": float(a), "x_reference": float(b),
                             "estimate": float(e), "se": float(s_),
                             "scale": EFFECT_SCALE[refit.family]})
    return pd.DataFrame(rows, columns=cols)


def make_bundle(tables: dict[str, pd.DataFrame], min_cell: int) -> dict[str, pd.DataFrame]:
    """Bundle tables from one cohort's study-level-style tables (fits, curves, effects,
    coefficients, common_contrasts, status, cutpoints); keys as in ``BUNDLE_TABLES``. The
    bundle's ``contrasts`` holds the effects table's contrasts (each cohort's own values: only
    the legacy groups' and the linear per-unit ones pool) and the contrasts at the common
    values (``common_contrasts``), which pool for every continuous form."""
    curves = tables["curves"]
    curves = curves[curves["form"].isin(CURVE_FORMS)][
        ["cohort", "analysis", "adjustment", "form", "x", "x_reference", "in_range", "estimate",
         "se", "scale"]].reset_index(drop=True)
    eff = tables["effects"]
    if "by_level" in eff:  # per-level contrasts of an effect modifier are not pooled (yet)
        eff = eff[eff["by_level"].fillna("") == ""]
    eff = eff[~eff["contrast"].str.endswith("(reference)")][
        ["cohort", "analysis", "adjustment", "form", "contrast_type", "contrast", "x_value",
         "x_reference", "estimate", "se", "scale"]]
    common = tables.get("common_contrasts")
    if common is not None and len(common):
        eff = pd.concat([eff, common[eff.columns]], ignore_index=True)
    eff = eff.reset_index(drop=True)
    coefs = tables["coefficients"].reset_index(drop=True)
    fits = tables["fits"]
    null = fits[(fits["form"] == "null") & (fits["adjustment"] == "legacy")]
    events = dict(zip(null["analysis"], null["events"], strict=True))
    status = tables["status"]
    counts = pd.DataFrame({
        "cohort": status["cohort"], "analysis": status["analysis"], "status": status["status"],
        "n": pd.array([primary_value(v, min_cell) for v in status["n_used"]], dtype="Int64"),
        "events": pd.array([primary_value(events.get(a), min_cell)
                            for a in status["analysis"]], dtype="Int64"),
    })
    cp = tables.get("cutpoints")
    if cp is not None and len(cp):
        cuts = cp[cp["row_type"] == "cut"][["cohort", "analysis", "variable", "role", "cut",
                                            "percentile", "median", "derived_from_data"]]
        cuts = cuts.reset_index(drop=True)
    else:
        cuts = pd.DataFrame(columns=["cohort", "analysis", "variable", "role", "cut",
                                     "percentile", "median", "derived_from_data"])
    return {"curves": curves, "coefficients": coefs, "contrasts": eff, "counts": counts,
            "cuts": cuts}


def bundle_problems(bundle: dict[str, pd.DataFrame], min_cell: int,
                    grid_points: int) -> list[str]:
    """Checks that a bundle is share-safe: no count below the threshold, and a shape that does
    not grow with the number of people — each curve has at most ``grid_points`` rows, and the
    other tables hold a bounded number of rows per analysis (contrasts, knots, cuts)."""
    problems = []
    curves = bundle["curves"]
    if len(curves):
        sizes = curves.groupby(["analysis", "adjustment", "form"]).size()
        if (sizes > grid_points).any():
            problems.append(f"bundle curves have more than {grid_points} rows per curve")
    for name, df in bundle.items():
        if name != "curves" and len(df) and "analysis" in df.columns:
            per = df.groupby("analysis").size().max()
            if per > 500:
                problems.append(f"bundle table {name!r} has {per} rows for one analysis")
        for col in ("n", "events"):
            if col in df.columns:
                vals = pd.to_numeric(df[col], errors="coerce").dropna()
                if is_small(vals.to_numpy(), min_cell).any():
                    problems.append(f"bundle table {name!r} column {col!r} holds a count below "
                                    f"{min_cell}")
    return problems


def coefficient_arrays(coefs: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """(b, V) of one cohort × analysis × adjustment from the long coefficient rows."""
    p = int(coefs["i"].max()) + 1
    b = np.zeros(p)
    V = np.zeros((p, p))
    for row in coefs.itertuples(index=False):
        b[row.i] = row.coef
        V[row.i, row.j] = row.cov
    return b, V
