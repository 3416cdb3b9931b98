"""Effect modification: the exposure's association per level of the analysis' ``by`` variable.

For each adjustment coding (legacy, continuous) two interaction models, each beside its
main-effects model; BOTH hold the level main effects (the factor of :mod:`unbin.refit.modifier`, part
of the coding's adjustment terms), so the interaction test compares like with like:

- ``spline x level``: the *test spline* (``continuous.test_knots`` knots at the default
  quantiles of the exposure, fixed before the outcome is seen: never the spline chosen by AIC,
  whose selection would invalidate the test; the same spline as the nonlinearity test's) —
  plus the spline's columns times
  the indicator of every level but the reference. The likelihood-ratio test of the interaction
  has (levels - 1) x (knots - 1) df.
- ``legacy x level``: the legacy groups plus their indicators times every non-reference level
  (the legacy analysis' own subgroup contrasts), (levels - 1) x (groups - 1) df.

Per level j the exposure's coefficients are b + d_j (d_reference = 0), with covariance
A_j V A_j' for the selector A_j; contrasts within a level are delta-method contrasts of them.
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..distributions import stats
from ..models import fit
from ..models.base import FitResult, failed_fit
from ..terms import GroupedTerm, SplineTerm, Term
from .analysis import Refit, design, test_spline_term
from .modifier import Levels, levels_from_terms

CODINGS = ("legacy", "continuous")
SPLINE, LEGACY = "spline x level", "legacy x level"


@dataclass(frozen=True)
class LevelModel:
    """One interaction model and its main-effects model (same adjustment, level main effects in
    both), with the LR test of the interaction."""

    form: str  # SPLINE | LEGACY
    adjustment: str
    term: Term  # the exposure's columns (SplineTerm or GroupedTerm)
    levels: Levels
    main: FitResult
    full: FitResult
    detail: str
    lr: float = float("nan")
    df: int | None = None
    p: float = float("nan")
    reason: str = ""

    @property
    def ok(self) -> bool:
        return self.full.ok and self.main.ok

    def interaction_names(self, j: int) -> tuple[str, ...]:
        return tuple(f"{nm}:{self.levels.variable}[{self.levels.labels[j]}]"
                     for nm in self.term.names())

    def level_coef(self, j: int) -> tuple[np.ndarray, np.ndarray]:
        """The exposure's coefficients within level ``j`` and their covariance."""
        res = self.full
        idx = list(res.index(self.term.names()))
        k = len(idx)
        A = np.zeros((k, len(res.names)))
        A[np.arange(k), idx] = 1.0
        if j != self.levels.reference:
            A[np.arange(k), res.index(self.interaction_names(j))] = 1.0
        return A @ res.coef, A @ res.cov @ A.T

    def contrast(self, j: int, x1: np.ndarray, x0: float | np.ndarray,
                 ) -> tuple[np.ndarray, np.ndarray]:
        """f_j(x1) - f_j(x0) within level ``j`` and its delta-method standard error."""
        x1 = np.atleast_1d(np.asarray(x1, dtype=float))
        x0a = np.broadcast_to(np.atleast_1d(np.asarray(x0, dtype=float)), x1.shape)
        if not self.full.ok:
            return np.full(x1.shape, np.nan), np.full(x1.shape, np.nan)
        b, V = self.level_coef(j)
        D = (np.asarray(self.term.basis(x1), dtype=float).reshape(len(x1), -1)
             - np.asarray(self.term.basis(x0a), dtype=float).reshape(len(x1), -1))
        var = np.einsum("ij,jk,ik->i", D, V, D)
        return D @ b, np.sqrt(np.clip(var, 0.0, None))


def interaction_spline(r: Refit) -> SplineTerm:
    """The interaction test's spline: the test spline (module docstring). Raises ValueError
    when the exposure has too few distinct values."""
    return test_spline_term(r.analysis, r.x)


def _empty_cells(term: GroupedTerm, x: np.ndarray, levels: Levels) -> list[str]:
    codes = term.codes(x)
    return [f"{term.labels[g]} in {levels.variable} = {levels.labels[j]}"
            for j in range(len(levels.labels)) for g in range(len(term.labels))
            if not np.any((codes == g) & (levels.codes == j))]


