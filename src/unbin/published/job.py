"""The published tables of a pooling job: the spec's published studies beside the data
cohorts' bundles (the pipeline's ``pool_bundles`` calls :func:`add_published`)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import pandas as pd

from .spec import published_studies
from .tables import published_tables

if TYPE_CHECKING:
    from ..spec import Spec


def add_published(spec: Spec, bundles: dict[str, dict[str, pd.DataFrame]],
                  pooled: dict[str, pd.DataFrame]) -> dict[str, pd.DataFrame]:
    """``pooled`` with the published studies' rows added to ``pooled_curves`` and
    ``heterogeneity``, and the ``published_*`` tables; unchanged without published studies."""
    studies = published_studies(spec.raw)
    if not studies:
        return pooled

    def concat(name: str) -> pd.DataFrame:
        parts = [b[name] for b in bundles.values() if name in b and len(b[name])]
        return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()

    names = {s.analysis for s in studies}
    fixed = {a: spec.analysis(a).continuous.knot_values for a in names}
    count = {a: spec.analysis(a).continuous.common_knots for a in names}
    got = published_tables(studies, concat("coefficients"), concat("curves"), fixed, count)
    out = dict(pooled)
    for name, rows in (("pooled_curves", got["pooled_curves_rows"]),
                       ("heterogeneity", got["heterogeneity_rows"])):
        if len(rows):
            base = out.get(name, pd.DataFrame())
            if name == "pooled_curves":
                from ..consortium.pool import _effect_columns

                rows = _effect_columns(rows.copy())
            out[name] = pd.concat([d for d in (base, rows) if len(d)], ignore_index=True)
    for name in ("published_groups", "published_fits", "published_curves"):
        out[name] = got[name]
    return out
