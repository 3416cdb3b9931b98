"""The covariance of a study's log ratios against one reference group.

The ratios of a published table share its reference group, so their log estimates are
correlated. Three routes, in order of preference:

* ``greenland_longnecker``: Greenland & Longnecker (1992, Am J Epidemiol 135:1301). Fitted
  cases A_j (and non-cases B_j) are found that keep the table's margins and reproduce the
  adjusted ratios exactly; the covariance of two log ratios is then the reference group's
  part of the variance: 1/A_0 + 1/B_0 (odds ratios), 1/A_0 (rate ratios with person-time),
  1/A_0 - 1/N_0 (risk ratios with participants). The variances are the reported ones, from
  the 95% intervals. Needs the cases per group and the non-cases, person-time or participants.
* ``hamling``: Hamling et al. (2008, Stat Med 27:954). When the cases per group are missing
  but the groups' sizes are reported: effective counts whose crude ratios equal the adjusted
  ones and whose crude variances equal the reported ones, with the free reference counts
  chosen so the groups' shares of the total (and, when reported, the ratio of non-cases to
  cases) are matched by least squares on the log scale.
* ``independence``: zero covariances, the last resort when neither applies (flagged).

Formulations (``kind``): ``odds`` (odds ratios: case-control, or a cohort with participants),
``risk`` (risk ratios with participants), ``rate`` (rate or hazard ratios with person-time).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..distributions import stats
from ..roots import brentq

Z95 = float(stats.norm.ppf(0.975))
KINDS = ("odds", "risk", "rate")


@dataclass(frozen=True)
class StudyCovariance:
    """``cov``: (J, J) covariance of the J non-reference log ratios; ``method``: the route;
    ``cases``/``other``: the fitted (or effective) cases and non-cases / person-time /
    participants per group, reference first (empty for independence); ``fit_error``: for
    Hamling, the largest absolute log-scale misfit of the matched shares."""

    cov: np.ndarray
    method: str
    kind: str
    cases: np.ndarray
    other: np.ndarray
    fit_error: float = 0.0


def log_ratio_and_variance(ratio: np.ndarray, lower: np.ndarray, upper: np.ndarray
                           ) -> tuple[np.ndarray, np.ndarray]:
    """Log ratios and their variances from reported ratios and 95% intervals:
    se = (log upper - log lower) / (2 x 1.959964) (symmetric on the log scale)."""
    r, lo, hi = (np.asarray(a, dtype=float) for a in (ratio, lower, upper))
    se = (np.log(hi) - np.log(lo)) / (2.0 * Z95)
    return np.log(r), se**2


def gl_fitted_counts(kind: str, log_ratios: np.ndarray, cases: np.ndarray,
                     other: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Greenland–Longnecker fitted counts (A, other), reference group first.

    ``cases`` a_j and ``other`` (non-cases b_j for ``odds``; participants N_j for ``risk``;
    person-time T_j for ``rate``) per group, reference first; ``log_ratios`` the J adjusted
    log ratios of groups 1..J against group 0. Constraints: sum A = sum a, the other margin
    kept (odds: A_j + B_j = a_j + b_j; risk, rate: N_j, T_j as reported), and the fitted
    crude ratios equal the adjusted ones. Rate and risk have a closed form; odds is solved for
    A_0 by Brent's method (the sum of cases is increasing in A_0)."""
    if kind not in KINDS:
        raise ValueError(f"unknown formulation {kind!r}")
    a = np.asarray(cases, dtype=float)
    o = np.asarray(other, dtype=float)
    rr = np.exp(np.asarray(log_ratios, dtype=float))
    m1 = float(a.sum())
    if kind in ("rate", "risk"):
        rel = np.concatenate([[1.0], rr * o[1:] / o[0]])
        A = m1 * rel / rel.sum()
        if kind == "risk" and (A >= o).any():
            j = int(np.argmax(A >= o))
            raise ValueError(f"group {j + 1}: the fitted cases ({A[j]:.4g}) reach its "
                             f"participants ({o[j]:.4g}); the ratios and counts disagree")
        return A, o.copy()
    n = a + o

    def cases_at(a0: float) -> np.ndarray:
        c = rr * a0 / (n[0] - a0)
        return np.concatenate([[a0], n[1:] * c / (1.0 + c)])

    a0 = brentq(lambda v: cases_at(v).sum() - m1, 1e-12 * n[0], n[0] * (1 - 1e-15),
                xtol=1e-13, rtol=8.9e-16, maxiter=500)
    A = cases_at(a0)
    return A, n - A


