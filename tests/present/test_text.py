"""The one number formatter (present/text.py): its rounding rules, checked against Python's own
significant-digit formatting (the ``g`` presentation type, an independent implementation of
rounding to significant digits) and against hand-worked cases of the rules its docstring states.
The display conventions (p below 0.001 as "<0.001", ratios to two decimals) are common practice
in medical reporting."""

from __future__ import annotations

import math
import re

import numpy as np
import pandas as pd
import pytest

from unbin.present import text
from unbin.present.figures.style import fmt_number, fmt_ratio


def _decimals(s: str) -> int:
    body = s.split("(")[0].strip().rstrip("%")
    return len(body.split(".")[1]) if "." in body else 0


def test_number_rounds_to_significant_digits_like_python_g() -> None:
    # 2,000 seeded values over eight decades: the shown value is Python's own rounding to
    # `sig` significant digits (below 10**sig, where "g" uses no exponent).
    rng = np.random.default_rng(20261203)
    values = rng.choice([-1, 1], 2000) * 10 ** rng.uniform(-3.9, 2.99, 2000)
    for sig in (2, 3, 4):
        for v in values[np.abs(values) < 10 ** sig]:
            shown = text.number(v, sig)
            assert float(shown.replace(",", "")) == float(f"{v:.{sig}g}"), (v, sig, shown)
            assert not (("." in shown) and shown.endswith("0")), shown  # no trailing zeros


@pytest.mark.parametrize(("v", "sig", "want"), [
    (0.04567, 3, "0.0457"), (60, 3, "60"), (60.0, 4, "60"), (12.34, 3, "12.3"),
    (123456.7, 3, "123,457"), (1234.5, 3, "1,234"), (9.996, 3, "10"), (-3.14159, 3, "-3.14"),
    (0.0, 3, "0"), (-0.0004, 1, "-0.0004"), (1.2e-5, 3, "1.2e-5"), (-0.00001, 3, "-1.0e-5"),
])
def test_number_cases(v: float, sig: int, want: str) -> None:
    assert text.number(v, sig) == want


@pytest.mark.parametrize("missing", [None, float("nan"), math.inf, -math.inf, pd.NA, "abc",
                                     True])
def test_missing_prints_a_dash(missing: object) -> None:
    for fmt in (text.number, text.count, text.ratio, text.pvalue, text.percent):
        assert fmt(missing) == "–"
    assert text.interval(missing, 1, 2) == "–"


@pytest.mark.parametrize(("v", "want"), [
    (0.95, "0.95"), (1.5, "1.50"), (1.0, "1.00"), (9.999, "10.0"), (12.34, "12.3"),
    (99.96, "100"), (152.3, "152"), (0.0456, "0.046"), (0.0996, "0.10"), (0.001234, "0.0012"),
])
def test_ratio_rule(v: float, want: str) -> None:
    assert text.ratio(v) == want


@pytest.mark.parametrize(("p", "want"), [
    (0.0312, "0.031"), (0.0004, "<0.001"), (0.001, "0.001"), (0.0009999, "<0.001"),
    (0.9996, ">0.999"), (0.5, "0.500"), (1.0, ">0.999"), (0.0, "<0.001"),
])
def test_pvalue_rule(p: float, want: str) -> None:
    assert text.pvalue(p) == want


def test_percent_and_count() -> None:
    assert text.percent(0.387) == "39%"
    assert text.percent(-0.004) == "0%"           # rounds to zero: no sign
    assert text.percent(0.1234, 1) == "12.3%"
    assert text.count(1234.0) == "1,234" and text.count(3) == "3"


def test_interval_shares_the_estimates_decimals() -> None:
    # The cases a first run showed ("5.7–7.6525", "-12% (-42–-1)") now print consistently.
    assert text.interval(5.7, 5.123, 7.6525) == "5.70 (5.12 to 7.65)"
    assert text.interval(-0.12, -0.42, -0.01, "percent") == "-12% (-42% to -1%)"
    assert text.interval(1.234, 0.95, 1.6, "ratio") == "1.23 (0.95 to 1.60)"
    assert text.interval(4.64, 1.82, 11.807, "ratio") == "4.64 (1.82 to 11.81)"
    assert text.interval(12.3, 9.87, 15.2, "ratio") == "12.3 (9.9 to 15.2)"
    # Bounds that would print as the estimate get more decimals (per-unit ratios near 1).
    assert text.interval(0.9882, 0.9831, 0.9934, "ratio") == "0.988 (0.983 to 0.993)"
    assert text.interval(0.05, 0.049, 0.051, "percent") == "5.0% (4.9% to 5.1%)"
    assert text.interval(0.0123, -0.004, 0.031) == "0.0123 (-0.0040 to 0.0310)"
    assert text.interval(2.0, math.nan, 3.0) == "2.00"         # no bounds: the estimate only
    assert text.interval(2.0, 3.0, 3.0) == "2.00"              # degenerate interval
    assert text.interval(7.1e-5, -0.251, 0.579) == "0.000 (-0.251 to 0.579)"  # near zero
    rng = np.random.default_rng(7)
    for _ in range(500):
        e = float(rng.normal(0, 10 ** rng.uniform(-2, 2)))
        lo, hi = e - abs(rng.normal(0, 5)), e + abs(rng.normal(0, 5))
        shown = text.interval(e, lo, hi)
        parts = re.findall(r"-?[\d,]+(?:\.\d+)?", shown)
        assert len(parts) == 3, shown
        assert len({_decimals(p) for p in parts}) == 1, shown
        assert len(set(parts)) == 3 or not lo < e < hi, shown
        assert float(parts[0].replace(",", "")) == pytest.approx(e, abs=10 ** -_decimals(
            parts[0]) / 2 + 1e-12)


def test_span_and_aligned() -> None:
    assert text.span(5.7, 7.6525) == "5.70 to 7.65"
    assert text.span(0.21, 0.35, "percent") == "21% to 35%"
    assert text.aligned([1.644, 0.4421]) == ["1.64", "0.44"]
    assert text.aligned([0.195, 0.0234, math.nan]) == ["0.195", "0.023", "–"]
    assert text.with_df(12.34, 2) == "12.3 (2)" and text.with_df(12.34, None) == "12.3"


def test_the_figures_format_through_the_same_rules() -> None:
    assert fmt_ratio(1.5) == text.ratio(1.5) == "1.50"
    assert fmt_number(60.0) == "60" and fmt_number(3.14159, 3) == "3.14"
    assert fmt_number(math.nan) == "–"
