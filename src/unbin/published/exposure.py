"""The exposure assigned to each group of a published table, by documented rules.

In order: the group's reported median (``reported median``) or mean (``reported mean``); else
the midpoint of its bounds (``midpoint``); an open-ended group (one bound missing) by the open
rule the spec chooses:

* ``adjacent_width`` (default): the open group is taken to be as wide as its neighbour and is
  assigned that interval's midpoint — an open top group [L, inf) with neighbour width w gets
  L + w/2; an open bottom group (-inf, U] gets U - w/2, floored at 0 when the exposure cannot
  be negative (common practice).
* ``scaled_bound``: an open top group gets 1.2 x its lower bound, an open bottom group its
  upper bound / 1.2 (common practice).

Each value carries the rule it came from, so the tables can say which values were reported
and which were assumed.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

OPEN_RULES = ("adjacent_width", "scaled_bound")
SCALED_BOUND_FACTOR = 1.2


def _as_floats(values: Sequence[float | None] | None, n: int) -> list[float]:
    if values is None:
        return [math.nan] * n
    return [math.nan if v is None else float(v) for v in values]


def assigned_exposures(lower: Sequence[float | None], upper: Sequence[float | None],
                       median: Sequence[float | None] | None = None,
                       mean: Sequence[float | None] | None = None,
                       open_rule: str = "adjacent_width",
                       non_negative: bool = True) -> tuple[list[float], list[str]]:
    """(values, rules) for groups given in increasing order by their bounds (None or an
    infinite value: open). Raises ValueError naming the group when a value cannot be
    assigned (an open group with no finite neighbour width)."""
    if open_rule not in OPEN_RULES:
        raise ValueError(f"open-group rule {open_rule!r} is not one of {', '.join(OPEN_RULES)}")
    n = len(lower)
    if len(upper) != n:
        raise ValueError("the groups' lower and upper bounds differ in number")
    los, his = _as_floats(lower, n), _as_floats(upper, n)
    med, avg = _as_floats(median, n), _as_floats(mean, n)
    fin = math.isfinite

    values: list[float] = []
    rules: list[str] = []
    for i in range(n):
        lo, hi = los[i], his[i]
        if fin(med[i]):
            values.append(med[i])
            rules.append("reported median")
        elif fin(avg[i]):
            values.append(avg[i])
            rules.append("reported mean")
        elif fin(lo) and fin(hi):
            values.append((lo + hi) / 2.0)
            rules.append("midpoint")
        elif fin(lo) or fin(hi):
            top = fin(lo)
            if open_rule == "scaled_bound":
                v = lo * SCALED_BOUND_FACTOR if top else hi / SCALED_BOUND_FACTOR
                rules.append("open group: 1.2 x bound")
            else:
                nb = i - 1 if top else i + 1
                w = his[nb] - los[nb] if 0 <= nb < n else math.nan
                if not fin(w) or w <= 0:
                    raise ValueError(
                        f"group {i + 1} is open-ended and its neighbour has no finite width; "
                        "report the group's median or mean, or choose open_rule: scaled_bound")
                v = lo + w / 2.0 if top else hi - w / 2.0
                if not top and non_negative:
                    v = max(v, 0.0)
                rules.append("open group: adjacent width")
            values.append(v)
        else:
            raise ValueError(f"group {i + 1} has neither bounds nor a reported median or mean")
    return values, rules