def _reference_part(kind: str, A0: float, O0: float) -> float:
    if kind == "odds":
        return 1.0 / A0 + 1.0 / O0
    if kind == "risk":
        return 1.0 / A0 - 1.0 / O0
    return 1.0 / A0


@dataclass(frozen=True)
class _HamlingFit:
    """The reported numbers of one table and the least-squares misfit of a reference
    (A_0, O_0) against them (:func:`hamling_counts`)."""
    kind: str
    rr: np.ndarray  # the ratios, reference excluded
    v: np.ndarray  # their variances
    size: np.ndarray  # the groups' reported sizes, reference first
    share: np.ndarray  # log share of each group in the total size
    total_cases: float | None
    sizes_of: str

    def implied(self, A0: float, O0: float) -> tuple[np.ndarray, np.ndarray] | None:
        """Every group's (A, other) given the reference's, or None when impossible."""
        kind, rr = self.kind, self.rr
        rest = self.v - _reference_part(kind, A0, O0)
        if (rest <= 0).any():
            return None
        if kind == "odds":
            c = rr * A0 / O0
            B = (1.0 + 1.0 / c) / rest
            return np.concatenate([[A0], c * B]), np.concatenate([[O0], B])
        if kind == "risk":
            r = rr * A0 / O0
            if (r >= 1).any():
                return None
            Aj = (1.0 - r) / rest
            return np.concatenate([[A0], Aj]), np.concatenate([[O0], Aj / r])
        Aj = 1.0 / rest
        return np.concatenate([[A0], Aj]), np.concatenate([[1.0], (Aj / A0) / rr])

    def residuals(self, A0: float, O0: float) -> np.ndarray | None:
        """Log differences of the implied from the reported shares (and non-cases per case)."""
        kind, size, total_cases = self.kind, self.size, self.total_cases
        got = self.implied(A0, O0)
        if got is None:
            return None
        A, Oth = got
        size_implied = A + Oth if kind == "odds" and self.sizes_of == "total" else Oth
        res = np.log(size_implied / size_implied.sum()) - self.share
        if total_cases is not None and kind != "rate":
            non = float(Oth.sum()) if kind == "odds" else float(Oth.sum() - A.sum())
            target = (size.sum() - total_cases) / total_cases if self.sizes_of == "total" \
                else size.sum() / total_cases
            res = np.append(res, np.log(non / A.sum()) - np.log(target))
        return res


def _hamling_reference(h: _HamlingFit) -> tuple[float, float]:
    """The reference (A_0, O_0) of least squared misfit: for rate, 1/A_0 on (0, min v) with
    O_0 = 1; otherwise (log A_0, log O_0) by Nelder-Mead from a grid of starts."""
    from scipy import optimize  # only Hamling's method needs it: the other jobs skip the import

    vmin = float(h.v.min())
    if h.kind == "rate":
        def obj1(s: float) -> float:
            r = h.residuals(1.0 / s, 1.0)
            return float(r @ r) if r is not None else 1e300
        best = optimize.minimize_scalar(obj1, bounds=(vmin * 1e-9, vmin * (1 - 1e-9)),
                                        method="bounded", options={"xatol": vmin * 1e-13})
        return 1.0 / float(best.x), 1.0

    def obj2(t: np.ndarray) -> float:
        A0, O0 = float(np.exp(t[0])), float(np.exp(t[1]))
        r = h.residuals(A0, O0)
        return float(r @ r) if r is not None else 1e300
    starts = [np.log([f / vmin, g / vmin]) for f in (4.0, 10.0, 40.0)
              for g in (4.0, 10.0, 40.0)]
    if h.kind == "risk":
        starts = [np.log([4.0 / vmin, 4.0 * g / vmin]) for g in (2.0, 10.0, 50.0, 200.0)]
    fits = [optimize.minimize(obj2, s, method="Nelder-Mead",
                              options={"xatol": 1e-10, "fatol": 1e-14, "maxiter": 4000})
            for s in starts]
    fits = [f for f in fits if f.fun < 1e299]
    if not fits:
        raise ValueError("no effective counts reproduce these ratios and variances")
    best_t = min(fits, key=lambda f: f.fun).x
    return float(np.exp(best_t[0])), float(np.exp(best_t[1]))


