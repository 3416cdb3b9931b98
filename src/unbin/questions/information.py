"""Information: how much of the exposure's association the legacy grouping keeps.

Per adjustment coding: LR chi-square of the exposure in each form (against the adjustment-only
model), the share the grouping keeps, LR(legacy) / LR(legacy + test spline), the LR test that the
test spline adds beyond the groups, the nonlinearity test (test spline vs linear) and the change
in the C-index. The share is the "information kept" of the legacy grouping: for a median split of
a normal predictor with a linear effect it tends to 2/pi (Cohen 1983).

The tests and the share use the *test spline* (``continuous.test_knots`` knots at fixed
quantiles, chosen before the outcome is seen; ``test_detail`` gives its knots), not the spline
whose knot count AIC picked: a test on a model the same data selected rejects too often (under
a linear truth with n = 300, 9-10% at the 5% level with k in {3, 4, 5} chosen by AIC;
benchmarks/checks/nonlinearity.py), and an
AIC-chosen denominator would bias the share the same way. ``lr_spline`` and ``aic_spline``
remain those of the AIC-chosen (drawn) spline.

With an effect modifier ``by`` that has levels, the LR test of the exposure x level interaction
(unbin.refit.interaction: fixed-knot spline, the level main effects in both models) is on the legacy
and continuous rows.

With sampling weights or a cluster (``weights: {kind: sampling}``, ``cluster:``) the rows are
not independent draws of a likelihood, so the likelihood-ratio statistics lose their chi-square
reference: every chi-square column (``lr_*``, ``added_lr``, ``nonlinearity_lr``) then holds
the robust Wald statistic b' V^-1 b of the same coefficients, V the (cluster-)robust covariance
(unbin.models.robust), and ``info_kept`` the ratio of those Wald statistics; ``statistic`` says
which. AIC stays that of the weighted pseudo-log-likelihood (comparable between forms fitted
to the same rows and weights only). The interaction test stays a likelihood-ratio test and
says so in ``interaction_detail``. With a quasi-Poisson count model every chi-square column is
the likelihood ratio divided by the Pearson dispersion of the coding's largest model (the
quasi-likelihood test; McCullagh & Nelder 1989, sec. 4.5)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..distributions import stats
from ..refit.analysis import FormFit, Refit
from ..refit.interaction import SPLINE, level_models
from ..spec import Spec


def _lr(a: float, b: float) -> float:
    return float(2 * (a - b)) if np.isfinite(a) and np.isfinite(b) else float("nan")


def _p(chi2: float, df: int) -> float:
    return float(stats.chi2.sf(max(chi2, 0.0), df)) if df > 0 and np.isfinite(chi2) else np.nan


def _wald(f: FormFit | None, names: tuple[str, ...]) -> float:
    """Wald chi-square b' V^-1 b of the named coefficients of a fit (its own covariance)."""
    if f is None or not f.result.ok:
        return np.nan
    if not names:
        return 0.0
    idx = f.result.index(names)
    b = f.result.coef[idx]
    V = f.result.cov[np.ix_(idx, idx)]
    try:
        return float(b @ np.linalg.solve(V, b))
    except np.linalg.LinAlgError:
        return np.nan


def _quasi_scale(r: Refit, get: dict[str, FormFit | None]) -> float | None:
    """The Pearson dispersion of a coding's largest model (legacy + test spline, else the test
    spline, else adjustment only) when the count model is quasi-Poisson; one value per coding,
    so that info_kept is the plain likelihood ratios' ratio."""
    if r.family != "count" or r.analysis.outcome.count_model != "quasi-poisson":
        return None
    for form in ("legacy+test_spline", "test_spline", "null"):
        f = get.get(form)
        if f is not None and f.result.ok and "dispersion" in f.result.extra:
            return float(f.result.extra["dispersion"])
    return None


def statistic_name(r: Refit) -> str:
    """'likelihood ratio', 'likelihood ratio / Pearson scale' (quasi-Poisson), or the robust
    Wald statistic with its covariance named."""
    if not r.analysis.robust:
        if r.family == "count" and r.analysis.outcome.count_model == "quasi-poisson":
            return "likelihood ratio / Pearson scale (quasi-Poisson)"
        return "likelihood ratio"
    labels = {f.result.extra.get("variance") for f in r.fits if f.result.ok}
    labels.discard(None)
    label = next(iter(sorted(str(v) for v in labels)), "robust")
    return f"robust Wald ({label} variance)"


COLUMNS = ("adjustment", "statistic", "lr_legacy", "df_legacy", "lr_linear", "df_linear", "lr_spline",
           "df_spline", "lr_fp", "fp_detail", "lr_test_spline", "df_test_spline", "test_detail",
           "lr_legacy_plus_spline", "info_kept", "added_lr", "added_df", "added_p",
           "nonlinearity_lr", "nonlinearity_df", "nonlinearity_p", "c_legacy", "c_linear",
           "c_spline", "c_fp", "delta_c", "aic_legacy", "aic_linear", "aic_spline", "aic_fp",
           "best_form", "interaction_lr", "interaction_df", "interaction_p", "interaction_detail")


