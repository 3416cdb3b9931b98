"""The one place where unbin turns numbers into text: the report, the terminal summary and the
figures' alt texts and captions all format through these functions.

The rules (stated once, tested in ``tests/present/test_text.py``):

- **Missing** (None, NaN, ±inf, pandas NA) prints as an en dash ``–``.
- **A number** (``number``) shows ``sig`` significant digits (3 unless asked), trailing zeros
  dropped, no exponent: 0.04567 → ``0.0457``, 60 → ``60``, 12.34 → ``12.3``. Magnitudes of 10**sig
  and more print as whole numbers with thousands separators (123456.7 → ``123,457``); non-zero
  magnitudes below 0.0001 use an exponent (``1.2e-5``).
- **A count** (``count``) is a whole number with thousands separators: ``1,234``.
- **A ratio** (odds, hazard, rate ratio; ``ratio``) shows two decimals between 0.1 and 10
  (``0.95``, ``1.50``), one decimal from 10 to 100 (``12.3``), none from 100 up; below 0.1 two
  significant digits (``0.045``).
- **A p-value** (``pvalue``) shows three decimals; below 0.001 it is ``<0.001`` and above 0.999
  ``>0.999``.
- **A percent** (``percent``) is a fraction times 100 with no decimals (0.387 → ``39%``), or with
  ``decimals`` when asked.
- **Values read side by side** (``aligned``) share the decimals that give the largest of them
  ``sig`` significant digits (``1.64`` and ``0.44``; net benefits ``0.195`` and ``0.023``).
- **An estimate with its interval** (``interval``) prints the bounds with the same number of
  decimals as the estimate (trailing zeros kept, so ``5.70 (5.12 to 7.65)``); an estimate
  closer to zero than a tenth of the interval's half-width takes the decimals of the half-width
  instead (``0.000 (-0.251 to 0.579)``). Ratios take the ratio rule's decimals of the estimate
  (``4.64 (1.82 to 11.81)``), percents the percent rule. A bound that would print the same as
  the estimate gets up to two more decimals for all three (``0.988 (0.983 to 0.993)``). The
  bounds are joined by "to" so that negative values stay readable (``-12% (-42% to -1%)``). Without finite bounds (or with a
  degenerate interval) only the estimate prints.
"""

from __future__ import annotations

import math
from typing import Any, Literal

DASH = "–"
Kind = Literal["number", "ratio", "percent"]


def finite(v: Any) -> bool:
    """A real, finite number (bools and strings are not)."""
    if v is None or isinstance(v, (bool, str)):
        return False
    try:
        return math.isfinite(float(v))
    except (TypeError, ValueError):
        return False


def decimals(v: float, sig: int = 3) -> int:
    """Decimals that show ``sig`` significant digits of ``v`` (0 for zero: it has none)."""
    if v == 0:
        return 0
    return max(sig - 1 - math.floor(math.log10(abs(v))), 0)


def _fixed(v: float, places: int) -> str:
    """Fixed decimals with thousands separators; a value that rounds to zero loses its sign."""
    text = f"{v:,.{places}f}"
    return text[1:] if text.startswith("-") and _is_zero(text) else text


def _is_zero(text: str) -> bool:
    return text.lstrip("-").replace("0", "").replace(".", "").replace(",", "") == ""


def number(v: Any, sig: int = 3) -> str:
    """``sig`` significant digits, trailing zeros dropped (see the module's rules)."""
    if not finite(v):
        return DASH
    f = float(v)
    if f != 0 and abs(f) < 1e-4:
        return f"{f:.{max(sig - 2, 0)}e}".replace("e-0", "e-")
    if abs(f) >= 10 ** sig:
        return _fixed(f, 0)
    places = decimals(f, sig)
    # Rounding may carry into a new digit (9.996 -> 10.00): recount on the rounded value.
    places = decimals(round(f, places), sig) if round(f, places) != 0 else places
    text = _fixed(f, places)
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return "0" if _is_zero(text) else text


def count(v: Any) -> str:
    """A whole number with thousands separators."""
    return f"{round(float(v)):,}" if finite(v) else DASH


def ratio_places(v: float) -> int:
    a = abs(v)
    if a >= 100:
        return 0
    if a >= 10:
        return 1
    if a >= 0.1 or a == 0:
        return 2
    return decimals(v, 2)


