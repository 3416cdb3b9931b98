"""The one result object every fitter returns, and the outcome arrays every fitter takes."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np


@dataclass(frozen=True)
class Outcome:
    """Outcome arrays of one analysis sample, already aligned with the design matrix rows.

    ``y`` is the event indicator (binary, survival), the value (continuous) or the count (count).
    ``offset`` is log person-time (count). ``time``/``entry``/``strata`` are for survival.
    ``cache`` holds what fitters derive from the outcome alone and reuse across the many fits
    of one sample (e.g. the Cox engine's sorted risk-set layout); it is never compared or
    shown, and a subset starts with an empty one.
    """

    family: str
    y: np.ndarray
    offset: np.ndarray | None = None
    time: np.ndarray | None = None
    entry: np.ndarray | None = None
    strata: np.ndarray | None = None
    weights: np.ndarray | None = None
    # How ``weights`` are meant: "frequency" (a row stands for that many identical rows; the
    # model variance holds) or "sampling" (survey, inverse-probability or case-control sampling
    # weights: the variance is the robust sandwich, unbin.models.robust).
    weight_kind: str = "frequency"
    # Cluster codes (centre, family, person): cluster-robust variances when given.
    cluster: np.ndarray | None = None
    # Count outcomes: "poisson", "quasi-poisson" (Pearson scale) or "negative-binomial" (NB2).
    dispersion: str = "poisson"
    # Binary outcomes: "firth" for Firth's penalised likelihood (unbin.models.firth); with
    # ``strata`` set, a binary outcome is a matched design (conditional logistic regression,
    # unbin.models.matched).
    penalty: str = "none"
    # Survival with competing events: every row's cause code (0 censored) and the code of the
    # event of interest; ``y`` is then the indicator of the event of interest (cause-specific).
    cause: np.ndarray | None = None
    event_of_interest: int = 1
    cache: dict[str, Any] = field(default_factory=dict, compare=False, repr=False)

    @property
    def n(self) -> int:
        return int(self.y.shape[0])

    def counted(self, values: np.ndarray | None = None) -> float:
        """A count over the sample's rows (of ``values`` per row, else of rows) with each row
        counted as the persons it stands for: its frequency weight; sampling weights estimate,
        they do not count, so the rows count once then."""
        v = np.ones(self.n) if values is None else np.asarray(values, dtype=float)
        if self.weights is not None and self.weight_kind == "frequency":
            return float(np.asarray(self.weights, dtype=float) @ v)
        return float(v.sum())

    def subset(self, mask: np.ndarray) -> Outcome:
        def pick(a: np.ndarray | None) -> np.ndarray | None:
            return None if a is None else a[mask]

        return Outcome(
            self.family,
            self.y[mask],
            pick(self.offset),
            pick(self.time),
            pick(self.entry),
            pick(self.strata),
            pick(self.weights),
            weight_kind=self.weight_kind,
            cluster=pick(self.cluster),
            dispersion=self.dispersion,
            penalty=self.penalty,
            cause=pick(self.cause),
            event_of_interest=self.event_of_interest,
        )


@dataclass(frozen=True)
class FitResult:
    """What every fitter returns, whichever family ran.

    ``coef``/``cov`` follow ``names``; an intercept (when the family has one) is named
    ``"(intercept)"``. ``loglik`` is the (partial, for Cox) log-likelihood at the estimate.
    ``n_params`` counts every estimated parameter (intercept and, for the linear model, the
    residual variance) so AIC = -2 loglik + 2 n_params is comparable within a family.
    ``linear_predictor`` holds X @ coef (without intercept and offset) for the fitting rows.
    ``status`` is ``"ok"`` or ``"failed"``; a failed fit has NaN estimates and a ``message``.
    """

    family: str
    names: tuple[str, ...]
    coef: np.ndarray
    cov: np.ndarray
    loglik: float
    n: int
    events: int | None
    n_params: int
    converged: bool
    iterations: int = 0
    warnings: tuple[str, ...] = ()
    status: str = "ok"
    message: str = ""
    linear_predictor: np.ndarray | None = field(default=None, repr=False)
    extra: dict[str, Any] = field(default_factory=dict, repr=False)

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    @property
    def aic(self) -> float:
        return float(-2.0 * self.loglik + 2.0 * self.n_params)

    @property
    def bic(self) -> float:
        # BIC uses the number of events for Cox models (Volinsky & Raftery 2000), n otherwise.
        n_eff = self.events if (self.family == "survival" and self.events) else self.n
        return float(-2.0 * self.loglik + np.log(max(n_eff, 1)) * self.n_params)

    def se(self) -> np.ndarray:
        return np.sqrt(np.clip(np.diag(self.cov), 0.0, None))

    def index(self, names: list[str] | tuple[str, ...]) -> np.ndarray:
        pos = {nm: i for i, nm in enumerate(self.names)}
        return np.array([pos[nm] for nm in names], dtype=int)


def failed_fit(family: str, names: tuple[str, ...], n: int, events: int | None, message: str,
               warnings: tuple[str, ...] = ()) -> FitResult:
    """A FitResult that records a failure instead of raising."""
    k = len(names)
    return FitResult(
        family=family,
        names=names,
        coef=np.full(k, np.nan),
        cov=np.full((k, k), np.nan),
        loglik=float("nan"),
        n=n,
        events=events,
        n_params=k,
        converged=False,
        warnings=warnings,
        status="failed",
        message=message,
    )
