"""The legacy grouping of a variable as a term: its cuts resolved on the data (fixed cuts or
sample quantiles) and the grouped term built from them."""

from __future__ import annotations

import numpy as np

from ..spec import Grouping, Spec
from .grouped import GroupedTerm


def resolve_cuts(x: np.ndarray, g: Grouping) -> tuple[float, ...]:
    """The cut values of a grouping in this sample (quantile groupings use the sample)."""
    if g.cuts is not None:
        return g.cuts
    assert g.quantiles is not None
    qs = np.quantile(x, np.arange(1, g.quantiles) / g.quantiles)
    return tuple(float(v) for v in qs)


def legacy_term(x: np.ndarray, variable: str, spec: Spec) -> GroupedTerm:
    """The legacy grouping of ``variable`` as design indicators, its cuts resolved in ``x``."""
    g = spec.groupings[variable]
    assert g.labels is not None
    cuts = resolve_cuts(x, g)
    ref = g.labels.index(g.reference) if g.reference in g.labels else 0
    return GroupedTerm(variable, cuts, g.closed, g.labels, ref)