def information_table(r: Refit, spec: Spec | None = None) -> pd.DataFrame:
    """Per adjustment coding: each form's LR chi-square, info_kept, the tests, C and AIC."""
    rows = []
    robust = r.analysis.robust
    statistic = statistic_name(r)
    for coding in ("legacy", "continuous", "none"):
        get = {form: r.get(form, coding) for form in
               ("null", "legacy", "linear", "spline", "fp", "test_spline",
                "legacy+test_spline")}
        null = get["null"]
        if null is None:
            continue
        ll0 = null.result.loglik if null.result.ok else np.nan

        def ll(form: str, get: dict[str, FormFit | None] = get) -> float:
            f = get[form]
            return f.result.loglik if f is not None and f.result.ok else np.nan

        def dfe(form: str, get: dict[str, FormFit | None] = get) -> int:
            f = get[form]
            return sum(t.df for t in f.exposure_terms) if f is not None else 0

        def cix(form: str, get: dict[str, FormFit | None] = get) -> float:
            f = get[form]
            if f is None or not f.result.ok:
                return np.nan
            return f.concordance(r.outcome)

        forms = ("legacy", "linear", "spline", "fp", "test_spline", "legacy+test_spline")
        test = get["test_spline"]
        # Tests on the test spline (knots fixed in advance), never on the AIC-chosen one.
        added_df = (dfe("legacy+test_spline") - dfe("legacy")
                    if get["legacy+test_spline"] is not None else 0)
        nonlin_df = dfe("test_spline") - 1 if test is not None else 0
        if robust:  # robust Wald statistics of the same coefficients (see the module notes)
            lr = {form: _wald(f, f.exposure_names) if (f := get[form]) is not None
                  else np.nan for form in forms}
            added = _wald(get["legacy+test_spline"], test.exposure_names) if test else np.nan
            nonlin = _wald(test, test.exposure_names[1:]) if test else np.nan
        else:
            lr = {form: _lr(ll(form), ll0) for form in forms}
            added = _lr(ll("legacy+test_spline"), ll("legacy"))
            nonlin = _lr(ll("test_spline"), ll("linear"))
            phi = _quasi_scale(r, get)
            if phi is not None:  # quasi-Poisson: LR / phi (McCullagh & Nelder 1989, sec. 4.5)
                lr = {form: v / phi for form, v in lr.items()}
                added, nonlin = added / phi, nonlin / phi
        aics = {form: f.result.aic for form in ("legacy", "linear", "spline", "fp")
                if (f := get[form]) is not None and f.result.ok}
        best = min(aics, key=lambda k: aics[k]) if aics else ""
        full = lr["legacy+test_spline"]
        rows.append({
            "adjustment": coding,
            "statistic": statistic,
            "lr_legacy": lr["legacy"], "df_legacy": dfe("legacy"),
            "lr_linear": lr["linear"], "df_linear": dfe("linear"),
            "lr_spline": lr["spline"], "df_spline": dfe("spline"),
            "lr_fp": lr["fp"], "fp_detail": get["fp"].detail if get["fp"] is not None else "",
            "lr_test_spline": lr["test_spline"], "df_test_spline": dfe("test_spline"),
            "test_detail": test.detail if test is not None else "",
            "lr_legacy_plus_spline": full,
            "info_kept": lr["legacy"] / full if full and np.isfinite(full) and full > 0 else np.nan,
            "added_lr": added, "added_df": added_df, "added_p": _p(added, added_df),
            "nonlinearity_lr": nonlin, "nonlinearity_df": nonlin_df,
            "nonlinearity_p": _p(nonlin, nonlin_df),
            "c_legacy": cix("legacy"), "c_linear": cix("linear"), "c_spline": cix("spline"),
            "c_fp": cix("fp"),
            "delta_c": cix("spline") - cix("legacy"),
            "aic_legacy": aics.get("legacy", np.nan), "aic_linear": aics.get("linear", np.nan),
            "aic_spline": aics.get("spline", np.nan), "aic_fp": aics.get("fp", np.nan),
            "best_form": best,
            **_interaction(r, coding, robust),
        })
    return pd.DataFrame(rows, columns=list(COLUMNS))


def _interaction(r: Refit, coding: str, robust: bool = False) -> dict[str, object]:
    """The spline x level interaction test of this coding (unbin.refit.interaction): the fixed-knot
    spline with and without its level interactions, both with the level main effects."""
    lm = level_models(r)
    m = lm.get(SPLINE, coding)
    if m is None:
        why = "" if not r.analysis.by else (lm.reason if coding != "none" else
                                            "no adjustment, so no level main effects")
        return {"interaction_lr": np.nan, "interaction_df": np.nan, "interaction_p": np.nan,
                "interaction_detail": why}
    detail = m.detail if m.ok else f"{m.detail}: failed ({m.reason})"
    if robust:
        detail += "; likelihood-ratio test (not robust to the weights or clusters)"
    return {"interaction_lr": m.lr, "interaction_df": float(m.df) if m.df else np.nan,
            "interaction_p": m.p, "interaction_detail": detail}
