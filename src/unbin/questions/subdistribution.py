"""Subdistribution: the exposure's effect on the Fine–Gray subdistribution hazard (survival
analyses with ``outcome.competing``; other analyses give an empty table).

The legacy groups and each continuous form (linear, the AIC-chosen spline, the chosen FP) are
refitted, under each adjustment coding, as Fine–Gray models of the same design (unbin.models.
competing: the weighted Cox fit of the counting-process expansion, computed without building it,
cluster-robust covariance by person; Fine & Gray 1999, Geskus 2011). Per form and non-reference
legacy group: the contrast between the group's median exposure and the reference group's median
(for the legacy form the group's own indicator), as a subdistribution hazard ratio, beside the
cause-specific hazard ratio of the same contrast from the analysis' own Cox fit (competing events
censored). The two answer different questions: the cause-specific ratio is about the rate of the
event among those still free of any event; the subdistribution ratio is about the cumulative
incidence (who has had the event by a time), which the risk at the horizon, the implied thresholds
and the net benefit use (Putter, Fiocco & Geskus 2007). Counts of events below ``min_cell`` are
suppressed.

Variance (``outcome.subdistribution_variance``, the ``variance`` column): ``sandwich`` (the
default) is the cluster-robust covariance with the estimated censoring and entry weights' terms;
``bootstrap`` the covariance of the Fine–Gray coefficients over ``resampling.bootstrap`` resamples
of the persons (of the clusters when the analysis has them), the weights re-estimated in each and
the refits started at the estimate (``unbin.models.competing.fine_gray_bootstrap_cov``; Efron &
Tibshirani 1993), drawn from the spec's generator for this analysis (``Spec.rng``), the same
resamples for every form and coding; ``bootstrap_ok`` counts the refitted resamples. With fewer
than half of them refitted the row keeps its estimate but has no standard error, and fails. The
Wald limits then use the bootstrap standard error. Without a spec (direct calls) the sandwich is
used."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd

from ..models.base import FitResult
from ..refit.analysis import FormFit, Refit, design
from ..refit.contrasts import contrast, with_interval
from ..refit.risk import fine_gray_fit
from ..spec import Spec
from .disclosure import primary_value

PURPOSE = "subdistribution-bootstrap"  # the Spec.rng purpose of the bootstrap draws

COLUMNS = ("form", "adjustment", "group", "x_value", "x_reference", "estimate", "se", "lower",
           "upper", "effect", "effect_lower", "effect_upper", "cs_effect", "cs_effect_lower",
           "cs_effect_upper", "events", "competing_events", "expanded_rows", "scale",
           "variance", "bootstrap_ok", "detail", "status", "message")
FORMS = ("legacy", "linear", "spline", "fp")
CODINGS = ("legacy", "continuous", "none")
SCALE = "subdistribution hazard ratio"


def subdistribution_table(r: Refit, spec: Spec | None = None) -> pd.DataFrame:
    """Fine–Gray subdistribution hazard ratios of the legacy and continuous forms."""
    o = r.outcome
    if o.cause is None:
        return pd.DataFrame(columns=list(COLUMNS))
    cause = np.asarray(o.cause)
    floor = spec.min_cell if spec is not None else 0
    counts = {"events": int(np.sum(cause == o.event_of_interest)),
              "competing_events": int(np.sum((cause != 0) & (cause != o.event_of_interest)))}
    shown = {k: primary_value(v, floor) for k, v in counts.items()}
    variance = r.analysis.outcome.subdistribution_variance if spec is not None else "sandwich"
    rows: list[dict[str, object]] = []
    for coding in CODINGS:
        for form in FORMS:
            f = r.get(form, coding)
            if f is not None:
                rows += _form_rows(r, f, form, coding, shown, spec if variance == "bootstrap"
                                   else None)
    out = pd.DataFrame(rows)
    for c in ("estimate", "se", "cs_estimate", "cs_se"):  # absent when every form failed
        out[c] = pd.to_numeric(out[c], errors="coerce") if c in out else np.nan
    out = with_interval(out, "survival")
    out = with_interval(out, "survival", prefix="cs_")
    out["scale"] = SCALE
    out = out.reindex(columns=list(COLUMNS))
    for c in ("events", "competing_events", "expanded_rows", "bootstrap_ok"):
        out[c] = pd.array(out[c], dtype="Int64")
    return out


def bootstrapped(r: Refit, f: FormFit, g: FitResult, spec: Spec) -> tuple[FitResult, str]:
    """The Fine–Gray fit ``g`` of form ``f`` with its covariance replaced by the bootstrap one
    (module docstring; kept in the outcome's cache), and a message when too few resamples
    were refitted (the covariance is then NaN)."""
    from ..models.competing import fine_gray_bootstrap_cov

    o = r.outcome
    assert o.cause is not None
    B = spec.resampling.bootstrap
    key = f"fine_gray_bootstrap:{B}:" + "|".join(repr(t) for t in (*f.exposure_terms,
                                                                    *f.adjust_terms))
    cached = o.cache.get(key)
    if cached is None:
        X, names = design(r.sample.frame, r.x, f.exposure_terms, f.adjust_terms)
        cached = fine_gray_bootstrap_cov(X, o, o.cause, o.event_of_interest, names, B,
                                         spec.rng(r.analysis.name, PURPOSE), init=g.coef)
        o.cache[key] = cached
    cov, failed = cached
    done = B - failed
    message = ""
    if done < max(2, B // 2):
        cov = np.full_like(g.cov, np.nan)
        message = (f"only {done} of {B} bootstrap resamples could be refitted; no standard "
                   "error (use outcome.subdistribution_variance: sandwich)")
    extra = {**g.extra, "robust_cov": g.cov, "bootstrap": B, "bootstrap_failed": failed}
    return replace(g, cov=cov, extra=extra), message


def _form_rows(r: Refit, f: FormFit, form: str, coding: str, shown: dict[str, float],
               boot_spec: Spec | None) -> list[dict[str, object]]:
    base: dict[str, object] = {"form": form, "adjustment": coding, "detail": f.detail,
                               "variance": "bootstrap" if boot_spec else "sandwich", **shown}
    if not f.result.ok:
        return [{**base, "status": "failed", "message": f"the Cox fit failed: {f.result.message}"}]
    g = fine_gray_fit(r, f)
    if not g.ok:
        return [{**base, "status": "failed", "message": f"Fine–Gray: {g.message}"}]
    problem = ""
    if boot_spec is not None:
        g, problem = bootstrapped(r, f, g, boot_spec)
        base["bootstrap_ok"] = boot_spec.resampling.bootstrap - int(g.extra["bootstrap_failed"])
    sub = replace(f, result=g)
    ref = r.reference_value
    labels = r.legacy.labels
    groups = [j for j in range(len(labels)) if j != r.legacy.reference]
    x1 = np.array([float(np.median(r.group_values(j))) if r.group_values(j).size else np.nan
                   for j in groups])
    est, se = contrast(sub, x1, ref)
    cs_est, cs_se = contrast(f, x1, ref)
    return [{**base, "group": labels[j], "x_value": x1[i], "x_reference": ref,
             "estimate": est[i], "se": se[i], "cs_estimate": cs_est[i], "cs_se": cs_se[i],
             "expanded_rows": g.extra.get("expanded_rows"),
             "status": "failed" if problem else "ok",
             "message": problem or ("" if np.isfinite(est[i]) else "outside the form's domain")}
            for i, j in enumerate(groups)]
