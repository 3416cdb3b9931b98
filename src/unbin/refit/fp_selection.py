"""Fractional-polynomial function selection (Royston & Sauerbrei 2008): the best FP1 and FP2
powers by likelihood, then the closed test FP2 vs null, vs linear, vs FP1.

The search for the best powers is screened: its choice, and every fit it reports, is the one
of fitting all 8 FP1 and 36 FP2 candidates to convergence (``exhaustive=True``, or the
environment variable ``UNBIN_FP_SEARCH=exhaustive``, runs that search), at a fraction of the
cost. How:

1. One design holds every column any candidate uses (the 16 FP columns x^p and x^p log x, and
   the adjustment block), and its score and information are evaluated once, at the null fit
   (FP coefficients 0). Each candidate's score and information there are a sub-vector and a
   sub-matrix of these: the adjustment block's work is shared by all candidates.
2. A bound: for the logistic, Poisson and Cox (Efron or Breslow) log-likelihoods, at any
   coefficient vector with score U and information I, the maximum is at most
   ``loglik + U' I^-1 U`` whenever the Newton step changes each row's linear predictor by
   little enough (|change| <= 1 for the logistic model, change >= -1 for Poisson, a range of
   changes <= 1 for Cox). These likelihoods are the negative log-sum-exp (softmax) terms of
   the fitted probabilities; tilting those probabilities along the Newton step gives a point of
   the dual problem, whose value bounds the maximum (convex duality; Boyd & Vandenberghe 2004,
   ch. 5), and (1 + t) log(1 + t) <= t + t^2 (t >= -1) bounds that value by the expression
   above. At the maximum U = 0 and the bound is the maximum itself; after each Newton step its
   slack shrinks quadratically. The linear model needs no bound: its maximum at the null fit's
   residuals is exact (RSS - U' I^-1 U).
3. Candidates in order of their score statistic at the null fit: Newton steps on each until
   its bound falls below the best log-likelihood reached so far (it cannot win) or it
   converges. The first candidate starts at the null fit (its first step from the shared
   information); the others at the maximum, over their own coefficients, of the quadratic
   expansion of the log-likelihood at an anchor: the shared design evaluated once more at the
   best estimate so far (for FP2, first the best FP1's). Most candidates' curves lie close to
   the anchor's, so that start is close to their estimate and one evaluation decides.
4. The candidates whose bound is within a rounding margin of the best are fitted in full, the
   usual way; the best of those wins, ties going to the earlier candidate in the usual order,
   as in the exhaustive search. Should a full fit fail, the remaining candidates are checked
   again against the best full fit, fitting any whose bound still reaches it.

Designs the bound does not cover (Firth-penalised, matched sets, negative binomial) use the
exhaustive search.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from ..distributions import stats
from ..models.base import FitResult, Outcome, failed_fit
from ..models.cox.fit import newton_step
from ..terms import FPTerm, LinearTerm, Term
from ..terms.fp import FP1_SET, FP2_SET, FP_POWERS

if TYPE_CHECKING:
    from .analysis import FormFit, _Fitter

# Two log-likelihoods closer than this (relative to their size) are treated as possibly equal:
# far above the rounding of a likelihood summed over millions of rows (about 1e-12) and the
# fits' own convergence tolerance, so a candidate pruned by it cannot be the exhaustive winner.
# The Cox fit may stop once three steps changed its log partial likelihood by at most 1e-9 of
# its size (unbin.models.cox.fit), so its margin is 100 times that; the linear, logistic and
# Poisson fits stop at a change of 1e-12 of it plus 1e-10 (unbin.models._glm), and their
# margin of 1e-9 is still a thousand times that. A smaller margin prunes near-equal candidates
# (on a registry's million rows, FP2 curves a few hundredths of a log-likelihood unit apart)
# without fitting them in full; the screen then takes a few more of its cheap steps on them.
_MARGIN = {"survival": 1e-7}
_GLM_MARGIN = 1e-9
_MAX_STEPS = 30
_MAX_HALVINGS = 20
_REANCHOR = 2
ENV_SWITCH = "UNBIN_FP_SEARCH"


def _margin(ll: float, family: str) -> float:
    return _MARGIN.get(family, _GLM_MARGIN) * max(1.0, abs(ll))


def exhaustive_by_default() -> bool:
    """The search the environment asks for (``UNBIN_FP_SEARCH=exhaustive``: every candidate
    fitted in full, for benchmarks and checks); otherwise the screened one."""
    return os.environ.get(ENV_SWITCH, "").strip().lower() == "exhaustive"


Best = dict[int, tuple[FPTerm, FitResult]]


def exhaustive_best(f: _Fitter, adjust: tuple[Term, ...], x: np.ndarray, variable: str) -> Best:
    """Every FP1 and FP2 candidate fitted to convergence; the best of each degree by
    log-likelihood (the first of equals in the candidates' order)."""
    best: Best = {}
    for degree, powers_set in ((1, FP1_SET), (2, FP2_SET)):
        for powers in powers_set:
            term = FPTerm.from_data(variable, x, powers)
            res = f.run((term,), adjust)
            if res.ok and (degree not in best or res.loglik > best[degree][1].loglik):
                if degree in best:
                    f.drop_predictor((best[degree][0],), adjust)
                best[degree] = (term, res)
            else:
                f.drop_predictor((term,), adjust)
    return best


# ----------------------------------------------------------------------------- the screen


def screenable(family: str, outcome: Outcome) -> bool:
    """Whether the bound covers this outcome's likelihood."""
    if outcome.penalty == "firth":
        return False
    if family == "binary":
        return outcome.strata is None
    if family == "count":
        return outcome.dispersion in ("poisson", "quasi-poisson")
    return family in ("continuous", "survival")


def _fp_design(f: _Fitter, adjust: tuple[Term, ...], x: np.ndarray, shape: FPTerm,
               ) -> tuple[np.ndarray, int, dict[tuple[float, ...], list[int]]]:
    """The shared design, written into one array: the 16 distinct FP columns (x^p, x^p log x
    for every power p, with ``shape``'s shift and scale), then the adjustment columns; the
    number of FP columns; and, for every candidate, the positions of its columns among them."""
    from .analysis import design

    terms = tuple(FPTerm(shape.variable, (p, p), shape.shift, shape.scale)
                  for p in (float(q) for q in FP_POWERS))
    X, _ = design(f.df, x, terms, adjust, f.columns)
    where: dict[tuple[float, ...], list[int]] = {}
    pos = {p: 2 * i for i, p in enumerate(FP_POWERS)}
    for (p,) in FP1_SET:
        where[(p,)] = [pos[p]]
    for p1, p2 in FP2_SET:
        where[(p1, p2)] = [pos[p1], pos[p1] + 1] if p1 == p2 else [pos[p1], pos[p2]]
    return X, 2 * len(FP_POWERS), where


@dataclass
class _Bound:
    lower: float  # a log-likelihood the candidate reaches
    upper: float  # no coefficients give it more (inf: not bounded)
    at: np.ndarray | None = None  # where it reaches ``lower`` (the shared design's coefficients)


# The shared design's log-likelihood, score and information at one of its coefficient vectors.
_Point = tuple[np.ndarray, tuple[float, np.ndarray, np.ndarray]]


class _Screen:
    """The shared design of one search and the family's likelihood on candidate designs."""

    def __init__(self, family: str, outcome: Outcome, X: np.ndarray, n_fp: int,
                 null: FitResult):
        """``X``: the FP columns (the first ``n_fp``), then the adjustment columns; only its
        standardised copy is kept."""
        self.family = family
        self.outcome = outcome
        self.n_fp = n_fp
        adj_coef = np.asarray(null.coef, dtype=float)
        if family == "survival":
            from ..models.cox.likelihood import _Design, _standardised
            from ..models.survival import cox_layout

            self.layout = cox_layout(outcome)
            D, scale, _ = _standardised(X, self.layout)
            self._design_of = _Design
            self.Z = D.X1  # (m, 1 + k): ones, then the columns, sorted and standardised
            theta = np.concatenate([np.zeros(self.n_fp), adj_coef * scale[self.n_fp:]])
            self.theta0 = theta
            self.D = D
            self.shared = self._cox_evaluate(D, theta)
        else:
            from ..models._glm import standardise

            self.Z, mean, sd = standardise(X)
            a_mean, a_sd = mean[self.n_fp:], sd[self.n_fp:]
            intercept, coef = adj_coef[0], adj_coef[1:]
            theta = np.concatenate([[intercept + float(coef @ a_mean)], np.zeros(self.n_fp),
                                    coef * a_sd])
            self.theta0 = theta
            self.y = np.asarray(outcome.y, dtype=float)
            self.freq = None if outcome.weights is None else np.asarray(outcome.weights, float)
            self.const: float | None = None
            if family == "count":
                from ..models._glm import poisson_constant

                self.const = outcome.cache.get("poisson_constant")
                if self.const is None:
                    self.const = poisson_constant(self.y, self.freq)
                    outcome.cache["poisson_constant"] = self.const
            self.shared = self._glm_evaluate(self.Z, theta)

    # positions of a candidate's coefficients among the shared design's (no intercept for Cox)
    def coefficients(self, fp_cols: list[int]) -> np.ndarray:
        k = self.Z.shape[1] - 1
        adj = list(range(self.n_fp, k))
        if self.family == "survival":
            return np.array([*fp_cols, *adj], dtype=int)
        return np.array([0, *(c + 1 for c in fp_cols), *(a + 1 for a in adj)], dtype=int)

    def _cox_evaluate(self, D: object, theta: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        from ..models.cox.likelihood import _evaluate

        return _evaluate(self.layout, D, theta, True)  # type: ignore[arg-type]

    def _glm_evaluate(self, Z: np.ndarray, theta: np.ndarray, cols: np.ndarray | None = None,
                      ) -> tuple[float, np.ndarray, np.ndarray]:
        """``cols``: a candidate's columns of ``Z`` (gathered block by block while evaluating;
        logistic and Poisson only)."""
        from ..models._glm import _Family

        if self.family == "continuous":
            # least squares: -RSS/2, its gradient and (negative) Hessian; the maximum of the
            # profile log-likelihood follows from RSS - U'G^-1 U (exact)
            resid = self.y - Z @ theta
            wr = resid if self.freq is None else self.freq * resid
            rss = float(resid @ wr)
            G = Z.T @ (Z if self.freq is None else Z * self.freq[:, None])
            return -rss / 2.0, Z.T @ wr, G
        model = _Family(self.family, Z, self.y, self.outcome.offset, self.freq, self.const,
                        cols)
        return model.evaluate(theta)

    def _feasible(self, lo: float, hi: float) -> bool:
        """Whether the Newton step's tilt keeps the dual point valid (see the module's
        docstring): the smallest and largest change of a row's linear predictor."""
        if self.family == "binary":
            return max(-lo, hi) <= 1.0
        if self.family == "count":
            return lo >= -1.0
        return hi - lo <= 1.0  # Cox: the change against each risk set's mean

    def at(self, theta: np.ndarray) -> _Point:
        """The shared design evaluated at ``theta`` (every candidate's score and information
        there are parts of it)."""
        if self.family == "survival":
            return theta, self._cox_evaluate(self.D, theta)
        return theta, self._glm_evaluate(self.Z, theta)

    def _evaluate(self, cols: np.ndarray, D: object, theta: np.ndarray,
                  ) -> tuple[float, np.ndarray, np.ndarray]:
        if self.family == "survival":
            return self._cox_evaluate(D, theta)
        return self._glm_evaluate(self.Z, theta, cols)

    def _change_range(self, cols: np.ndarray, D: object, step: np.ndarray,
                      ) -> tuple[float, float]:
        """The smallest and largest change of a row's linear predictor under ``step``."""
        if self.family == "survival":
            change = D.X1[:, 1:] @ step  # type: ignore[attr-defined]
            return (float(change.min()), float(change.max())) if change.size else (0.0, 0.0)
        from ..models._glm import gathered_range

        return gathered_range(self.Z, cols, step)

    def bound(self, fp_cols: list[int], incumbent: float, anchor: _Point | None = None,
              ) -> _Bound:
        """Newton steps on one candidate until its upper bound falls below ``incumbent`` less
        the margin, or it converges. The first step is taken from the null fit with the shared
        score and information; with an ``anchor`` (the shared design at another candidate's
        estimate), from the maximum of the log-likelihood's quadratic expansion there over
        this candidate's coefficients (one Newton step from a point outside its span: close
        to its estimate when its curve is close to the anchor's)."""
        idx = self.coefficients(fp_cols)
        ll, U_all, I_all = self.shared
        U, I_ = U_all[idx], I_all[np.ix_(idx, idx)]
        if self.family == "continuous":
            return self._least_squares_bound(ll, U, I_)
        theta = self.theta0[idx]
        D: object = None
        # Cox: the candidate's design is gathered (np.take writes a row-major array; indexing
        # with a list builds a column-major one that would then be copied again). The GLM
        # evaluations gather its columns one block of rows at a time instead (no copy).
        if self.family == "survival":
            Zc = np.take(self.Z, np.array([0, *(idx + 1)]), axis=1)
            D = self._design_of.of(Zc, self.layout.we, np.zeros(idx.size))
        if anchor is not None:
            theta_a, (_, U_a, I_a) = anchor
            start = newton_step(I_a[np.ix_(idx, idx)], U_a[idx] + I_a[idx] @ theta_a)
            if start is not None:
                ll_s, U_s, I_s = self._evaluate(idx, D, start)
                if np.isfinite(ll_s) and ll_s >= ll:
                    theta, ll, U, I_ = start, ll_s, U_s, I_s
        out = _Bound(-np.inf, np.inf)
        for _ in range(_MAX_STEPS):
            if not np.isfinite(ll):
                return out
            if ll > out.lower:
                out.lower = ll
                out.at = np.zeros_like(self.theta0)
                out.at[idx] = theta
            step = newton_step(I_, U)
            if step is None:
                return out
            gain = float(U @ step)
            if self._feasible(*self._change_range(idx, D, step)):
                out.upper = min(out.upper, ll + gain)
            if out.upper + _margin(out.upper, self.family) < incumbent:
                return out  # cannot win
            if out.upper - out.lower <= 0.01 * _margin(ll, self.family):
                return out  # converged: lower and upper agree
            for _halving in range(_MAX_HALVINGS):
                trial = theta + step
                ll_next, U_next, I_next = self._evaluate(idx, D, trial)
                if np.isfinite(ll_next) and ll_next >= ll - _margin(ll, self.family):
                    break
                step = step / 2.0
            else:
                return out  # no step improves: left to the full fit
            theta, ll, U, I_ = trial, ll_next, U_next, I_next
        return out

    def _least_squares_bound(self, ll: float, U: np.ndarray, G: np.ndarray) -> _Bound:
        """The linear model's maximum, from the null fit's residual sum of squares: exact."""
        step = newton_step(G, U)
        if step is None:
            return _Bound(-np.inf, np.inf)
        N = float(self.y.size if self.freq is None else self.freq.sum())
        rss = -2.0 * ll - float(U @ step)
        if not rss > 0:
            return _Bound(-np.inf, np.inf)
        best = -N / 2.0 * (np.log(2.0 * np.pi * rss / N) + 1.0)
        return _Bound(best, best)

    def score_statistic(self, fp_cols: list[int]) -> float:
        idx = self.coefficients(fp_cols)
        _, U_all, I_all = self.shared
        step = newton_step(I_all[np.ix_(idx, idx)], U_all[idx])
        return float(U_all[idx] @ step) if step is not None else np.inf


def screened_best(f: _Fitter, adjust: tuple[Term, ...], x: np.ndarray, variable: str,
                  null: FitResult) -> Best:
    """The best FP1 and FP2 fits, the same as :func:`exhaustive_best`'s, fitting in full only
    the candidates that could win (see the module's docstring)."""
    family, outcome = f.r.family, f.r.outcome
    if not screenable(family, outcome) or not null.ok:
        return exhaustive_best(f, adjust, x, variable)
    shape = FPTerm.from_data(variable, x, (1.0,))
    X, n_fp, where = _fp_design(f, adjust, x, shape)
    screen = _Screen(family, outcome, X, n_fp, null)
    del X  # the screen keeps its standardised copy only
    best_at: np.ndarray | None = None
    incumbent_fp1 = -np.inf
    best: Best = {}
    anchor: _Point | None = None
    for degree, powers_set in ((1, FP1_SET), (2, FP2_SET)):
        # FPTerm.from_data's shift and scale, computed once (each call sorts x)
        terms = [FPTerm(variable, tuple(float(p) for p in powers), shape.shift, shape.scale)
                 for powers in powers_set]
        order = sorted(range(len(terms)), key=lambda i: -screen.score_statistic(where[terms[i].powers]))
        bounds: dict[int, _Bound] = {}
        incumbent = -np.inf
        # Candidates start from the quadratic expansion at an anchor: the first candidate's
        # estimate (FP2: the best FP1's), moved (up to _REANCHOR times) to a candidate that
        # does clearly better, whose curve the others are then likely to be near.
        anchor_ll, anchors = -np.inf, 0
        if degree == 2 and best_at is not None:
            anchor, anchor_ll, anchors = screen.at(best_at), incumbent_fp1, 1
        best_at = None
        for i in order:
            b = screen.bound(where[terms[i].powers], incumbent, anchor)
            bounds[i] = b
            if b.lower > incumbent:
                incumbent, best_at = b.lower, b.at
            if (family != "continuous" and best_at is not None and anchors <= _REANCHOR
                    and (anchors == 0 or incumbent > anchor_ll + 1.0)):
                anchor, anchor_ll = screen.at(best_at), incumbent
                anchors += 1
        incumbent_fp1 = incumbent
        fitted: dict[int, FitResult] = {}
        while True:
            ok = [r.loglik for r in fitted.values() if r.ok]
            reach = max(ok) if ok else -np.inf
            # every candidate not fitted in full whose bound reaches the best full fit (or, before
            # any, the best log-likelihood reached in the screen)
            floor = max(reach, incumbent) if not fitted else reach
            todo = [i for i in range(len(terms)) if i not in fitted
                    and bounds[i].upper + _margin(bounds[i].upper, family) >= floor]
            if not todo:
                break
            for i in todo:
                fitted[i] = f.run((terms[i],), adjust)
        chosen: int | None = None
        for i in sorted(fitted):  # the exhaustive rule: the first of the largest
            res = fitted[i]
            if res.ok and (chosen is None or res.loglik > fitted[chosen].loglik):
                chosen = i
        for i in fitted:
            if i != chosen:
                f.drop_predictor((terms[i],), adjust)
        if chosen is not None:
            best[degree] = (terms[chosen], fitted[chosen])
    return best


def select_fp(f: _Fitter, adjust: tuple[Term, ...], x: np.ndarray, variable: str, alpha: float,
              null: FitResult, linear: FitResult, *, exhaustive: bool | None = None,
              ) -> tuple[list[FormFit], FormFit]:
    """Function selection procedure (closed test; Royston & Sauerbrei 2008): FP2 vs null (4 df),
    FP2 vs linear (3 df), FP2 vs FP1 (2 df). Returns the best FP1/FP2 fits and the chosen one.
    ``exhaustive`` fits every candidate in full (default: ``UNBIN_FP_SEARCH``, else screened);
    both searches give the same fits."""
    from .analysis import FormFit, with_powers_counted

    if exhaustive is None:
        exhaustive = exhaustive_by_default()
    best = (exhaustive_best(f, adjust, x, variable) if exhaustive
            else screened_best(f, adjust, x, variable, null))
    if 2 not in best or 1 not in best:
        msg = "no fractional polynomial could be fitted (every candidate failed)"
        failed = failed_fit(f.r.family, null.names, null.n, null.events, msg)
        return [], FormFit("fp", "", (), adjust, failed, "FP: failed")
    rows: list[FormFit] = []
    for degree in (1, 2):
        term, res = best[degree]
        rows.append(FormFit(f"fp{degree}", "", (term,), adjust, with_powers_counted(res, term),
                            term.describe(), False))
    dev = {k: -2 * v[1].loglik for k, v in best.items()}
    p_null = stats.chi2.sf(-2 * null.loglik - dev[2], 4)
    p_lin = stats.chi2.sf(-2 * linear.loglik - dev[2], 3)
    p_fp1 = stats.chi2.sf(dev[1] - dev[2], 2)
    tests = f"closed test p: FP2 vs null {p_null:.3g}, vs linear {p_lin:.3g}, vs FP1 {p_fp1:.3g}"
    if p_null >= alpha:
        chosen = FormFit("fp", "", (), adjust, null, f"FP: no association ({tests})")
    elif p_lin >= alpha:
        chosen = FormFit("fp", "", (LinearTerm(variable),), adjust, linear,
                         f"FP: linear ({tests})")
    elif p_fp1 >= alpha:
        term, res = best[1]
        chosen = FormFit("fp", "", (term,), adjust, with_powers_counted(res, term),
                         f"{term.describe()} ({tests})")
    else:
        term, res = best[2]
        chosen = FormFit("fp", "", (term,), adjust, with_powers_counted(res, term),
                         f"{term.describe()} ({tests})")
    return rows, chosen
