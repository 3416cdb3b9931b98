"""The Newton fit of the Cox partial likelihood (evaluated in ``likelihood``): starting values
(given, zero, or a subsample's estimate), Newton steps with step halving, the stopping rule and
its messages, ``fit_cox`` and ``refit_near``."""

from __future__ import annotations

import weakref
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import linalg

from .. import compiled
from .inputs import _as_1d, _check_finite, _design
from .layout import Layout, _design_and_layout, _given_layout, _prepare
from .likelihood import (
    EVALUATION_FROM_ROWS,
    _column_stats,
    _Design,
    _evaluate,
    _information,
    _Point,
    _point,
    _score,
    _standardised,
    _write_standardised,
)


@dataclass(frozen=True)
class CoxFit:
    """Result of :func:`fit_cox`.

    ``coef`` are log hazard ratios per unit of each column of X; ``cov`` is the inverse of the
    observed information at ``coef``. ``loglik``/``loglik0`` are the log partial likelihood at
    ``coef`` and at zero (summed over strata). ``message`` is ``""`` when the fit is fine and
    otherwise says what went wrong and what to try. When the information matrix is singular,
    ``coef``/``cov`` are NaN (and ``message`` says so); when the iteration limit is reached or a
    coefficient diverges, they hold the last iterate. ``n`` counts the rows given, ``events``
    the rows with event = 1 (unweighted).
    """

    coef: np.ndarray
    cov: np.ndarray
    loglik: float
    loglik0: float
    iterations: int
    converged: bool
    message: str
    n: int
    events: int


def _singular_message(info: np.ndarray, sd: np.ndarray) -> str:
    if not np.isfinite(info).all():
        return (
            "the score or information is not finite (numerical overflow); rescale columns with "
            "extreme values or give starting values (init)"
        )
    const = np.flatnonzero(sd == 0)
    if const.size:
        return (
            f"information matrix is singular: column(s) {const.tolist()} are constant among "
            "the rows at risk; drop them"
        )
    diag = np.sqrt(np.clip(np.diag(info), 1e-300, None))
    vals, vecs = np.linalg.eigh(info / np.outer(diag, diag))
    weak = vecs[:, 0]
    involved = np.flatnonzero(np.abs(weak) > 0.1 * np.abs(weak).max()).tolist()
    return (
        "information matrix is singular (or not positive definite): columns "
        f"{involved} are (nearly) collinear, or a coefficient is diverging "
        f"(smallest scaled eigenvalue {vals[0]:.2g}); drop or combine those columns"
    )


def newton_step(info: np.ndarray, score: np.ndarray) -> np.ndarray | None:
    """``info⁻¹ score`` by Cholesky, or None when the information is not finite and positive
    definite or the step is not finite."""
    if not (np.isfinite(info).all() and np.isfinite(score).all()):
        return None
    try:
        factor = linalg.cho_factor(info, check_finite=False)
    except linalg.LinAlgError:
        return None
    step = linalg.cho_solve(factor, score, check_finite=False)
    return step if np.isfinite(step).all() else None


@dataclass
class _Iterate:
    """Where Newton's method stopped (``status`` converged, singular, max_iter or halving) or
    starts (``status`` "", or ``_BAD_START`` at given values where the likelihood is not
    finite)."""

    beta: np.ndarray
    loglik: float
    score: np.ndarray
    info: np.ndarray
    iterations: int
    status: str
    last_change: float
    # False when ``info`` is another point's (a subsample's, or the previous iterate's); the
    # point's partial evaluation then completes it (see ``_newton``)
    exact: bool = True
    point: _Point | None = None


def _diverging(step: np.ndarray, beta: np.ndarray, tol: float) -> np.ndarray:
    """Columns whose Newton step keeps them moving: a diverging coefficient's steps stay near
    1 (standardised units), a converging one's shrink quadratically; 1e-4 tells them apart."""
    big = (np.abs(step) > max(1e-4, 100.0 * tol)) & (np.abs(step) > np.sqrt(tol) * np.abs(beta))
    return np.flatnonzero(big)


def _settled(D: _Design, step: np.ndarray, tol: float, limit: float | None = None) -> bool:
    """The step changes no row's linear predictor by more than ``limit`` (``100 * tol``): first
    a bound (``|step| . reach``), then, near that point only, the exact largest change (on a
    compiled design by a kernel that stops at the first row beyond the limit: the same
    decision)."""
    limit = 100.0 * tol if limit is None else limit
    bound = float(np.abs(step) @ D.reach)
    if bound <= limit:
        return True
    if bound > max(1e-3, 10.0 * limit):
        return False
    if D.compiled:  # (one pass that stops at the first row beyond the limit)
        from ..compiled import cox_settle

        return bool(cox_settle.within(D.X1, np.ascontiguousarray(step, dtype=float), limit))
    return float(np.abs(D.X1[:, 1:] @ step).max()) <= limit


# A chord step (the previous point's information with this point's score) is taken while the
# steps shrink at least this much from one to the next; otherwise the information is evaluated.
_CHORD_CONTRACTION = 0.01


