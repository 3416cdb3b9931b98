"""The binned distribution of the exposure, drawn under the curves: counts in equal-width bins
over the 1st–99th percentile range, small cells suppressed (:mod:`unbin.questions.disclosure`)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..refit.analysis import Refit
from ..spec import Spec
from . import disclosure

DENSITY_BINS = 40
COLUMNS = ("bin_left", "bin_right", "count", "suppressed")


def density_table(r: Refit, spec: Spec) -> pd.DataFrame:
    """Exposure counts in equal-width bins over the 1st–99th percentiles, small counts withheld."""
    min_cell = spec.min_cell
    lo, hi = np.quantile(r.x, [0.01, 0.99])
    edges = np.linspace(lo, hi, DENSITY_BINS + 1)
    counts, _ = np.histogram(r.x[(r.x >= lo) & (r.x <= hi)], bins=edges)
    suppressed = disclosure.is_small(counts, min_cell)
    return pd.DataFrame({
        "bin_left": edges[:-1], "bin_right": edges[1:],
        "count": pd.array([None if s else int(c) for c, s in zip(counts, suppressed,
                                                                  strict=True)], dtype="Int64"),
        "suppressed": suppressed,
    })