def ratio(v: Any) -> str:
    """An odds, hazard or rate ratio (see the module's rules)."""
    if not finite(v):
        return DASH
    f = float(v)
    places = ratio_places(f)
    places = ratio_places(round(f, places)) if round(f, places) != 0 else places
    return _fixed(f, places)


def pvalue(v: Any) -> str:
    """Three decimals; ``<0.001`` and ``>0.999`` at the ends."""
    if not finite(v):
        return DASH
    f = float(v)
    if f < 0.001:
        return "<0.001"
    if f > 0.999:
        return ">0.999"
    return f"{f:.3f}"


def percent(v: Any, places: int = 0) -> str:
    """A fraction as a percent: 0.387 -> ``39%``."""
    if not finite(v):
        return DASH
    return _fixed(100 * float(v), places) + "%"


def _same_places(e: float, sig: int) -> int:
    places = decimals(e, sig)
    rounded = round(e, places)
    return decimals(rounded, sig) if rounded != 0 else max(sig - 1, 0)


def _interval_places(f: float, lo: Any, hi: Any, kind: Kind, sig: int) -> int:
    if kind == "ratio":
        rounded = round(f, ratio_places(f))
        return ratio_places(rounded) if rounded != 0 else ratio_places(f)
    if kind == "percent":
        return 0
    ref = f
    if finite(lo) and finite(hi) and abs(f) < (float(hi) - float(lo)) / 20:
        ref = (float(hi) - float(lo)) / 2     # an estimate near zero: the interval decides
    return 0 if abs(ref) >= 10 ** sig else _same_places(ref, sig)


def interval(e: Any, lo: Any, hi: Any, kind: Kind = "number", sig: int = 3) -> str:
    """An estimate with its interval, every part with the estimate's decimals: ``5.70 (5.12 to
    7.65)``, ``1.23 (0.95 to 1.60)`` for ratios, ``-12% (-42% to -1%)`` for percents. Without
    finite bounds (or with a degenerate interval) only the estimate prints. When a bound would
    print the same as the estimate, up to two more decimals are shown (``0.988 (0.983 to
    0.993)``, not ``0.99 (0.98 to 0.99)``)."""
    if not finite(e):
        return DASH
    f = float(e)
    places = _interval_places(f, lo, hi, kind, sig)

    def part(v: float, places: int) -> str:
        return percent(v, places) if kind == "percent" else _fixed(v, places)

    if not (finite(lo) and finite(hi) and float(hi) > float(lo)):
        return part(f, places)
    a, b = float(lo), float(hi)
    for _ in range(2):
        if len({part(f, places), part(a, places), part(b, places)}) == 3 or not a < f < b:
            break
        places += 1
    return f"{part(f, places)} ({part(a, places)} to {part(b, places)})"


def span(lo: Any, hi: Any, kind: Kind = "number", sig: int = 3) -> str:
    """A range ``lo to hi`` with both ends at the same decimals (those of the end with the
    smaller magnitude)."""
    if not (finite(lo) and finite(hi)):
        return DASH
    a, b = float(lo), float(hi)
    if kind == "ratio":
        return f"{ratio(a)} to {ratio(b)}"
    if kind == "percent":
        return f"{percent(a)} to {percent(b)}"
    small = min((x for x in (a, b) if x != 0), key=abs, default=0.0)
    places = 0 if small == 0 or abs(small) >= 10 ** sig else _same_places(small, sig)
    return f"{_fixed(a, places)} to {_fixed(b, places)}"


def aligned(values: list[Any], sig: int = 3) -> list[str]:
    """Several values read side by side, all at the decimals that give the largest ``sig``
    significant digits."""
    big = max((abs(float(v)) for v in values if finite(v)), default=0.0)
    places = 0 if big == 0 or big >= 10 ** sig else _same_places(big, sig)
    return [_fixed(float(v), places) if finite(v) else DASH for v in values]


def with_df(stat: Any, df: Any) -> str:
    """A test statistic with its degrees of freedom: ``12.3 (2)``."""
    if not finite(stat):
        return DASH
    return f"{number(stat)} ({count(df)})" if finite(df) else number(stat)