def _newton(
    L: Layout, D: _Design, efron: bool, start: _Iterate, max_iter: int, tol: float,
    rough: float | None = None,
) -> _Iterate:
    """Newton steps with step halving from ``start`` (score, and an information that may be
    another point's, evaluated there).

    Each new point gets its log partial likelihood and score only (the risk-set sums of r); its
    information (the Gram product and the sums of r x, about two thirds of an evaluation) only
    when it is needed: when the step that the previous information gives (a chord step)
    shrank by less than ``_CHORD_CONTRACTION`` from the step before, when it would stop, and
    at any stop. Chord steps converge to the same maximum (the score is exact); they are the
    cheap steps near the estimate, where the information hardly changes.

    Converged when the next step, with the point's own information, would change no row's
    linear predictor by more than ``100 * tol`` (checked only where the information is the full
    data's, that is after one step at least), so that the information at the last point is, to
    about that fraction, the one at the estimate; or, where rounding keeps the steps from
    getting that small, after three steps in a row changed the log partial likelihood by at
    most ``tol * max(1, |loglik|)``. Also stops, for the caller to report, when the log partial
    likelihood has levelled off like that while a coefficient keeps moving. The last point
    evaluated is returned, not the next step's, always with its own information.

    ``rough`` (a start for a larger sample): also converged as soon as a step, chord or not,
    would change no row's linear predictor by more than ``rough``.
    """
    beta, ll, score, info = start.beta, start.loglik, start.score, start.info
    exact, pt = start.exact, start.point
    iterations = flat = 0
    last_change = float("nan")
    last_size = float("inf")  # largest |component| of the step that led here (none: a chord)

    def stop(status: str) -> _Iterate:
        nonlocal score, info
        if not exact:
            assert pt is not None
            score, info = _information(L, D, pt)
        return _Iterate(beta, ll, score, info, iterations, status, last_change)

    while True:
        step = newton_step(info, score)
        if rough is not None and iterations and step is not None and _settled(D, step, tol, rough):
            return stop("converged")
        if not exact:
            assert pt is not None
            if (
                step is None
                or iterations >= max_iter
                or not np.abs(step).max() <= _CHORD_CONTRACTION * last_size
                or _settled(D, step, tol)
            ):
                score, info = _information(L, D, pt)
                exact = True
                step = newton_step(info, score)
        if step is None:
            return stop("singular")
        if iterations and exact:
            levelled = abs(last_change) <= tol * max(1.0, abs(ll))
            flat = flat + 1 if levelled else 0
            diverging = levelled and _diverging(step, beta, tol).size > 0
            if diverging or flat >= 3 or _settled(D, step, tol):
                return stop("converged")
        if iterations >= max_iter:
            return stop("max_iter")
        iterations += 1
        halving = 0
        while True:
            cand = beta + step
            pt_c = _point(L, D, cand, efron, False)
            ll_c = pt_c.loglik
            if np.isfinite(ll_c) and ll_c >= ll - 1e-12 * max(1.0, abs(ll)):
                break
            halving += 1
            step = step / 2.0
            if halving > 40:
                return stop("halving")
        last_change = ll_c - ll
        last_size = float(np.abs(step).max()) if halving == 0 else float("nan")
        beta, ll, pt, exact = cand, ll_c, pt_c, False
        score = _score(L, D, pt_c)


# Starting values for large data: Newton's method from zero needs several steps before it
# reaches the region where it converges quadratically. Those steps are taken on a systematic
# subsample (every ``stride``-th row in time order, stride 4 to 8, at least _WARM_EVENTS
# events), itself started the same way when it is large enough (a subsample's own subsample
# needs only half as many events: its estimate serves a fit that stops early, at _WARM_ROUGH,
# and its steps cost an eighth of the subsample's). The first step on the full
# data uses the subsample's information scaled up to the full data (its error is of the order
# of the subsample's sampling error, which the quadratic convergence absorbs), so the full data
# need the score at the start and then about three full evaluations instead of six or seven.
# The estimate is still the full data's maximum, and the information the full data's.
_WARM_EVENTS = 2_500


_WARM_MIN_STRIDE, _WARM_MAX_STRIDE = 4, 8
_WARM_ROUGH = 0.05


