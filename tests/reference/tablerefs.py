"""Independent references for the tables people read (effects, curves, fits).

Every design column is rebuilt here from the fits table's recorded bases (``exposure_basis`` and
``adjustment_terms`` JSON) with formulas written out in this file, never with unbin's terms, and
refitted with a reference library: statsmodels (GLM binomial, GLM Poisson with a log
person-time offset, OLS, PHReg with Efron ties). Contrasts are then the delta
method written out here: for the exposure columns B and their coefficients b (covariance V),
contrast(x1, x0) = (B(x1) - B(x0)) b with variance d V d'. The restricted cubic spline is built
in Harrell's unnormalised form, a different parameterisation from unbin's (columns scaled by
(t_k - t_1)^2), so agreement is a check of the fitted function, not of shared code.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

Z975 = 1.959963984540054  # the standard normal 97.5% quantile


def rcs_columns(x: np.ndarray, knots: list[float]) -> np.ndarray:
    """Restricted cubic spline, Harrell's published form without normalisation (Harrell,
    Regression Modeling Strategies, 2nd ed. 2015; Durrleman & Simon 1989, Stat Med 8:551):
    x, then for j = 1..k-2
    (x-t_j)+^3 - (x-t_{k-1})+^3 (t_k-t_j)/(t_k-t_{k-1}) + (x-t_k)+^3 (t_{k-1}-t_j)/(t_k-t_{k-1})."""
    x = np.asarray(x, dtype=float)
    t = [float(v) for v in knots]
    k = len(t)
    cols = [x]
    for j in range(k - 2):
        cols.append(np.maximum(x - t[j], 0) ** 3
                    - np.maximum(x - t[k - 2], 0) ** 3 * (t[k - 1] - t[j]) / (t[k - 1] - t[k - 2])
                    + np.maximum(x - t[k - 1], 0) ** 3 * (t[k - 2] - t[j]) / (t[k - 1] - t[k - 2]))
    return np.column_stack(cols)


def group_index(x: np.ndarray, cuts: list[float], closed: str) -> np.ndarray:
    """Group number 0..len(cuts) by counting the cuts below each value (README cut semantics:
    closed left puts a value equal to a cut in the group above, closed right in the group below)."""
    x = np.asarray(x, dtype=float)[:, None]
    c = np.asarray(cuts, dtype=float)[None, :]
    return (x >= c).sum(axis=1) if closed == "left" else (x > c).sum(axis=1)


def fp_columns(x: np.ndarray, powers: list[float], shift: float, scale: float) -> np.ndarray:
    """Fractional polynomial columns (Royston & Altman 1994): z = (x + shift) / scale, z^p with
    z^0 = log z, and a repeated power multiplied by log z."""
    z = (np.asarray(x, dtype=float) + shift) / scale
    cols: list[np.ndarray] = []
    for i, p in enumerate(powers):
        col = np.log(z) if p == 0 else z ** p
        if i > 0 and p == powers[i - 1]:
            col = cols[-1] * np.log(z)
        cols.append(col)
    return np.column_stack(cols)


def term_columns(term: dict[str, Any], values: Any) -> np.ndarray:
    """The columns of one recorded term (a dict from the fits table's JSON) at ``values``."""
    kind = term["term"]
    if kind == "linear":
        return np.asarray(values, dtype=float).reshape(-1, 1)
    if kind == "spline":
        return rcs_columns(values, term["knots"])
    if kind == "grouped":
        g = group_index(values, term["cuts"], term["closed"])
        ref = term["labels"].index(term["reference"])
        others = [j for j in range(len(term["labels"])) if j != ref]
        return np.column_stack([(g == j).astype(float) for j in others])
    if kind == "categorical":
        s = pd.Series(values).astype(str).to_numpy()
        return np.column_stack([(s == lv).astype(float) for lv in term["levels"][1:]])
    if kind == "fp":
        return fp_columns(values, term["powers"], term["shift"], term["scale"])
    raise AssertionError(f"unknown recorded term {kind!r}")


def terms_design(terms: list[dict[str, Any]], frame: pd.DataFrame) -> np.ndarray:
    cols = [term_columns(t, frame[t["variable"]].to_numpy()) for t in terms]
    return np.column_stack(cols) if cols else np.zeros((len(frame), 0))


@dataclass
class Reference:
    """A reference-library fit of one recorded model: its exposure terms and their estimates."""

    exposure: list[dict[str, Any]]
    b: np.ndarray  # exposure coefficients
    V: np.ndarray  # their covariance
    loglik: float
    n_params: int  # parameters the library estimated (incl. intercept, OLS variance)
    aic: float | None = None  # the library's own AIC/BIC where it reports them
    bic: float | None = None
    lp: np.ndarray | None = None  # the linear predictor (without intercept/offset)

    def basis(self, x: Any) -> np.ndarray:
        x = np.atleast_1d(np.asarray(x, dtype=float))
        if not self.exposure:
            return np.zeros((x.size, 0))
        return np.column_stack([term_columns(t, x) for t in self.exposure])

    def contrast(self, x1: Any, x0: Any) -> tuple[np.ndarray, np.ndarray]:
        x1 = np.atleast_1d(np.asarray(x1, dtype=float))
        x0 = np.broadcast_to(np.atleast_1d(np.asarray(x0, dtype=float)), x1.shape)
        if self.b.size == 0:
            return np.zeros(x1.shape), np.zeros(x1.shape)
        D = self.basis(x1) - self.basis(x0)
        return D @ self.b, np.sqrt(np.einsum("ij,jk,ik->i", D, self.V, D))


def reference_fit(row: pd.Series, frame: pd.DataFrame, family: str, exposure: str,
                  outcome: dict[str, str]) -> Reference:
    """Refit the model of one fits-table row with the reference library of its family."""
    import statsmodels.api as sm

    exp_terms = json.loads(row["exposure_basis"])
    adj_terms = json.loads(row["adjustment_terms"])
    E = terms_design(exp_terms, frame)
    A = terms_design(adj_terms, frame)
    X = np.column_stack([E, A])
    p = E.shape[1]
    if family == "survival":
        # statsmodels PHReg with Efron ties. (lifelines' CoxPHFitter stops short of the maximum
        # on some 5-knot spline designs here, with a ConvergenceWarning and a log-likelihood
        # ~10-20 below PHReg's and unbin's; it is used directly in test_fits on designs where it
        # converges.) Columns divided by their SD for the iterations, then transformed back.
        sd = X.std(axis=0)
        res = sm.PHReg(frame[outcome["time"]].to_numpy(float), X / sd,
                       status=frame[outcome["event"]].to_numpy(float), ties="efron"
                       ).fit(tol=1e-12)
        params = np.asarray(res.params) / sd
        cov = np.asarray(res.cov_params()) / np.outer(sd, sd)
        return Reference(exp_terms, params[:p], cov[:p, :p], float(res.llf), X.shape[1],
                         lp=X @ params)
    Xc = sm.add_constant(X, has_constant="add")
    if family == "binary":
        res = sm.GLM(frame[outcome["event"]].to_numpy(float), Xc,
                     family=sm.families.Binomial()).fit(tol=1e-12)
        extra = 0
    elif family == "count":
        res = sm.GLM(frame[outcome["count"]].to_numpy(float), Xc, family=sm.families.Poisson(),
                     offset=np.log(frame[outcome["persontime"]].to_numpy(float))).fit(tol=1e-12)
        extra = 0
    else:
        res = sm.OLS(frame[outcome["value"]].to_numpy(float), Xc).fit()
        extra = 1  # the residual variance, estimated too
    params = np.asarray(res.params)
    cov = np.asarray(res.cov_params())
    k = Xc.shape[1] + extra
    return Reference(exp_terms, params[1:p + 1], cov[1:p + 1, 1:p + 1], float(res.llf), k,
                     aic=float(res.aic), lp=X @ params[1:])


def lifelines_fit(row: pd.Series, frame: pd.DataFrame, outcome: dict[str, str]) -> Reference:
    """The Cox model of one fits-table row refitted with lifelines' CoxPHFitter (Efron ties),
    iterated to precision 1e-14 (any ConvergenceWarning fails the test: warnings are errors)."""
    from lifelines import CoxPHFitter

    exp_terms = json.loads(row["exposure_basis"])
    E = terms_design(exp_terms, frame)
    X = np.column_stack([E, terms_design(json.loads(row["adjustment_terms"]), frame)])
    sd = X.std(axis=0)
    cols = [f"c{j}" for j in range(X.shape[1])]
    d = pd.DataFrame(X / sd, columns=cols)
    d["T"] = frame[outcome["time"]].to_numpy(float)
    d["E"] = frame[outcome["event"]].to_numpy(float)
    cph = CoxPHFitter().fit(d, duration_col="T", event_col="E",
                            fit_options={"precision": 1e-14, "r_precision": 1e-16})
    params = cph.params_.to_numpy() / sd
    cov = cph.variance_matrix_.to_numpy() / np.outer(sd, sd)
    p = E.shape[1]
    return Reference(exp_terms, params[:p], cov[:p, :p], float(cph.log_likelihood_), X.shape[1],
                     aic=float(cph.AIC_partial_), lp=X @ params)


def selected_row(fits: pd.DataFrame, form: str, adjustment: str) -> pd.Series:
    """The fits-table row of the model the effects and curves tables read for (form,
    adjustment): the selected one (the spline k chosen by AIC, the FP chosen by the closed test)."""
    rows = fits[(fits["form"] == form) & (fits["adjustment"] == adjustment) & fits["selected"]]
    assert len(rows) == 1, (form, adjustment, len(rows))
    return rows.iloc[0]


def auc_pairs(y: np.ndarray, score: np.ndarray) -> float:
    """AUC by counting every (event, non-event) pair: concordant 1, tied 1/2 (Hanley & McNeil
    1982)."""
    y = np.asarray(y, dtype=bool)
    s1, s0 = score[y][:, None], score[~y][None, :]
    return float(((s1 > s0).sum() + 0.5 * (s1 == s0).sum()) / (s1.size * s0.size))


def harrell_c_pairs(time: np.ndarray, event: np.ndarray, risk: np.ndarray) -> float:
    """Harrell's C by looping over pairs (Harrell, Califf, Pryor, Lee & Rosati 1982): a pair is
    usable when the shorter time is an event; concordant when the shorter time has the higher
    risk; tied risks count 1/2; pairs tied in time are not usable unless exactly one of them
    is an event, which then counts as the shorter (common practice)."""
    n = len(time)
    num = den = 0.0
    for i in range(n):
        if not event[i]:
            continue
        for j in range(n):
            if i == j:
                continue
            if time[i] < time[j] or (time[i] == time[j] and not event[j]):
                den += 1
                if risk[i] > risk[j]:
                    num += 1
                elif risk[i] == risk[j]:
                    num += 0.5
    return num / den if den else math.nan


# --------------------------------------------------------------------------- invented data

OUTCOMES: dict[str, dict[str, str]] = {
    "binary": {"type": "binary", "event": "flare"},
    "count": {"type": "count", "count": "visits", "persontime": "years"},
    "continuous": {"type": "continuous", "value": "score"},
    "survival": {"type": "survival", "time": "years", "event": "flare"},
}
# The legacy grouping of the invented marker: q25 (~2.9) and q75 (~8.1) of its gamma(2, 3)
# distribution fall in different groups, and the reference is a middle group.
MARKER_GROUPING: dict[str, Any] = {"cuts": [2.5, 5.0, 9.0], "reference": "5-<9"}


def marker_effect(x: np.ndarray) -> np.ndarray:
    """The invented true effect of the marker on the linear-predictor scale: a bend near 6."""
    return 0.25 * np.log1p(np.asarray(x, dtype=float)) + 0.02 * np.maximum(x - 6.0, 0)


def clinic_frame(family: str, n: int, seed: int, censor_max: float = 8.0) -> pd.DataFrame:
    """An invented clinic registry: marker (gamma), age, sex, and one outcome of ``family``
    (survival: censoring uniform on 0.5 to ``censor_max`` years)."""
    rng = np.random.default_rng(seed)
    marker = rng.gamma(2.0, 3.0, n)
    age = rng.uniform(25.0, 80.0, n).round(1)
    sex = rng.integers(0, 2, n).astype(float)
    lp = marker_effect(marker) + 0.015 * (age - 50.0) + 0.2 * sex
    df = pd.DataFrame({"marker": marker, "age": age, "sex": sex})
    if family == "binary":
        df["flare"] = (rng.random(n) < 1 / (1 + np.exp(-(lp - 1.2)))).astype(float)
    elif family == "count":
        df["years"] = rng.uniform(0.3, 4.0, n)
        df["visits"] = rng.poisson(np.exp(lp - 0.5) * df["years"]).astype(float)
    elif family == "continuous":
        df["score"] = 10.0 + 4.0 * lp + rng.normal(0.0, 2.0, n)
    else:
        t_event = rng.exponential(1.0 / (0.15 * np.exp(lp)))
        censor = rng.uniform(0.5, censor_max, n)
        df["years"] = np.minimum(t_event, censor)
        df["flare"] = (t_event <= censor).astype(float)
    return df
