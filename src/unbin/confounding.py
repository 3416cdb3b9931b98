"""Residual confounding: how much of the confounding the legacy grouped adjustment leaves.

The exposure's effect is estimated three ways on the same sample: crude (no adjustment variables;
survival strata are kept), with the legacy adjustment (grouped where a grouping is declared,
other numeric variables linear, factors as factors) and with continuous adjustment (numeric
variables as restricted cubic splines). The share of the confounding that the grouped adjustment
leaves (Becher 1992, Stat Med 11:1747) is

    share_left = (b_grouped - b_continuous) / (b_crude - b_continuous),

on the model scale (log odds/hazard/rate ratio or mean difference); ``share_removed`` is its
complement, the quantity Cochran (1968, Biometrics 24:295) tabulated for a normal confounder cut
into c equal-frequency groups (63.7, 79.3, 86.1, 89.7 % for c = 2..5).

Rows: the exposure enters linearly (``exposure_form = "linear"``, b per unit) and as the legacy
groups (``"legacy"``, b = the highest vs the lowest group); ``scope = "all"`` is the legacy
adjustment as a whole, and each grouped confounder gets a row in which only it is grouped (the
others continuous): ``largest`` marks the grouping that leaves the most.

The interval of ``share_left`` is a percentile bootstrap (``resampling.bootstrap`` replicates,
case resampling drawn once and shared by every model, so the three estimates of a replicate come
from the same resampled data). Groupings and knots stay as in the full sample. A replicate is
refitted by Newton's method from the full-sample estimate on frequency weights — vectorised over
replicates for the linear, logistic and Poisson models; for survival ``unbin.cox.fit_cox`` on the
resampled rows, whose sort and risk sets are laid out once per replicate for all designs —
and counts as failed (left out, counted in ``bootstrap_ok``) when a design column has no variation
in it, the fit does not converge, or (logistic) the fitted risks run to 0 or 1. The same
replicates give a percentile interval of the confounding itself (crude - continuous);
``confounding_clear`` is false when it covers 0 — the share is then a ratio of noise and should
not be read.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
from scipy import special

from .models import EFFECT_SCALE, RATIO_FAMILIES, Outcome, fit
from .models._glm import gram, standardise
from .models.base import FitResult
from .refit import Refit, adjustment_terms, design
from .spec import Spec
from .terms import GroupedTerm, LinearTerm, Term

TABLE = "confounding"
_CHUNK_CELLS = 4_000_000
_MAX_NEWTON = 30
_TOL = 1e-9


# --------------------------------------------------------------------------- weighted refits


def resample_weights(rng: np.random.Generator, n: int, replicates: int) -> np.ndarray:
    """Case-resampling frequency weights: row b counts how often each of the n rows was drawn
    (n draws with replacement), shape (replicates, n)."""
    idx = rng.integers(0, n, size=(replicates, n))
    flat = (np.arange(replicates)[:, None] * n + idx).ravel()
    return np.bincount(flat, minlength=replicates * n).reshape(replicates, n).astype(float)


class WeightedGLM:
    """One design of the linear, logistic or Poisson model, prepared once (standardised, with
    its starting point and pairwise column products) for refits on many weight vectors."""

    def __init__(self, family: str, X: np.ndarray, outcome: Outcome,
                 start: np.ndarray | None = None):
        X = np.asarray(X, dtype=float).reshape(outcome.n, -1)
        n, p = X.shape
        self.family, self.n, self.p = family, n, p
        self.Z, self.mean, self.sd = standardise(X)  # the solver's own [1, (X - mean) / sd]
        theta0 = np.zeros(p + 1)
        if start is not None and np.all(np.isfinite(start)):
            theta0 = np.concatenate([[start[0] + float(start[1:] @ self.mean)],
                                     start[1:] * self.sd])
        elif family == "binary":
            ybar = float(np.clip(outcome.y.mean(), 1e-6, 1 - 1e-6))
            theta0[0] = np.log(ybar / (1 - ybar))
        elif family == "count":
            t = np.exp(outcome.offset) if outcome.offset is not None else np.ones(n)
            theta0[0] = np.log(max(float(outcome.y.sum()), 1e-6) / float(t.sum()))
        self.theta0 = theta0
        self.y = np.asarray(outcome.y, dtype=float)
        self.off = outcome.offset if outcome.offset is not None else 0.0
        self.pairs = _Pairs(self.Z)

    def coef(self, W: np.ndarray) -> np.ndarray:
        """Coefficients (intercept first) for each row of frequency weights ``W`` (B, n)."""
        W = np.atleast_2d(np.asarray(W, dtype=float))
        out = np.full((W.shape[0], self.p + 1), np.nan)
        chunk = max(1, _CHUNK_CELLS // (self.n * (self.p + 1)))
        for c0 in range(0, W.shape[0], chunk):
            out[c0:c0 + chunk] = _newton(self.family, self.Z, self.y, self.off,
                                         W[c0:c0 + chunk], self.theta0, self.pairs)
        coef = out.copy()
        coef[:, 1:] = out[:, 1:] / self.sd
        coef[:, 0] = out[:, 0] - coef[:, 1:] @ self.mean
        return coef


def weighted_glm(family: str, X: np.ndarray, outcome: Outcome, W: np.ndarray,
                 start: np.ndarray | None = None) -> np.ndarray:
    """Maximum-likelihood coefficients (intercept first, then X's columns) of the linear,
    logistic or Poisson (log person-time offset) model for each row of frequency weights ``W``
    (shape (B, n)), by Newton's method vectorised over the B weight vectors. ``start`` (the
    full-sample estimate, intercept first) is where Newton starts. Failed rows are NaN."""
    return WeightedGLM(family, X, outcome, start).coef(W)


def _newton(family: str, Z: np.ndarray, y: np.ndarray, off: Any, W: np.ndarray,
            theta0: np.ndarray, pairs: _Pairs) -> np.ndarray:
    C = W.shape[0]
    # a column without variation among the drawn rows is not estimable in that replicate
    # (its weighted moments come from Z' diag(w) Z, the information of the linear model)
    H0 = _information(Z, W, pairs)
    N = H0[:, :1, 0]
    m1 = H0[:, 0, 1:] / N
    m2 = np.diagonal(H0, axis1=1, axis2=2)[:, 1:] / N
    bad = np.any(m2 - m1 ** 2 <= 1e-10, axis=1)
    T = np.tile(theta0, (C, 1))
    done = np.zeros(C, dtype=bool)
    H: np.ndarray | None = None
    for _ in range(_MAX_NEWTON if family != "continuous" else 1):
        eta = T @ Z.T + off
        if family == "binary":
            mu = special.expit(eta)
            v = mu * (1 - mu)
        elif family == "count":
            mu = np.exp(np.clip(eta, None, 700))
            v = mu
        else:
            mu = eta
            v = np.ones_like(eta)
        score = (W * (y - mu)) @ Z
        if family == "continuous":
            H = H0
        elif H is None or pairs.cached is not None:
            H = _information(Z, W * v, pairs)
        # Large samples (no cached products): the information of the first step is kept for
        # the later ones (the chord method). The score is exact, so the fixed point is the same
        # maximum; the error shrinks each step by about the relative change of the information
        # over one bootstrap-sized move (~1/sqrt(n)), as fast as Newton's here, for one blocked
        # product less per step.
        step = _solve(H, score)
        step[done | bad] = 0.0
        T = T + np.nan_to_num(step, nan=0.0)
        bad |= ~np.all(np.isfinite(step), axis=1)
        done |= np.max(np.abs(step), axis=1) <= _TOL * (1 + np.max(np.abs(T), axis=1))
        if np.all(done | bad):
            break
    if family == "continuous":
        done[:] = True
    if family == "binary":
        eta = T @ Z.T + off
        bad |= np.any((np.abs(eta) > 20) & (W > 0), axis=1)
    T[bad | ~done] = np.nan
    return T


class _Pairs:
    """Products of every pair of design columns, z_i z_j (i <= j), so that the information
    matrices of all replicates come from one matrix product: H[c] = sum_n wv[c, n] z_n z_n'.
    Formed only when small (``cached`` is None otherwise: ``_information`` then takes one
    blocked product per replicate)."""

    def __init__(self, Z: np.ndarray):
        self.iu = np.triu_indices(Z.shape[1])
        k = len(self.iu[0])
        self.cached = (np.asarray(Z[:, self.iu[0]] * Z[:, self.iu[1]])
                       if Z.shape[0] * k <= _CHUNK_CELLS else None)


def _information(Z: np.ndarray, wv: np.ndarray, pairs: _Pairs) -> np.ndarray:
    if pairs.cached is None:
        # Large samples come a few replicates at a time: one blocked Z' diag(w) Z product per
        # replicate beats forming the pairwise products again in every iteration.
        return np.stack([gram(Z, w) for w in wv])
    p = Z.shape[1]
    flat = np.asarray(wv @ pairs.cached)
    H = np.empty((wv.shape[0], p, p))
    i, j = pairs.iu
    H[:, i, j] = flat
    H[:, j, i] = flat
    return H


def _solve(H: np.ndarray, g: np.ndarray) -> np.ndarray:
    try:
        return np.asarray(np.linalg.solve(H, g[..., None])[..., 0])
    except np.linalg.LinAlgError:
        out = np.full(g.shape, np.nan)
        for i in range(len(g)):
            try:
                out[i] = np.linalg.solve(H[i], g[i])
            except np.linalg.LinAlgError:
                pass
        return out


def weighted_cox(X: np.ndarray, outcome: Outcome, W: np.ndarray,
                 start: np.ndarray | None = None) -> np.ndarray:
    """Cox coefficients for each row of frequency weights ``W``, fitted by ``unbin.cox.fit_cox``
    (Efron ties) started at ``start`` on the rows repeated as often as drawn — not on case
    weights, because Efron's tie correction counts a repeated row as several tied events but a
    weighted row as one; NaN where a fit fails. One design of :func:`weighted_cox_designs`."""
    return weighted_cox_designs([(X, start)], outcome, W)[0]


def weighted_cox_designs(designs: Sequence[tuple[np.ndarray, np.ndarray | None]],
                         outcome: Outcome, W: np.ndarray) -> list[np.ndarray]:
    """:func:`weighted_cox` for several designs ``(X, start)`` of the same rows at once: the
    designs share the replicates, so each replicate's repeated rows and their Cox layout (the
    sort and the risk sets, ``unbin.cox.prepare_layout``) are made once and every design is
    fitted on them. A design with a start is refitted by chord steps from it
    (``unbin.cox.refit_near``), falling back to ``fit_cox`` when those do not settle."""
    from .cox import fit_cox, prepare_layout, refit_near

    assert outcome.time is not None
    Xs = [np.asarray(X, dtype=float).reshape(outcome.n, -1) for X, _ in designs]
    inits = [start if start is not None and np.all(np.isfinite(start)) else None
             for _, start in designs]
    W = np.atleast_2d(W)
    outs = [np.full((W.shape[0], X.shape[1]), np.nan) for X in Xs]
    for b, w in enumerate(W):
        m = np.repeat(np.arange(len(w)), np.asarray(w).astype(np.int64))
        time, event = outcome.time[m], outcome.y[m]
        entry = outcome.entry[m] if outcome.entry is not None else None
        strata = outcome.strata[m] if outcome.strata is not None else None
        try:
            layout = prepare_layout(time, event, entry=entry, strata=strata)
        except ValueError:
            continue
        for X, init, out in zip(Xs, inits, outs, strict=True):
            Xm = X[m]
            coef = refit_near(Xm, layout, init) if init is not None else None
            if coef is not None:
                out[b] = coef
                continue
            try:  # far from the start, or not settling: the full fit decides
                f = fit_cox(Xm, time, event, entry=entry, strata=strata, init=init,
                            layout=layout)
            except ValueError:
                continue
            if f.converged:
                out[b] = f.coef
    return outs


# --------------------------------------------------------------------------- the table


class _Designs:
    """Designs of one analysis, fitted once each (identical term lists share a fit)."""

    def __init__(self, r: Refit):
        self.r = r
        self.df = r.sample.frame
        self.items: dict[str, tuple[np.ndarray, tuple[str, ...], tuple[str, ...], FitResult]] = {}

    def add(self, exposure: tuple[Term, ...], adjust: tuple[Term, ...]) -> str:
        key = repr((exposure, adjust))
        if key not in self.items:
            X, names = design(self.df, self.r.x, exposure, adjust)
            exp_names = tuple(nm for t in exposure for nm in t.names())
            self.items[key] = (X, names, exp_names, fit(self.r.family, X, self.r.outcome, names))
        return key

    def estimate(self, key: str, d: np.ndarray) -> tuple[float, float]:
        _, _, exp_names, res = self.items[key]
        if not res.ok:
            return float("nan"), float("nan")
        idx = res.index(exp_names)
        b, V = res.coef[idx], res.cov[np.ix_(idx, idx)]
        return float(d @ b), float(np.sqrt(max(float(d @ V @ d), 0.0)))

    def bootstrap(self, rng: np.random.Generator, replicates: int) -> dict[str, np.ndarray]:
        """Exposure coefficients of every design in every replicate, shape (B, exposure cols);
        the replicates are shared by all designs."""
        r = self.r
        n = r.outcome.n
        out = {k: np.full((replicates, len(v[2])), np.nan) for k, v in self.items.items()}
        p_max = max((v[0].shape[1] for v in self.items.values()), default=0)
        chunk = max(1, _CHUNK_CELLS // (n * (p_max + 1)))
        ok = [(key, X, [names.index(nm) for nm in exp_names], res)
              for key, (X, names, exp_names, res) in self.items.items() if res.ok]
        prepared: list[WeightedGLM] = []
        for c0 in range(0, replicates, chunk):
            W = resample_weights(rng, n, min(chunk, replicates - c0))
            if r.family == "survival":  # all designs on each replicate's rows and Cox layout
                coefs = weighted_cox_designs([(X, res.coef) for _, X, _, res in ok],
                                             r.outcome, W)
            else:
                if not prepared:  # each design standardised once, for every chunk
                    prepared.extend(WeightedGLM(r.family, X, r.outcome, res.coef)
                                    for _, X, _, res in ok)
                coefs = [g.coef(W)[:, 1:] for g in prepared]
            for (key, _, pos, _), coef in zip(ok, coefs, strict=True):
                out[key][c0:c0 + len(W)] = coef[:, pos]
        return out


def _exposure_forms(r: Refit) -> list[tuple[str, tuple[Term, ...], str, np.ndarray]]:
    a = r.analysis
    forms: list[tuple[str, tuple[Term, ...], str, np.ndarray]] = [
        ("linear", (LinearTerm(a.exposure),), "per unit", np.array([1.0]))]
    term = r.legacy
    codes = term.codes(r.x)
    top, bottom = len(term.labels) - 1, 0
    if np.any(codes == top) and np.any(codes == bottom):
        x_top = float(np.median(r.x[codes == top]))
        x_bot = float(np.median(r.x[codes == bottom]))
        d = (term.basis([x_top]) - term.basis([x_bot]))[0]
        forms.append(("legacy", (term,), f"{term.labels[top]} vs {term.labels[bottom]}", d))
    return forms


COLUMNS = ["exposure_form", "contrast", "scope", "grouping", "n", "estimate_crude", "se_crude",
           "estimate_grouped", "se_grouped", "estimate_continuous", "se_continuous",
           "confounding", "confounding_lower", "confounding_upper", "confounding_clear",
           "residual", "share_left", "share_left_lower", "share_left_upper",
           "share_removed", "bootstrap", "bootstrap_ok", "largest", "effect_crude",
           "effect_grouped", "effect_continuous", "scale", "status", "message"]


def confounding_table(r: Refit, spec: Spec) -> pd.DataFrame:
    """Residual confounding of one analysis (see the module docstring)."""
    a = r.analysis
    df = r.sample.frame
    legacy_adj = adjustment_terms(df, a, spec, "legacy")
    cont_adj = adjustment_terms(df, a, spec, "continuous")
    scale = EFFECT_SCALE[r.family]
    if not legacy_adj:
        return pd.DataFrame([{"exposure_form": "", "scope": "all", "n": r.outcome.n,
                              "scale": scale, "status": "skipped",
                              "message": "no adjustment variables: there is no confounding "
                                         "adjustment to compare"}], columns=COLUMNS)
    scopes: list[tuple[str, tuple[Term, ...]]] = [("all", legacy_adj)]
    for t in legacy_adj:
        if isinstance(t, GroupedTerm):
            scopes.append((t.variable, tuple(t if u.variable == t.variable else u
                                             for u in cont_adj)))
    designs = _Designs(r)
    plan = []
    for form, exp_terms, label, d in _exposure_forms(r):
        crude = designs.add(exp_terms, ())
        cont = designs.add(exp_terms, cont_adj)
        for scope, adj in scopes:
            plan.append((form, label, d, scope, adj, crude, cont, designs.add(exp_terms, adj)))
    boot: dict[str, np.ndarray] = {}
    n_boot = spec.resampling.bootstrap
    if n_boot > 0:
        boot = designs.bootstrap(spec.rng(a.name, "confounding-bootstrap"), n_boot)
    ratio = r.family in RATIO_FAMILIES
    rows = []
    for form, label, d, scope, adj, crude, cont, grouped in plan:
        b_cr, se_cr = designs.estimate(crude, d)
        b_gr, se_gr = designs.estimate(grouped, d)
        b_co, se_co = designs.estimate(cont, d)
        total, resid = b_cr - b_co, b_gr - b_co
        share = resid / total if np.isfinite(total) and total != 0 else float("nan")
        notes = [designs.items[k][3].message for k in (crude, grouped, cont)
                 if not designs.items[k][3].ok]
        row: dict[str, Any] = {
            "exposure_form": form, "contrast": label, "scope": scope,
            "grouping": "; ".join(f"{t.variable}: {t.describe()}" for t in adj
                                  if isinstance(t, GroupedTerm)) or "none grouped",
            "n": r.outcome.n, "estimate_crude": b_cr, "se_crude": se_cr,
            "estimate_grouped": b_gr, "se_grouped": se_gr, "estimate_continuous": b_co,
            "se_continuous": se_co, "confounding": total, "residual": resid,
            "share_left": share, "share_removed": 1.0 - share, "bootstrap": n_boot,
            "scale": scale,
        }
        if boot:
            bc, bg, bn = (boot[k] @ d for k in (crude, grouped, cont))
            with np.errstate(divide="ignore", invalid="ignore"):
                s = (bg - bn) / (bc - bn)
            ok = np.isfinite(s)
            row["bootstrap_ok"] = int(ok.sum())
            if ok.sum() >= max(2, n_boot // 2):
                row["share_left_lower"], row["share_left_upper"] = np.percentile(s[ok],
                                                                                 [2.5, 97.5])
                c_lo, c_hi = np.percentile((bc - bn)[ok], [2.5, 97.5])
                row["confounding_lower"], row["confounding_upper"] = c_lo, c_hi
                row["confounding_clear"] = bool(c_lo > 0 or c_hi < 0)
                if not row["confounding_clear"]:
                    notes.append("the confounding (crude - continuous) is not clearly different "
                                 "from zero (its bootstrap interval covers 0), so the share is "
                                 "unstable")
            else:
                notes.append(f"only {int(ok.sum())} of {n_boot} bootstrap replicates could be "
                             "refitted; no interval")
        for what, b in (("crude", b_cr), ("grouped", b_gr), ("continuous", b_co)):
            row[f"effect_{what}"] = float(np.exp(b)) if ratio else b
        row["status"] = "ok" if np.isfinite(share) else "failed"
        row["message"] = "; ".join(dict.fromkeys(notes))
        rows.append(row)
    out = pd.DataFrame(rows, columns=COLUMNS)
    single = out["scope"] != "all"
    out["largest"] = False
    for form in out["exposure_form"].unique():
        sel = single & (out["exposure_form"] == form) & out["share_left"].notna()
        if sel.any():
            out.loc[out.loc[sel, "share_left"].idxmax(), "largest"] = True
    out["bootstrap"] = out["bootstrap"].astype("Int64")
    out["bootstrap_ok"] = out["bootstrap_ok"].astype("Int64")
    out["n"] = out["n"].astype("Int64")
    out["largest"] = out["largest"].astype(bool)
    out["confounding_clear"] = out["confounding_clear"].astype("boolean")
    return out


def summary_line(df: pd.DataFrame) -> str:
    """One line for the terminal summary: the share the legacy adjustment leaves, per analysis
    (exposure per unit), and the confounder whose grouping leaves the most."""
    if df.empty or "scope" not in df:
        return "Residual confounding: no analyses."
    parts = []
    for name, g in df.groupby("analysis", sort=False):
        lin = g[g["exposure_form"] == "linear"]
        allrow = lin[lin["scope"] == "all"]
        if allrow.empty or pd.isna(allrow["share_left"].iloc[0]):
            parts.append(f"{name} –")
            continue
        row = allrow.iloc[0]
        clear = row["confounding_clear"]
        if pd.notna(clear) and not bool(clear):
            parts.append(f"{name} little confounding")
            continue
        ci = ""
        if pd.notna(row["share_left_lower"]):
            ci = f" ({100 * row['share_left_lower']:.0f}–{100 * row['share_left_upper']:.0f})"
        worst = lin[lin["largest"].astype(bool)]
        who = f", most by {worst['scope'].iloc[0]}" if len(worst) else ""
        parts.append(f"{name} {100 * row['share_left']:.0f}%{ci}{who}")
    return ("Residual confounding (share the legacy adjustment leaves, per-unit effect): "
            + "; ".join(parts))