def _warm_start(
    L: Layout, D: _Design, efron: bool, nested: bool = False
) -> tuple[np.ndarray, np.ndarray] | None:
    """Standardised coefficients fitted on a subsample and its information scaled to the full
    data, or None (too few events for a subsample to pay off, or no converged fit).
    ``nested``: ``L`` is itself a subsample."""
    per_stride = max(1, _WARM_EVENTS // 2) if nested else _WARM_EVENTS
    stride = min(L.events // per_stride, _WARM_MAX_STRIDE)
    if stride < _WARM_MIN_STRIDE:
        return None
    pos = np.arange(0, L.order.size, stride)
    sub = L.subsamples.get(stride)
    if sub is None:
        sub = L.subsamples[stride] = _prepare(
            pos.size,
            L.time_s[pos],
            L.event_s[pos],
            None if L.entry_s is None else L.entry_s[pos],
            None if L.code_s is None else L.code_s[pos],
            None if L.unit_w else L.w[pos],
        )
    if sub.events == 0:
        return None
    Dsub = _Design.of(np.take(D.X1, pos[sub.order], axis=0), sub.we, D.reach,
                      compiled_from=D.X1.shape[0])  # (compiled when the sample's fit is)
    # the subsample's estimate differs from the full data's by its sampling error (of the
    # order of 1 / sqrt(its events)), so it stops once a step would change no linear predictor
    # by more than _WARM_ROUGH, and takes that step
    sub_start = _start(sub, Dsub, efron, nested=True)
    sub_stop = _newton(sub, Dsub, efron, sub_start, 30, 1e-5, _WARM_ROUGH)
    if sub_stop.status != "converged" or not np.isfinite(sub_stop.beta).all():
        return None
    next_step = newton_step(sub_stop.info, sub_stop.score)
    if next_step is None or np.abs(next_step).max() > 0.1:  # e.g. a coefficient diverging there
        return None
    return sub_stop.beta + next_step, sub_stop.info * (L.wsum.sum() / sub.wsum.sum())


def _start(
    L: Layout, D: _Design, efron: bool, ll0: float | None = None, warm_ok: bool = True,
    nested: bool = False,
) -> _Iterate:
    """Where Newton's method starts without starting values: at a subsample's estimate (with
    the score there and the subsample's information) when that pays off, otherwise at zero."""
    zero = np.zeros(D.X1.shape[1] - 1)
    warm = _warm_start(L, D, efron, nested) if warm_ok else None
    if warm is not None:
        pt = _point(L, D, warm[0], efron, False)
        if ll0 is None:
            ll0 = _evaluate(L, D, zero, efron, 0)[0]
        if np.isfinite(pt.loglik) and pt.loglik >= ll0:
            return _Iterate(warm[0], pt.loglik, _score(L, D, pt), warm[1], 0, "", pt.loglik,
                            exact=False, point=pt)
    ll, score, info = _evaluate(L, D, zero, efron)  # no (useful) subsample fit
    return _Iterate(zero, ll, score, info, 0, "", ll)


def fit_cox(
    X: Any,
    time: Any,
    event: Any,
    *,
    entry: Any | None = None,
    strata: Any | None = None,
    weights: Any | None = None,
    ties: str = "efron",
    max_iter: int = 50,
    tol: float = 1e-9,
    init: Any | None = None,
    layout: Layout | None = None,
) -> CoxFit:
    """Fit a Cox proportional-hazards model by maximising the partial likelihood.

    X: (n, p) covariates (p may be 0). time: exit times. event: 0/1 (or bool).
    entry: optional entry times (delayed entry; a row is at risk at t when entry < t <= time).
    strata: optional labels; each stratum has its own baseline hazard.
    weights: optional positive case weights (the information is the model-based one, not a
    robust sandwich). ties: "efron" (default) or "breslow".
    Convergence: Newton steps with step halving until the next step would change no row's
    linear predictor by more than ``100 * tol``; that step is then taken (``loglik`` is its
    quadratic prediction, ``cov`` the inverse information at the last point evaluated, where
    no weight exp(eta) differs by more than that fraction). A coefficient that keeps moving
    once the log partial likelihood changes by less than ``tol * max(1, |loglik|)`` is
    reported as diverging.
    ``init`` are starting values on the scale of X; without them, data with many events
    (10,000 or more) start from a fit to a subsample (``iterations`` counts the steps on the
    full data only).
    ``layout``: the sample prepared by :func:`prepare_layout` from the same time, event, entry,
    strata and weights; those are then not read again (only the row count is checked), which
    saves the sort and the risk-set layout when one sample gets many fits. The fit is
    bit-for-bit the one without it.
    """
    efron = _efron(ties)
    Xa, L = _design_and_layout(X, layout, time, event, entry, strata, weights)
    n, p = Xa.shape
    nan_coef, nan_cov = np.full(p, np.nan), np.full((p, p), np.nan)
    if L.events == 0:
        msg = "" if p == 0 else "no events: the coefficients are not estimable"
        return CoxFit(nan_coef, nan_cov, 0.0, 0.0, 0, p == 0, msg, n, 0)

    D, scale, sd = _standardised(Xa, L)
    ll0 = _evaluate(L, D, np.zeros(p), efron, 0)[0]
    if p == 0:
        return CoxFit(np.zeros(0), np.zeros((0, 0)), ll0, ll0, 0, True, "", n, L.events)

    if init is None:
        # (with no step allowed, the information must be the full data's)
        start = _start(L, D, efron, ll0, warm_ok=max_iter >= 1)
    else:
        start = _given_start(L, D, efron, init, scale)
        if start.status == _BAD_START:
            return CoxFit(nan_coef, nan_cov, start.loglik, ll0, 0, False, _BAD_START_MESSAGE,
                          n, L.events)
    stop = _newton(L, D, efron, start, max_iter, tol)
    if stop.status == "singular":
        message = _singular_message(stop.info, sd)
        return CoxFit(nan_coef, nan_cov, stop.loglik, ll0, stop.iterations, False, message, n,
                      L.events)
    coef, cov, loglik, message = _estimate(stop, scale, sd, max_iter, tol)
    converged = stop.status == "converged" and not message
    return CoxFit(coef, cov, float(loglik), float(ll0), stop.iterations, converged, message, n,
                  L.events)


def _efron(ties: str) -> bool:
    """True for Efron's handling of tied event times, False for Breslow's."""
    if ties not in ("efron", "breslow"):
        raise ValueError(f"ties must be 'efron' or 'breslow', got {ties!r}")
    return ties == "efron"


_BAD_START = "bad_start"
_BAD_START_MESSAGE = (
    "log partial likelihood is not finite at the starting values (init); "
    "start from zero or from smaller values"
)


def _given_start(L: Layout, D: _Design, efron: bool, init: Any, scale: np.ndarray) -> _Iterate:
    """Newton's start at the caller's values ``init`` (on the scale of X), checked; its status
    is ``_BAD_START`` when the log partial likelihood is not finite there."""
    init_arr = _as_1d("init", init, None)
    if init_arr.shape[0] != scale.size:
        raise ValueError(f"init has {init_arr.shape[0]} values but X has {scale.size} columns")
    _check_finite("init", init_arr)
    ll, score, info = _evaluate(L, D, init_arr * scale, efron)
    status = "" if np.isfinite(ll) else _BAD_START
    return _Iterate(init_arr * scale, ll, score, info, 0, status, ll)


def _stop_message(stop: _Iterate, max_iter: int) -> str:
    """What to tell the caller when Newton's method stopped without converging."""
    if stop.status == "max_iter":
        return (
            f"no convergence after {max_iter} Newton iteration(s) (last change in log "
            f"partial likelihood {stop.last_change:.3g}); raise max_iter, start from better "
            "values (init), or look for a covariate with extreme values or separation"
        )
    if stop.status == "halving":
        return (
            "step halving could not improve the log partial likelihood "
            f"(at {stop.loglik:.6g}); the model may be overparameterised or a covariate may "
            "have extreme values - rescale or drop columns, or give init"
        )
    return ""


def _unscaled(
    beta: np.ndarray, info: np.ndarray, scale: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Coefficients and covariance (the inverse information) on the scale of X; the covariance
    is NaN when the information cannot be inverted."""
    try:
        cov_s = linalg.inv(info, check_finite=True)
    except (linalg.LinAlgError, ValueError):
        return beta / scale, np.full((scale.size, scale.size), np.nan)
    return beta / scale, cov_s / np.outer(scale, scale)


def _estimate(
    stop: _Iterate, scale: np.ndarray, sd: np.ndarray, max_iter: int, tol: float
) -> tuple[np.ndarray, np.ndarray, float, str]:
    """The estimate on the scale of X, its covariance and log partial likelihood, and a message
    ("" when the fit is fine), from where Newton's method stopped (not at a singular point).

    After convergence, the Newton step from the last point: a coefficient that keeps moving
    although the likelihood stopped changing is going to infinity (monotone likelihood), as
    when one group has no events; otherwise the step is taken without evaluating its end point
    (its log partial likelihood is the quadratic prediction, error of the order of the step
    cubed; the information stays the last point's, where no weight exp(eta) differs from the
    estimate's by more than a fraction of about 100 * tol).
    """
    beta, loglik = stop.beta, stop.loglik
    message = _stop_message(stop, max_iter)
    if stop.status == "converged":
        step = newton_step(stop.info, stop.score)
        if step is None:
            nan_cov = np.full((scale.size, scale.size), np.nan)
            return beta / scale, nan_cov, loglik, _singular_message(stop.info, sd)
        diverging = _diverging(step, beta, tol)
        if diverging.size:
            message = (
                f"coefficient(s) of column(s) {diverging.tolist()} diverge while the log "
                "partial likelihood has levelled off (monotone likelihood: e.g. no events in "
                "one group of a binary column); the estimate is infinite - merge groups or "
                "drop the column"
            )
        else:
            loglik += float(stop.score @ step) / 2.0
            beta = beta + step
    coef, cov = _unscaled(beta, stop.info, scale)
    if not np.isfinite(cov).all() and not message:
        message = "the information matrix could not be inverted at the estimate"
    return coef, cov, loglik, message


def refit_near(
    X: Any, layout: Layout, init: Any, *, ties: str = "efron", tol: float = 1e-9,
    max_iter: int = 50,
) -> np.ndarray | None:
    """Coefficients only, for refits that start close to their estimate (bootstrap replicates
    started at the full-sample estimate): one Newton step from ``init`` with the information
    there, then quasi-Newton steps that recompute only the log partial likelihood and the
    score (the risk-set sums of ``exp(eta)`` alone, no Gram product) and correct that
    information by a secant (BFGS) update from each step and its change in score
    (:func:`secant_refit`). The score is exact, so the fixed point is the maximum ``fit_cox``
    finds; the corrected information tracks the one at the estimate, so the steps shrink
    faster than with the start's information kept fixed (chord steps, linear convergence).
    Stops by ``fit_cox``'s rule (the next step would change no row's linear predictor by more
    than ``100 * tol``; that step is taken). Returns None when it does not settle, the
    likelihood falls or the information is singular: the caller then fits with ``fit_cox``.
    Many replicates of one sample: :func:`near_start` once, then :func:`refit_replicate`.
    """
    out = _near(X, layout, init, ties, tol, max_iter, False)
    return None if out is None else out[0]


def refit_near_loglik(
    X: Any, layout: Layout, init: Any, *, ties: str = "efron", tol: float = 1e-9,
    max_iter: int = 50,
) -> tuple[np.ndarray, float] | None:
    """:func:`refit_near` with the log partial likelihood at the estimate (evaluated there,
    not predicted), for refits whose likelihood is what is wanted (the bootstrap of the
    information kept)."""
    return _near(X, layout, init, ties, tol, max_iter, True)


def secant_update(H: np.ndarray, step: np.ndarray, y: np.ndarray) -> np.ndarray:
    """The BFGS update of the inverse information ``H`` from a step and the score's fall along
    it, ``y = score(before) - score(after)``: the updated inverse maps ``y`` to the step (its
    inverse is the information averaged along the step) and the information it stands for is
    unchanged on what is orthogonal to the step in that information's metric (Nocedal & Wright
    2006, sec. 6.1, the update of the inverse, eq. 6.17). Kept as it was when the curvature
    ``step . y`` is not positive (the concave log partial likelihood makes it positive unless
    rounding dominates)."""
    sy = float(step @ y)
    if not sy > 0.0:
        return H
    Hy = H @ y
    rho = 1.0 / sy
    cross = np.outer(step, Hy)
    return H - rho * (cross + cross.T) + (rho * rho * float(y @ Hy) + rho) * np.outer(step, step)


def inverse_information(info: np.ndarray) -> np.ndarray | None:
    """The inverse of a finite, positive definite information matrix (by its Cholesky factor),
    or None when it is not one."""
    if not np.isfinite(info).all():
        return None
    factor, bad = linalg.lapack.dpotrf(info, lower=False, clean=True)
    if bad != 0:
        return None
    inv, bad = linalg.lapack.dpotri(factor, lower=False)
    if bad != 0:
        return None
    upper = np.triu(inv)
    return upper + np.triu(inv, 1).T


def secant_start(ll: float, score: np.ndarray, info: np.ndarray) -> np.ndarray | None:
    """The inverse information a secant refit starts from, given the log partial likelihood,
    score and information at its start; None when any of them is not finite or the
    information is not positive definite (the refit is then declined)."""
    if not (np.isfinite(ll) and np.isfinite(score).all()):
        return None
    return inverse_information(info)


# One secant refit's evaluation at a point: its log partial likelihood and its score (the
# score may be anything when the log partial likelihood is not finite).
ScoreAt = Callable[[np.ndarray], tuple[float, np.ndarray]]


def secant_refit(
    beta: np.ndarray, ll: float, score: np.ndarray, H: np.ndarray, score_at: ScoreAt,
    settled: Callable[[np.ndarray], bool], tol: float, max_iter: int,
    trace: list[np.ndarray] | None = None, last: list[Any] | None = None,
) -> np.ndarray | None:
    """Quasi-Newton steps from ``beta`` (log partial likelihood ``ll``, score ``score``, an
    inverse information ``H``): each step is ``H @ score``; the step is taken, and returned as
    the estimate when ``settled(step)``; otherwise the new point's log partial likelihood and
    score come from ``score_at`` and ``H`` gets the BFGS update (:func:`secant_update`) from
    the step and the change in score. None when a step is not finite, the log partial
    likelihood falls by more than ``tol * max(1, |ll|)`` or ``max_iter`` steps do not settle.
    The driver of the Cox engine's replicate refits and of the Fine–Gray model's
    (``unbin.models.fine_gray.fit_near``). ``trace`` (for tests) receives each point
    evaluated and last the estimate returned; ``last``, when given, receives the last point's
    log partial likelihood, its score and the settling step taken from it."""
    for _ in range(max_iter):
        if trace is not None:
            trace.append(beta)
        step = H @ score
        if not np.isfinite(step).all():
            return None
        beta = beta + step
        if settled(step):
            if trace is not None:
                trace.append(beta)
            if last is not None:
                last[:] = [ll, score, step]
            return beta
        ll_next, score_next = score_at(beta)
        if not np.isfinite(ll_next) or ll_next < ll - tol * max(1.0, abs(ll)):
            return None
        H = secant_update(H, step, score - score_next)
        ll, score = ll_next, score_next
    return None


def _near(
    X: Any, layout: Layout, init: Any, ties: str, tol: float, max_iter: int, with_loglik: bool,
    trace: list[np.ndarray] | None = None,
) -> tuple[np.ndarray, float] | None:
    """:func:`refit_near`'s iteration; ``trace`` (for tests) receives each point evaluated,
    on the scale of X, and last the estimate returned."""
    efron = _efron(ties)
    Xa = _design(X)
    _check_finite("X", Xa)
    L = _given_layout(layout, Xa.shape[0])
    p = Xa.shape[1]
    init_arr = _as_1d("init", init, p)
    if p == 0 or L.events == 0 or not np.isfinite(init_arr).all():
        return None
    D, scale, _ = _standardised(Xa, L)
    beta = init_arr * scale
    ll, score, info = _evaluate(L, D, beta, efron)
    H = secant_start(ll, score, info)
    if H is None:
        return None
    return _near_steps(L, D, beta, ll, score, H, scale, efron, tol, max_iter, with_loglik,
                       100.0 * tol, trace)


def _near_steps(
    L: Layout, D: _Design, beta: np.ndarray, ll: float, score: np.ndarray, H: np.ndarray,
    scale: np.ndarray, efron: bool, tol: float, max_iter: int, with_loglik: bool,
    limit: float, trace: list[np.ndarray] | None, settled_loglik: bool = False,
) -> tuple[np.ndarray, float] | None:
    """The secant steps of a Cox refit on the standardised design ``D`` (``scale``: to map
    back to X's), and the log partial likelihood at the estimate when ``with_loglik``:
    evaluated there, or (``settled_loglik``) from the last point evaluated, ``ll + g's / 2``
    (g its score, s the settling step: the quadratic model's value at the estimate, exact for
    a Newton step on a quadratic; see :func:`_settled_loglik`)."""

    def score_at(b: np.ndarray) -> tuple[float, np.ndarray]:
        got = _evaluate(L, D, b, efron, 1)
        return got[0], got[1]

    inner: list[np.ndarray] | None = [] if trace is not None else None
    last: list[Any] = []
    end = secant_refit(beta, ll, score, H, score_at, lambda step: _settled(D, step, tol, limit), tol,
                       max_iter, inner, last)
    if trace is not None and inner is not None:
        trace.extend(b / scale for b in inner)
    if end is None:
        return None
    if not with_loglik:
        ll_end = float("nan")
    elif settled_loglik:
        ll_end = _settled_loglik(*last)
    else:
        ll_end = _evaluate(L, D, end, efron, 0)[0]
    return np.asarray(end / scale), float(ll_end)


def _settled_loglik(ll: float, score: np.ndarray, step: np.ndarray) -> float:
    """The log partial likelihood at ``beta + step`` from its value ``ll`` and ``score`` at
    ``beta``, where ``step`` is the settling quasi-Newton step ``H score``: ``ll + score' step
    / 2``. Its error is ``step' (H^-1 - I) step / 2`` plus third-order terms (I the
    information): the step changes no row's linear predictor by more than the stop's bound
    (3e-8 for the replicate refits at tol 1e-9), so ``step' I step``, at most the events'
    summed squared changes, is below 1e-9 for a million events, and the error a fraction of
    that, where an evaluation at the estimate (a pass over the design) carries the rounding
    of a sum of a million terms (a log-likelihood of 5e6 is spaced 9e-10 apart)."""
    return float(ll + 0.5 * float(score @ step))


# The replicate refits stop once the next step would change no row's linear predictor by more
# than this times tol (that step taken): a third of fit_cox's bound, because their first
# information is another sample's (the full sample's, scaled), so the secant information at
# the last step is rougher than after a start at the replicate's own and the last step leaves
# more of the bound. At 100 x tol the demo's replicate refits (marrowby, death_egfr) ended up
# to 2.7e-8 from the maximum on some row's linear predictor (Newton to tol 1e-13; the refits
# started at the replicate's own information: 1.1e-8), at 30 x tol 3.6e-9, at 10 x tol 1.4e-9.
_REPLICATE_SETTLE = 30.0


@dataclass(frozen=True)
class NearStart:
    """One design of a full sample prepared once for the secant refits of its bootstrap
    replicates (:func:`refit_replicate`): the replicates share the sample's rows, so they share
    its centring and scaling (the partial likelihood is invariant to both), the bound on the
    standardised columns, the start and the full sample's information there, which, scaled to
    a replicate's summed event weight, stands in for the replicate's own in the first step
    (their difference is of the order of the replicate's sampling error, which the secant
    updates correct; the score is always the replicate's own, so the maximum is too)."""

    n: int  # rows of the full sample (the design itself is the caller's: not kept here)
    mean: np.ndarray  # (p,) centre of each column
    scale: np.ndarray  # (p,) its standard deviation (1 for a constant column)
    beta: np.ndarray  # (p,) the start on the standardised scale
    H: np.ndarray | None  # (p, p) inverse information at the start times the summed event
    # weight (None: not positive definite there; each replicate then evaluates its own)
    efron: bool
    # what the batched refits (``replicates.refit_replicates``) derive from the design once
    memo: dict[str, Any] = field(default_factory=dict, compare=False, repr=False)
    # the compiled path's standardised design of the full sample in its layout's order, ones
    # first (``_replicate_design`` copies a replicate's rows from it, a near-sequential read),
    # each full-sample row's position in it (-1: not laid out) and the scratch shared by the
    # starts of one layout (``_sorted_replicate_design``); None on the numpy path
    sorted_X1: np.ndarray | None = field(default=None, compare=False, repr=False)
    rank: np.ndarray | None = field(default=None, compare=False, repr=False)
    scratch: dict[str, Any] | None = field(default=None, compare=False, repr=False)


def near_start(
    X: Any, init: Any, layout: Layout, *, ties: str = "efron"
) -> NearStart | None:
    """Prepare the design ``X`` of the full sample laid out in ``layout`` (``prepare_layout``
    of the same rows) for the refits of its replicates started at ``init`` (on X's scale, the
    full sample's estimate); None when ``init`` is not finite or X has no columns or the
    sample no events (a replicate then fits with ``fit_cox``)."""
    efron = _efron(ties)
    Xa = np.ascontiguousarray(_design(X), dtype=float)
    _check_finite("X", Xa)
    L = _given_layout(layout, Xa.shape[0])
    p = Xa.shape[1]
    init_arr = _as_1d("init", init, p)
    if p == 0 or L.events == 0 or Xa.shape[0] == 0 or not np.isfinite(init_arr).all():
        return None
    mean, sd, _, _ = _column_stats(Xa)
    sd[sd <= 1e-12 * np.maximum(1.0, np.abs(mean))] = 0.0
    scale = np.where(sd > 0, sd, 1.0)
    beta = init_arr * scale
    D = _replicate_design(Xa, None, L, mean, 1.0 / scale)[0]
    ll, _, info = _evaluate(L, D, beta, efron)
    H = inverse_information(info) if np.isfinite(ll) else None
    # the sorted design kept for the replicates' copies: on the compiled path, while the
    # copies a sample's starts hold stay within SORTED_BUDGET bytes (beyond, a start's
    # replicates gather their design from X as before)
    scratch: dict[str, Any] = L.kernel.setdefault("replicate_scratch", {"held": 0})
    kept = D.compiled and scratch["held"] + D.X1.nbytes <= SORTED_BUDGET
    if kept:
        scratch["held"] += D.X1.nbytes
        weakref.finalize(D.X1, _release, scratch, D.X1.nbytes)
    return NearStart(Xa.shape[0], mean, scale, beta, None if H is None else H * _event_weight(L),
                     efron, sorted_X1=D.X1 if kept else None,
                     rank=_layout_rank(L) if kept else None, scratch=scratch if kept else None)


# Bytes of sorted designs (``NearStart.sorted_X1``) the starts of one sample may hold at once:
# 1,000,000 rows x (1 + 6) columns take 56 MB, so the 8 designs of an information bootstrap
# fit; a table with more or wider designs gathers the rest from X.
SORTED_BUDGET = 512 * 2**20


def _release(scratch: dict[str, Any], nbytes: int) -> None:
    """A kept sorted design is gone: its bytes no longer count against the budget."""
    scratch["held"] -= nbytes


def _layout_rank(L: Layout) -> np.ndarray:
    """Each of the sample's rows' position in ``L``'s order, -1 for a row not laid out (made
    once per layout, kept in ``L.kernel``)."""
    got = L.kernel.get("rank")
    if got is None:
        got = L.kernel["rank"] = np.full(L.n, -1, dtype=np.int64)
        got[L.order] = np.arange(L.order.size)
    rank: np.ndarray = got
    return rank


def _event_weight(L: Layout) -> float:
    return float(L.wsum.sum())


def _replicate_design(
    Xa: np.ndarray, rows: np.ndarray | None, L: Layout, mean: np.ndarray, inv: np.ndarray
) -> tuple[_Design, np.ndarray]:
    """The rows ``rows`` of ``Xa`` (all when None) in ``L``'s order, centred at ``mean`` and
    scaled by ``inv``, and the largest and smallest value of each standardised column."""
    X1 = np.empty((L.order.size, 1 + Xa.shape[1]))
    X1[:, 0] = 1.0
    bounds = np.empty((2, Xa.shape[1]))
    idx = L.order if rows is None else rows[L.order]  # the source row of each laid-out row
    if compiled.wanted(L.order.size, EVALUATION_FROM_ROWS):
        from ..compiled import cox_standardise  # (a gather, its random reads overlapped)

        xwe = np.empty(Xa.shape[1])
        cox_standardise.gather_standardised(X1, Xa, np.asarray(idx, dtype=np.int64), L.we,
                                            mean, inv, bounds, True, xwe)
    else:
        xwe = _write_standardised(X1, Xa, idx, mean, inv, L.we, bounds)
    reach = np.maximum(bounds[0], -bounds[1])
    return _Design.of(X1, L.we, reach, xwe), bounds


def _sorted_replicate_design(
    start: NearStart, rows: np.ndarray, L: Layout
) -> tuple[_Design, np.ndarray] | None:
    """:func:`_replicate_design` of the drawn rows ``rows`` laid out in ``L``, copied from the
    full sample's standardised design in its layout's order (``start.sorted_X1``): the same
    values, events' summed ``w x`` (in ``L``'s order) and column bounds, bit for bit. A
    replicate's rows in its layout's order are the full sample's laid-out rows, each repeated
    as drawn (``layout.draw_layout``), so the copy reads the full design nearly in order where
    the gather from X read a random row per row. The rows are written into ``start.scratch``,
    shared by the starts of one layout and reused from refit to refit (a fresh array of that
    size costs a page fault per 4 KiB): the design is valid until the next call, which
    :func:`refit_replicate`, its only user, never outlives. None on the numpy path or where a
    drawn row is not laid out in the full sample (the caller then gathers from X)."""
    S, rank, scratch = start.sorted_X1, start.rank, start.scratch
    if S is None or rank is None or scratch is None or not compiled.wanted(
            L.order.size, EVALUATION_FROM_ROWS):
        return None
    from ..compiled import cox_standardise

    # the full layout's position of each laid-out row's source row: kept by draw_layout
    # when it derived L from the full layout, else found once per replicate
    drawn = L.kernel.get("drawn_from")
    seen = L.kernel.get("drawn_positions")
    if drawn is not None and drawn[0].kernel.get("rank") is rank:
        pos = drawn[1]
    elif seen is not None and seen[0] is rows and seen[1] is rank:
        pos = seen[2]
    else:
        pos = rank[rows[L.order]]
        L.kernel["drawn_positions"] = (rows, rank, pos)
    m, q = L.order.size, S.shape[1]
    buf = scratch.get("X1")
    if buf is None or buf.size < m * q:
        scratch.pop("X1", None)  # (released before the larger one is taken)
        buf = scratch["X1"] = np.empty(max(m, start.n + 1) * q)
    X1 = buf[: m * q].reshape(m, q)
    bounds = np.empty((2, q - 1))
    xwe = np.empty(q - 1)
    if not cox_standardise.copy_standardised(X1, S, pos, L.we, bounds, xwe):
        return None
    reach = np.maximum(bounds[0], -bounds[1])
    return _Design.of(X1, L.we, reach, xwe), bounds


def refit_replicate(
    start: NearStart, X: Any, rows: np.ndarray, layout: Layout, *, tol: float = 1e-9,
    max_iter: int = 50, with_loglik: bool = False,
) -> tuple[np.ndarray, float] | None:
    """The Cox refit of one replicate of ``start``'s sample (``X``: the full sample's design
    that ``start`` was prepared from; a C-contiguous float array is read in place, anything
    else copied per call): its drawn rows ``rows`` (indices
    into the full sample, a row drawn k times repeated k times) laid out in ``layout``
    (``prepare_layout`` of those rows, with their case weights), by :func:`refit_near`'s secant
    steps from the full-sample estimate, without a copy of the replicate's design rows or
    their column statistics and without evaluating the information: the first step takes the
    full sample's, scaled to the replicate's summed event weight. The coefficients (on X's
    scale) and, ``with_loglik``, the log partial likelihood at them (NaN otherwise); None when
    the steps do not settle, the likelihood falls or a column is constant among the
    replicate's rows (the caller then fits with ``fit_cox``, which reports that)."""
    first = replicate_first_point(start, X, rows, layout)
    if first is None:
        return None
    L, D, ll, score, H = first
    return _near_steps(L, D, start.beta, ll, score, H, start.scale, start.efron, tol, max_iter,
                       with_loglik, _REPLICATE_SETTLE * tol, None, settled_loglik=True)


def replicate_first_point(
    start: NearStart, X: Any, rows: np.ndarray, layout: Layout,
) -> tuple[Layout, _Design, float, np.ndarray, np.ndarray] | None:
    """The first point of :func:`refit_replicate`'s secant steps: the replicate's layout, its
    standardised design, and the log partial likelihood, score and starting inverse
    information at the full-sample estimate; None where the refit declines (no events, a
    column constant among the drawn rows, a singular information, a value not finite)."""
    L = _given_layout(layout, rows.size)
    Xa = np.ascontiguousarray(X, dtype=float)
    if Xa.shape != (start.n, start.mean.size):
        raise ValueError(
            f"X has shape {Xa.shape} but the start was prepared from a design of shape "
            f"({start.n}, {start.mean.size}); pass the same design as to near_start"
        )
    if L.events == 0:
        return None
    inv = 1.0 / start.scale
    copied = _sorted_replicate_design(start, rows, L)
    D, bounds = copied if copied is not None else _replicate_design(Xa, rows, L, start.mean,
                                                                    inv)
    # a column constant among the replicate's rows (as fit_cox's test, on the standardised
    # scale) makes its information singular
    top = np.maximum(np.abs(bounds[0]), np.abs(bounds[1])) + np.abs(start.mean) * inv
    if np.any(bounds[0] - bounds[1] <= 1e-12 * np.maximum(inv, top)):
        return None
    if start.H is None:
        ll, score, info = _evaluate(L, D, start.beta, start.efron)
        H = inverse_information(info)
        if H is None:
            return None
    else:
        ll, score, _ = _evaluate(L, D, start.beta, start.efron, 1)
        H = start.H / _event_weight(L)
    if not (np.isfinite(ll) and np.isfinite(score).all()):
        return None
    return L, D, ll, score, H

