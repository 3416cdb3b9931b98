"""Meta-analysis of share-safe cohort summaries: the statistical core, on numpy arrays only.

Four entry points:

* :func:`pool_univariate` — one effect per cohort: fixed-effect (inverse variance) and
  random-effects pooling, Cochran's Q, I² and tau². tau² by DerSimonian–Laird (``"dl"``, the
  default), Paule–Mandel (``"pm"``) or restricted maximum likelihood (``"reml"``); besides the
  normal-theory interval, the Hartung–Knapp–Sidik–Jonkman interval (IntHout, Ioannidis & Borm
  2014, BMC Med Res Methodol 14:25) and the prediction interval (Higgins, Thompson &
  Spiegelhalter 2009, JRSS A 172:137), which keep their coverage with few cohorts.
* :func:`pool_pointwise` — the same, vectorised over a grid of exposure values (curves
  relative to a common reference value, pooled point by point; Sauerbrei & Royston 2011).
  A cohort missing at a grid point (NaN estimate) is left out at that point only.
* :func:`pool_multivariate` — coefficient vectors with within-cohort covariance matrices:
  the multivariate method of moments of Jackson, White & Thompson (2010, Stat Med 29:1282),
  the matrix generalisation of DerSimonian–Laird.
* :func:`pooled_curve` — a pooled curve f(x) - f(x_ref) with delta-method standard errors.

Conventions shared by all functions
-----------------------------------
* Variances, not standard errors, go in.
* HKSJ: with w*_i = 1/(v_i + tau²) and the random-effects mean mu,
  q = sum w*_i (y_i - mu)² / (k - 1) and SE_HKSJ = sqrt(q / sum w*_i); the interval is
  mu ± t_{k-1} SE_HKSJ (k >= 2). Prediction interval: mu ± t_{k-2} sqrt(tau² + SE²) with the
  usual SE² = 1 / sum w*_i (k >= 3; NaN below).
* tau² (and the between-cohort covariance Psi) are truncated at zero (at positive
  semi-definiteness); I² is reported as a fraction in [0, 1], truncated at 0.
* With a single cohort there is no heterogeneity to estimate: tau² = 0 (Psi = 0), Q = 0 on
  0 degrees of freedom, the Q p-value is NaN and I² is NaN (undefined, not 0), and the
  random-effects result equals the fixed-effect one. With two or more cohorts and Q <= df,
  I² is 0.
* Invalid input (non-finite estimates, variances that are not positive and finite,
  covariance matrices that are not symmetric positive definite, shape mismatches) raises
  :class:`PoolingInputError`, a ``ValueError`` that names the cohort and the problem.

Where they live: :mod:`unbin.consortium.univariate` (one effect, or one per grid point: tau²
estimators and intervals) and :mod:`unbin.consortium.multivariate` (coefficient vectors and
curves); :mod:`unbin.consortium.pooling_base` holds the shared error and checks. This module
gathers the public names.
"""

from __future__ import annotations

from .multivariate import MultivariatePooled, pool_multivariate, pooled_curve
from .pooling_base import PoolingInputError
from .univariate import (
    TAU2_METHODS,
    PointwisePooled,
    PooledEstimate,
    pool_pointwise,
    pool_univariate,
)

__all__ = [
    "MultivariatePooled",
    "PointwisePooled",
    "PooledEstimate",
    "PoolingInputError",
    "pool_multivariate",
    "pool_pointwise",
    "pool_univariate",
    "pooled_curve",
    "TAU2_METHODS",
]