def hamling_counts(kind: str, log_ratios: np.ndarray, variances: np.ndarray,
                   group_sizes: np.ndarray, total_cases: float | None = None,
                   sizes_of: str = "total") -> tuple[np.ndarray, np.ndarray, float]:
    """Effective counts (A, other, misfit) after Hamling et al. (2008), reference first.

    For a reference (A_0, O_0), every other group's counts follow from its ratio and variance:
    odds: A_j/B_j = OR_j A_0/B_0 and 1/A_j + 1/B_j = v_j - (1/A_0 + 1/B_0); risk:
    A_j/N_j = RR_j A_0/N_0 and 1/A_j - 1/N_j = v_j - (1/A_0 - 1/N_0); rate: 1/A_j = v_j - 1/A_0
    and T_j/T_0 = (A_j/A_0)/RR_j. (A_0, O_0) — for rate, A_0 alone with T_0 = 1 — minimise the
    squared log differences between the implied and the reported shares of ``group_sizes``
    (participants, or person-time for rate) and, when ``total_cases`` is given (odds, risk),
    the ratio of non-cases to cases. ``sizes_of``: for odds, whether ``group_sizes`` are the
    groups' totals (``total``: participants) or their non-cases (``other``: a case-control
    table's controls)."""
    if kind not in KINDS:
        raise ValueError(f"unknown formulation {kind!r}")
    size = np.asarray(group_sizes, dtype=float)
    h = _HamlingFit(kind, np.exp(np.asarray(log_ratios, dtype=float)),
                    np.asarray(variances, dtype=float), size, np.log(size / size.sum()),
                    total_cases, sizes_of)
    A0, O0 = _hamling_reference(h)
    got = h.implied(A0, O0)
    if got is None:
        raise ValueError("no effective counts reproduce these ratios and variances")
    r = h.residuals(A0, O0)
    other = got[1] * (size.sum() / got[1].sum()) if kind == "rate" else got[1]
    return got[0], other, float(np.max(np.abs(r))) if r is not None else float("nan")


def study_covariance(kind: str, log_ratios: np.ndarray, variances: np.ndarray,
                     cases: np.ndarray | None = None, other: np.ndarray | None = None,
                     group_sizes: np.ndarray | None = None,
                     total_cases: float | None = None,
                     sizes_of: str = "total") -> StudyCovariance:
    """The covariance by the best route the reported numbers allow (module docstring)."""
    v = np.asarray(variances, dtype=float)
    J = v.size
    if cases is not None and other is not None:
        A, Oth = gl_fitted_counts(kind, log_ratios, cases, other)
        c = _reference_part(kind, float(A[0]), float(Oth[0]))
        cov = np.full((J, J), c)
        np.fill_diagonal(cov, v)
        return StudyCovariance(cov, "greenland_longnecker", kind, A, Oth)
    if group_sizes is not None and J >= 2:
        A, Oth, err = hamling_counts(kind, log_ratios, v, group_sizes, total_cases, sizes_of)
        c = _reference_part(kind, float(A[0]), float(Oth[0]))
        cov = np.full((J, J), c)
        np.fill_diagonal(cov, v)
        return StudyCovariance(cov, "hamling", kind, A, Oth, err)
    return StudyCovariance(np.diag(v), "independence", kind, np.array([]), np.array([]))
