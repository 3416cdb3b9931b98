"""Information kept, with a bootstrap interval: how sure the share of the exposure's association
that the legacy grouping keeps is.

Per adjustment coding (the ``information`` table's: legacy, continuous, none), the share kept is

    info_kept = LR(legacy) / LR(legacy + test spline),

each LR the likelihood-ratio chi-square of the exposure against the adjustment-only (null) model,
exactly as the ``information`` table computes it (the same designs, the same fitter, so the point
estimates are equal). With sampling weights or a cluster each LR is replaced, as in the
``information`` table, by the robust Wald statistic b' V^-1 b of the exposure's coefficients, V
the (cluster-)robust covariance. Its interval is the percentile interval over
``resampling.bootstrap`` replicates (Efron & Tibshirani 1993, ch. 13) that resample the
analysis' design (``unbin.models.weighted.design_resample_weights``, from the spec's seeded
generator, so a rerun gives the same draws): n rows with replacement; with ``cluster`` whole
clusters (G of the G, Davison & Hinkley 1997, sec. 3.8; Field & Welsh 2007); every drawn copy
keeps its sampling or frequency weight; with frequency weights and no cluster the N = sum w
individuals the rows stand for. Each replicate refits the null, legacy and legacy + test
spline models of every coding on the drawn data and forms the replicate's share with the
point estimate's statistic: from the log-likelihoods, or from robust Wald statistics with the
replicate's own sandwich (``unbin.models.weighted.glm_robust_wald``, ``cox_robust_wald``: a
cluster drawn k times counts as k clusters, with the G / (G - 1) factor). The
replicates are shared by all codings and models. The legacy cuts and the test spline's knots stay
as in the full sample (the spline was fixed before the outcome was seen; the cuts are the paper's).

Refits: the linear, logistic and Poisson models by the vectorised Newton solver on frequency
weights (``unbin.models.weighted.WeightedGLM``), started at the full-sample estimate; negative
binomial (NB2) count models by the analysis' own fitter on each drawn data set
(``unbin.models.drawn_refits``: the same estimator as the point estimate's, alpha re-estimated,
the LR from the NB2 log-likelihoods, a robust Wald statistic from the refit's own sandwich); Cox models
on the drawn rows repeated as often as drawn (Efron ties), started there too, by quasi-Newton
(secant) steps (``unbin.models.cox.refit_replicates`` for many replicates at once; one at a
time ``unbin.models.cox.replicate_loglik.refit_replicate_loglik``, stopped once the next
step's predicted gain in log partial likelihood is at most 1e-6; ``unbin.models.cox.fit_cox``
where they do not settle; a repeated row counts as tied events, as in the full-sample
likelihood). The replicate
log-likelihoods are the frequency-weighted ones: logistic sum w (y eta - log(1 + e^eta)); Poisson
sum w (y eta - mu) (the log y! term cancels in the LR); linear -N/2 log(RSS / N) with N = sum w
and RSS the weighted residual sum of squares (the maximum-likelihood variance, as the full-sample
fit's); Cox the log partial likelihood. A replicate in which a model fails (a design column
without variation among the drawn rows, no convergence, fitted risks running to 0 or 1) or whose
LR(legacy + test spline) is not positive is left out (``replicates_used`` counts the rest).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..models.base import FitResult, Outcome
from ..models.compiled import wanted
from ..models.drawn_refits import drawn_fits, needs_own_fitter
from ..models.percentile_limits import percentile_limits
from ..models.weighted import (
    _BATCH_ROWS,
    _CHUNK_CELLS,
    Replicates,
    WeightedGLM,
    Weights,
    as_replicates,
    cox_near_starts,
    cox_replicate_refits,
    cox_robust_wald,
    design_resample_replicates,
    glm_robust_wald,
    replicate_clusters,
    replicate_rows,
    resampled_cox_samples,
)
from ..refit.analysis import (
    ADJUSTMENTS,
    Refit,
    adjustment_terms,
    design,
    test_spline_term,
)
from ..refit.sampling_design import bootstrap_reason
from ..spec import Spec
from ..terms import Term
from .job_fits import job_fit

TABLE = "information_bootstrap"
LEVEL = 0.95
MIN_REPLICATES = 10  # fewer usable replicates than this: no interval (common practice)
FORMS = ("null", "legacy", "legacy+test_spline")


@dataclass
class _Model:
    X: np.ndarray
    res: FitResult
    k: int = 0  # the exposure is X's first k columns

    def wald(self) -> float:
        """The Wald statistic of the exposure's coefficients with the fit's own (robust)
        covariance, as the ``information`` table forms it; 0 without exposure columns."""
        if self.k == 0:
            return 0.0
        lo = 0 if self.res.family == "survival" else 1
        b = self.res.coef[lo:lo + self.k]
        V = self.res.cov[lo:lo + self.k, lo:lo + self.k]
        try:
            return float(b @ np.linalg.solve(V, b))
        except np.linalg.LinAlgError:
            return float("nan")


def _empty_groups(r: Refit) -> str:
    counts = np.bincount(r.legacy.codes(r.x), minlength=len(r.legacy.labels))
    empty = [r.legacy.labels[j] for j in range(len(r.legacy.labels)) if counts[j] == 0]
    if not empty:
        return ""
    return (f"legacy group(s) {empty} of {r.legacy.variable!r} are empty in the analysis sample "
            f"(cuts {list(r.legacy.cuts)}); the share kept cannot be estimated. Check the cuts "
            "against the data's range.")


def glm_logliks(family: str, X: np.ndarray, coef: np.ndarray, outcome: Outcome,
                W: Weights) -> np.ndarray:
    """The frequency-weighted log-likelihood (up to a constant that cancels in an LR between
    models of the same outcome) of each replicate: coefficients ``coef`` (B, p + 1, intercept
    first) on weights ``W`` (B, n; float64 or compact, ``unbin.models.weighted.Replicates``),
    summed a block of rows at a time (the (B x rows) temporaries stay in cache). NaN where
    the coefficients are."""
    y = np.asarray(outcome.y, dtype=float)
    R = as_replicates(W)
    X = np.asarray(X, dtype=float)
    coef = np.atleast_2d(np.asarray(coef, dtype=float))
    B, n = coef.shape[0], len(y)
    sums = np.zeros((B, 2))  # the terms' sum; linear: the weights' and the squares' sums
    rows = max(1024, _LL_CELLS // max(B, 1))
    if family != "continuous" and wanted(n, LOGLIK_FROM_ROWS):
        return _glm_logliks_compiled(family, X, coef, outcome, R, y, rows)
    with np.errstate(invalid="ignore"):  # a failed replicate's NaN coefficients stay NaN
        for r0 in range(0, n, rows):
            sl = slice(r0, min(n, r0 + rows))
            sums += _glm_loglik_sums(family, X[sl], coef, outcome, sl, R.block(slice(None), sl),
                                     y[sl])
        if family == "continuous":  # the profile log-likelihood at the ML variance
            N, rss = sums[:, 0], sums[:, 1]
            with np.errstate(divide="ignore"):
                return np.asarray(-0.5 * N * np.log(rss / N))
    return sums[:, 0].copy()


_LL_CELLS = 1 << 17  # replicates x rows of a block of the log-likelihood sums (1 MB)
# From this many rows the logistic and Poisson log-likelihood sums of the replicates are one
# compiled pass per block (``unbin.models.compiled.glm_loglik``; DEVELOPERS.md, "The GLM
# bootstrap at registry size")
LOGLIK_FROM_ROWS = 100_000


def _glm_logliks_compiled(family: str, X: np.ndarray, coef: np.ndarray, outcome: Outcome,
                          R: Replicates, y: np.ndarray, rows: int) -> np.ndarray:
    """:func:`glm_logliks` of the logistic and Poisson models from ``LOGLIK_FROM_ROWS``
    rows: each block's predictor by the same product, its terms and their weighted sums in one
    compiled pass that skips the rows a replicate did not draw (the same terms; the sums in row
    order, so they differ from the numpy path's by rounding)."""
    from ..models.compiled.glm_loglik import loglik_sums

    n = len(y)
    counts = R.counts
    scale = np.zeros(0) if R.scale is None else np.ascontiguousarray(R.scale)
    out = np.zeros(coef.shape[0])
    slopes, intercept = coef[:, 1:], coef[:, :1]
    for r0 in range(0, n, rows):
        sl = slice(r0, min(n, r0 + rows))
        eta = slopes @ X[sl].T
        eta += intercept
        if outcome.offset is not None:
            eta += outcome.offset[sl]
        loglik_sums(eta, y[sl], counts, r0, scale, family == "binary", out)
    return out


def _glm_loglik_sums(family: str, X: np.ndarray, coef: np.ndarray, outcome: Outcome,
                     sl: slice, W: np.ndarray, y: np.ndarray) -> np.ndarray:
    eta = coef[:, 1:] @ X.T
    eta += coef[:, :1]
    if outcome.offset is not None:
        eta += outcome.offset[sl]
    out = np.zeros((len(coef), 2))
    if family == "binary":
        terms = y * eta - _log1p_exp(eta)
    elif family == "count":
        terms = y * eta - np.exp(np.minimum(eta, 700.0))
    else:  # linear: the weights' sum and the weighted residual sum of squares
        out[:, 0] = W.sum(axis=1)
        r = np.subtract(y, eta, out=eta)
        r *= r
        out[:, 1] = np.einsum("cn,cn->c", W, r)
        return out
    out[:, 0] = np.einsum("cn,cn->c", W, terms)
    return out


def _log1p_exp(eta: np.ndarray) -> np.ndarray:
    """log(1 + exp(eta)) as max(eta, 0) + log1p(exp(-|eta|)) (exact in floating point for
    any eta; numpy's ``logaddexp(0, eta)`` to a few units in the last place, three times as
    fast on large arrays)."""
    out = np.abs(eta)
    np.negative(out, out=out)
    np.exp(out, out=out)
    np.log1p(out, out=out)
    out += np.maximum(eta, 0.0)
    return out


def _cox_logliks(models: list[_Model], outcome: Outcome, W: np.ndarray,
                 robust: bool = False) -> list[np.ndarray]:
    """Per model, each replicate's log partial likelihood, or (``robust``) the robust Wald
    statistic of its exposure with the replicate's own sandwich."""
    from ..models.cox import fit_cox
    from ..models.cox.replicate_loglik import refit_replicate_loglik

    out = [np.full(len(W), np.nan) for _ in models]
    starts = [None] * len(models) if robust else cox_near_starts(
        outcome, [mod.X for mod in models], [mod.res.coef for mod in models])
    # every replicate of a model at once (its full-sample start); one at a time below where
    # that did not settle
    batched = cox_replicate_refits(outcome, [mod.X for mod in models], starts, W, True)
    for out_j, got in zip(out, batched, strict=True):
        if got is not None:
            out_j[got.done] = got.loglik[got.done]
    which = [b for b in range(len(W)) if any(got is None or not got.done[b] for got in batched)]
    for b, m, (time, event, entry, strata), layout in resampled_cox_samples(outcome, W, which):
        if robust:
            case = replicate_rows(outcome, W[b])[1]
            clusters = replicate_clusters(outcome, m)
        for j, mod in enumerate(models):
            if robust:
                Xm = mod.X[m]  # the full fit: its inverse information is the sandwich's bread
                try:
                    f = fit_cox(Xm, time, event, entry=entry, strata=strata,
                                init=mod.res.coef, layout=layout)
                except ValueError:
                    continue
                if f.converged and np.all(np.isfinite(f.coef)):
                    out[j][b] = cox_robust_wald(Xm, (time, event, entry, strata), case,
                                                clusters, f.coef, f.cov, mod.k)
                continue
            got = batched[j]
            if got is not None and got.done[b]:
                continue
            # secant steps from the full-sample estimate (its information scaled), stopped
            # once the log-likelihood is settled (refit_replicate_loglik); the full fit
            # where they do not settle (or the model has no columns)
            start = starts[j]
            near = None if start is None else refit_replicate_loglik(start, mod.X, m, layout)
            if near is not None:
                out[j][b] = near
                continue
            try:
                f = fit_cox(mod.X[m], time, event, entry=entry, strata=strata,
                            init=mod.res.coef, layout=layout)
            except ValueError:
                continue
            if f.converged:
                out[j][b] = f.loglik
    return out


def replicate_shares(family: str, models: list[_Model], outcome: Outcome,
                     rng: np.random.Generator, replicates: int,
                     robust: bool = False) -> np.ndarray:
    """The share kept in each replicate, for consecutive triples (null, legacy, legacy + test
    spline) of ``models``: shape (replicates, len(models) // 3), NaN where a replicate failed.
    The replicates resample the design (``design_resample_weights``); ``robust``: the share is
    the ratio of the replicates' robust Wald statistics (as the point estimate's), else of
    their likelihood ratios."""
    if family == "survival" and outcome.n > _BATCH_ROWS and replicates > 0:
        # the Cox refits go replicate by replicate here (cox_replicate_refits): each
        # replicate drawn when it comes, the same draws from the same generator, without
        # holding the replicates x rows weights (400 MB at 1,000,000 rows and 50 replicates)
        return np.concatenate(
            [shares_on(family, models, outcome, design_resample_replicates(rng, outcome, 1),
                       robust) for _ in range(replicates)])
    W = design_resample_replicates(rng, outcome, replicates)  # compact: small integers
    return shares_on(family, models, outcome, W, robust)


def shares_on(family: str, models: list[_Model], outcome: Outcome, W_all: Weights,
              robust: bool = False) -> np.ndarray:
    """:func:`replicate_shares` on given refit weights ``W_all`` (replicates, n; float64 or
    compact, ``unbin.models.weighted.Replicates``)."""
    n = outcome.n
    R = as_replicates(W_all)
    replicates = len(R)
    k = len(models) // 3
    # a model shared by several codings (no adjustment variables) is refitted once
    unique = list({id(mod): mod for mod in models}.values())
    col = {id(mod): j for j, mod in enumerate(unique)}
    ll_unique = np.full((replicates, len(unique)), np.nan)
    p_max = max(mod.X.shape[1] for mod in unique)
    chunk = max(1, _CHUNK_CELLS // (n * (p_max + 1)))
    prepared: list[WeightedGLM | None] = []
    whole: list[np.ndarray | None] = []
    own = needs_own_fitter(outcome)  # NB2: each replicate by the analysis' own fitter
    for mod in unique if family != "survival" and not own else ():
        one = WeightedGLM(family, mod.X, outcome, mod.res.coef)
        # large samples: every replicate refitted in one go (WeightedGLM.whole), one design
        # at a time (its standardised copy goes before the next one's is made)
        whole.append(one.coef(R) if one.whole else None)
        prepared.append(None if one.whole else one)
        del one
    if own:
        for b, refits in enumerate(drawn_fits([mod.X for mod in unique], outcome, R)):
            for j, (mod, f) in enumerate(zip(unique, refits, strict=True)):
                if f.ok:
                    ll_unique[b, j] = _Model(mod.X, f, mod.k).wald() if robust else f.loglik
    elif family == "survival":  # every replicate in one call (the refits block them)
        for j, v in enumerate(_cox_logliks(unique, outcome, R.dense(), robust)):
            ll_unique[:, j] = v
    else:
        if not robust:  # models refitted at once: every replicate's log-likelihood at once
            for j, (mod, got) in enumerate(zip(unique, whole, strict=True)):
                if got is not None:
                    ll_unique[:, j] = glm_logliks(family, mod.X, got, outcome, R)
        for c0 in range(0, replicates, chunk):
            if not robust and all(got is not None for got in whole):
                break
            W = R.part(c0, c0 + chunk).dense()  # float64 refit weights of the chunk only
            for j, (mod, g) in enumerate(zip(unique, prepared, strict=True)):
                got = whole[j]
                if got is not None and not robust:
                    continue
                if got is None:
                    assert g is not None
                    coef = g.coef(W)
                else:
                    coef = got[c0:c0 + len(W)]
                ll_unique[c0:c0 + len(W), j] = (
                    glm_robust_wald(family, mod.X, outcome, coef, W, mod.k) if robust
                    else glm_logliks(family, mod.X, coef, outcome, W))
    ll = ll_unique[:, [col[id(mod)] for mod in models]].reshape(replicates, k, 3)
    if robust:  # robust Wald statistics of the exposure (0 for the null model)
        lr_legacy, lr_full = ll[:, :, 1], ll[:, :, 2]
    else:
        lr_legacy = 2 * (ll[:, :, 1] - ll[:, :, 0])
        lr_full = 2 * (ll[:, :, 2] - ll[:, :, 0])
    with np.errstate(divide="ignore", invalid="ignore"):
        share = lr_legacy / lr_full
    share[~(lr_full > 0) | ~np.isfinite(share)] = np.nan
    return share


def _point_rows(r: Refit, spec: Spec, test_term: Term | None = None,
                adjust_by: dict[str, tuple[Term, ...]] | None = None
                ) -> tuple[list[dict[str, object]], list[_Model], list[int]]:
    """One row per coding with the point estimate (or why there is none), the fitted models of
    the rows that have one (consecutive null, legacy, legacy + test spline) and those rows.
    ``test_term`` and ``adjust_by`` (by coding): the test spline and adjustment terms to use (an
    imputed set takes the first set's knots); by default they are placed on the sample."""
    a = r.analysis
    df = r.sample.frame
    codings: list[tuple[str, tuple[Term, ...]]] = [
        (c, adjust_by[c] if adjust_by and c in adjust_by else adjustment_terms(df, a, spec, c))
        for c in ADJUSTMENTS]
    codings.append(("none", ()))
    base = {"info_kept": np.nan, "info_kept_lower": np.nan, "info_kept_upper": np.nan,
            "level": LEVEL, "replicates": spec.resampling.bootstrap, "replicates_used": 0}
    why = _empty_groups(r)
    if not why and test_term is None:
        try:
            test_term = test_spline_term(a, r.x)
        except ValueError as exc:
            why = (f"test spline ({a.continuous.test_knots} knots; continuous.test_knots): "
                   f"{exc} The share kept is not computed.")
    if why or test_term is None:
        return ([{"adjustment": c, **base, "status": "failed", "message": why}
                 for c, _ in codings], [], [])

    fitted: dict[str, _Model] = {}  # identical designs (no adjustment variables) fitted once

    def model(exposure: tuple[Term, ...], adjust: tuple[Term, ...]) -> _Model:
        key = repr((exposure, adjust))
        if key not in fitted:
            X, names = design(df, r.x, exposure, adjust)
            fitted[key] = _Model(X, job_fit(r, X, names, exposure, adjust),
                                 sum(len(t.names()) for t in exposure))
        return fitted[key]

    exposures: dict[str, tuple[Term, ...]] = {
        "null": (), "legacy": (r.legacy,), "legacy+test_spline": (r.legacy, test_term)}
    rows: list[dict[str, object]] = []
    ok_models: list[_Model] = []
    ok_rows: list[int] = []
    for coding, adjust in codings:
        trio = [model(exposures[form], adjust) for form in FORMS]
        row: dict[str, object] = {"adjustment": coding, **base, "status": "ok", "message": ""}
        failed = [f"{form}: {mod.res.message}" for form, mod in zip(FORMS, trio, strict=True)
                  if not mod.res.ok]
        if failed:
            row.update(status="failed", message="; ".join(failed))
        else:
            ll0, ll1, ll2 = (mod.res.loglik for mod in trio)
            part, full = 2 * (ll1 - ll0), 2 * (ll2 - ll0)
            if a.robust:  # robust Wald statistics, as the information table's
                part, full = trio[1].wald(), trio[2].wald()
            if not (np.isfinite(full) and full > 0):
                row.update(status="failed", message="the LR of legacy + test spline is not "
                           "positive: there is no association to share")
            else:
                row["info_kept"] = part / full
                ok_models.extend(trio)
                ok_rows.append(len(rows))
        rows.append(row)
    return rows, ok_models, ok_rows


def bootstrap_shares(r: Refit, spec: Spec) -> dict[str, np.ndarray]:
    """The share kept in each of the ``resampling.bootstrap`` replicates, per adjustment coding
    that has a point estimate (NaN where a replicate failed)."""
    rows, models, ok_rows = _point_rows(r, spec)
    if not ok_rows or spec.resampling.bootstrap <= 0:
        return {}
    shares = replicate_shares(r.family, models, r.outcome,
                              spec.rng(r.analysis.name, "information-bootstrap"),
                              spec.resampling.bootstrap, r.analysis.robust)
    return {str(rows[i]["adjustment"]): shares[:, j] for j, i in enumerate(ok_rows)}


COLUMNS = ("adjustment", "info_kept", "info_kept_lower", "info_kept_upper", "level",
           "replicates", "replicates_used", "status", "message")


def information_bootstrap_table(r: Refit, spec: Spec) -> pd.DataFrame:
    """The ``information_bootstrap`` table: per adjustment coding, the share kept (equal to the
    ``information`` table's) and its percentile interval over the bootstrap replicates."""
    replicates = spec.resampling.bootstrap
    rows, models, ok_rows = _point_rows(r, spec)
    if bootstrap_reason(r.analysis):
        for row in rows:
            if row["status"] == "ok":
                row.update(status="skipped", message=bootstrap_reason(r.analysis))
        return pd.DataFrame(rows, columns=list(COLUMNS))
    if replicates <= 0:
        for row in rows:
            if row["status"] == "ok":
                row.update(status="skipped", message="resampling.bootstrap is 0: no interval")
        return pd.DataFrame(rows, columns=list(COLUMNS))
    if not ok_rows:
        return pd.DataFrame(rows, columns=list(COLUMNS))
    shares = replicate_shares(r.family, models, r.outcome,
                              spec.rng(r.analysis.name, "information-bootstrap"), replicates,
                              r.analysis.robust)
    for j, i in enumerate(ok_rows):
        s = shares[:, j]
        s = s[np.isfinite(s)]
        row = rows[i]
        row["replicates_used"] = len(s)
        if len(s) < MIN_REPLICATES:
            row.update(status="failed", message=(
                f"only {len(s)} of {replicates} bootstrap replicates could be refitted (at "
                f"least {MIN_REPLICATES} are needed for an interval)"))
            continue
        lo, hi = percentile_limits(s, LEVEL)
        row.update(info_kept_lower=float(lo), info_kept_upper=float(hi))
        if len(s) < replicates:
            row["message"] = (
                f"{replicates - len(s)} of {replicates} bootstrap replicates left out (a model "
                "did not converge or a design column did not vary among the drawn rows)")
    return pd.DataFrame(rows, columns=list(COLUMNS))