def fit_level_model(r: Refit, term: Term, adjust: tuple[Term, ...], adjustment: str,
                    levels: Levels, main: FitResult | None = None) -> LevelModel:
    """Fit ``term`` + ``adjust`` (which holds the level factor) with and without ``term`` x
    level; ``main`` is the main-effects fit when it is already at hand."""
    form = LEGACY if isinstance(term, GroupedTerm) else SPLINE
    others = [j for j in range(len(levels.labels)) if j != levels.reference]
    what = term.describe()
    if isinstance(term, SplineTerm):
        what += f" at {', '.join(f'{k:.6g}' for k in term.knots)}"
    detail = (f"{what} x {levels.variable} (levels {', '.join(levels.labels)}; "
              f"reference {levels.labels[levels.reference]})")
    X0, names0 = design(r.sample.frame, r.x, (term,), adjust)
    if main is None:
        main = fit(r.family, X0, r.outcome, names0)
    B = np.asarray(term.basis(r.x), dtype=float).reshape(len(r.x), -1)
    cols, names = [X0], list(names0)
    for j in others:
        cols.append(B * (levels.codes == j)[:, None])
        names += [f"{nm}:{levels.variable}[{levels.labels[j]}]" for nm in term.names()]
    df = len(others) * term.df
    empty = _empty_cells(term, r.x, levels) if isinstance(term, GroupedTerm) else []
    if empty:
        msg = (f"no rows in {'; '.join(empty)}: the legacy groups x {levels.variable} "
               "interaction cannot be estimated")
        full = failed_fit(r.family, tuple(names), main.n, main.events, msg)
    else:
        full = fit(r.family, np.column_stack(cols), r.outcome, tuple(names))
    if not (full.ok and main.ok):
        reason = full.message if not full.ok else main.message
        return LevelModel(form, adjustment, term, levels, main, full, detail, df=df,
                          reason=reason)
    lr = max(2.0 * (full.loglik - main.loglik), 0.0)
    return LevelModel(form, adjustment, term, levels, main, full, detail, lr, df,
                      float(stats.chi2.sf(lr, df)), " | ".join(full.warnings))


@dataclass(frozen=True)
class LevelModels:
    """Every interaction model of one refit, by (form, adjustment); ``levels`` and ``reason``
    (why there are none) for the tables."""

    levels: Levels
    models: dict[tuple[str, str], LevelModel]
    reason: str = ""

    def get(self, form: str, adjustment: str) -> LevelModel | None:
        return self.models.get((form, adjustment))


_CACHE: list[tuple[weakref.ref[Refit], LevelModels]] = []


def _reuse(r: Refit, term: Term, adjust: tuple[Term, ...]) -> FitResult | None:
    for f in r.fits:
        if f.exposure_terms == (term,) and f.adjust_terms == adjust and f.result.ok:
            return f.result
    return None


def level_models(r: Refit, spec: Any = None) -> LevelModels:
    """The interaction models of a refit (built once per refit; information, curves, effects
    and decisions all read them)."""
    for ref, m in _CACHE:
        if ref() is r:
            return m
    m = _build(r)
    _CACHE[:] = [(weakref.ref(r), m)]
    return m


def _build(r: Refit) -> LevelModels:
    by = r.analysis.by
    n = len(r.x)
    null = r.get("null", "continuous") or r.get("null", "legacy")
    levels = levels_from_terms(by, null.adjust_terms if null else (), r.sample.frame, n)
    if not by:
        return LevelModels(levels, {}, "no effect modifier")
    if not levels.active:
        return LevelModels(levels, {}, levels.note or f"{by!r} has a single level")
    models: dict[tuple[str, str], LevelModel] = {}
    try:
        spline: SplineTerm | None = interaction_spline(r)
        spline_problem = ""
    except ValueError as exc:
        spline, spline_problem = None, str(exc)
    for coding in CODINGS:
        base = r.get("null", coding)
        if base is None:
            continue
        adjust = base.adjust_terms
        lv = levels_from_terms(by, adjust, r.sample.frame, n)
        if spline is not None:
            models[(SPLINE, coding)] = fit_level_model(r, spline, adjust, coding, lv,
                                                       _reuse(r, spline, adjust))
        legacy_fit = r.get("legacy", coding)
        if legacy_fit is not None and legacy_fit.result.ok:
            models[(LEGACY, coding)] = fit_level_model(r, r.legacy, adjust, coding, lv,
                                                       legacy_fit.result)
    return LevelModels(levels, models, spline_problem)


def level_reference(r: Refit, levels: Levels, j: int) -> float:
    """Level ``j``'s reference value: the median exposure of the legacy reference group among
    the level's rows (NaN when the level has no row in that group)."""
    inside = (r.legacy.codes(r.x) == r.legacy.reference) & (levels.codes == j)
    return float(np.median(r.x[inside])) if inside.any() else float("nan")
