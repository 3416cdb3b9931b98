"""Small-cell suppression: the one rule for every count unbin writes (``disclosure.min_cell``).

Two rules, and which applies where:

- **Primary suppression** (:func:`primary`): a count of people or events from 1 to
  ``min_cell - 1`` is withheld (missing in the table, ``suppressed`` true where the table has that
  column). Zero is shown: an empty cell reveals no one. Applies to every count that does not
  complete a published total: the density bins (the rows outside the 1st–99th percentile range
  are not counted, so the bins do not add up to a published number), and the ``n`` and
  ``events`` of a cohort bundle (one number each). A statistic of a group, such as a group's
  median in the summary a cohort sends for the common basis, is withheld when the group has
  fewer than ``min_cell`` rows (:func:`too_small_to_describe`).
- **Complementary suppression** (:func:`complementary`): counts that partition a published
  total — the rows and events of each legacy group, which add up to the analysis sample's ``n``
  and events — get primary suppression and, when exactly one count of the set is withheld, the
  smallest other positive count is withheld too; otherwise the withheld one is the total minus
  the others.

The data check (``unbin check``) warns about the same cells: groups whose row count primary
suppression would withhold (:func:`is_small`).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd


def is_small(counts: Any, min_cell: int) -> Any:
    """True where a count would be withheld: 0 < count < min_cell (element-wise on arrays)."""
    c = np.asarray(counts)
    out = (c > 0) & (c < min_cell)
    return bool(out) if out.ndim == 0 else out


def too_small_to_describe(rows: int, min_cell: int) -> bool:
    """True when a statistic of a group of ``rows`` rows (a median, a mean) must be withheld."""
    return rows < min_cell


def primary(counts: Sequence[int | None], min_cell: int) -> list[int | None]:
    """Each count, or None where it is missing or withheld (0 < count < min_cell)."""
    return [None if c is None or is_small(c, min_cell) else int(c) for c in counts]


def complementary(counts: Sequence[int | None], min_cell: int) -> list[int | None]:
    """Primary suppression of counts that partition a published total, then, if exactly one
    count was withheld, the smallest other positive count too (ties: the first)."""
    out = primary(counts, min_cell)
    hidden = [i for i, c in enumerate(out) if c is None and counts[i] is not None]
    if len(hidden) == 1:
        others = [(c, i) for i, c in enumerate(out) if c is not None and c > 0]
        if others:
            out[min(others)[1]] = None
    return out


def primary_value(value: Any, min_cell: int) -> Any:
    """One count for a nullable integer column: pd.NA when missing or withheld, else the int."""
    if value is None or pd.isna(value):
        return pd.NA
    count = int(value)
    return pd.NA if is_small(count, min_cell) else count


def withheld_text(min_cell: int) -> str:
    """How a display shows a withheld count."""
    return f"<{min_cell}"
