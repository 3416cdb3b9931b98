"""The switch between the compiled kernels and the numpy paths (common practice: an
environment override for tests and benchmarks, unknown values refused)."""

from __future__ import annotations

import pytest

from unbin.errors import UnbinError
from unbin.models.compiled import mode, wanted


def test_auto_goes_by_size(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("UNBIN_COMPILED", raising=False)
    assert mode() == "auto"
    assert not wanted(99, 100)
    assert wanted(100, 100)


@pytest.mark.parametrize(("value", "expected"), [("always", True), ("NEVER", False), ("auto", False)])
def test_forced_paths(monkeypatch: pytest.MonkeyPatch, value: str, expected: bool) -> None:
    monkeypatch.setenv("UNBIN_COMPILED", value)
    assert wanted(10, 1000) is expected


def test_unknown_value_is_refused(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("UNBIN_COMPILED", "fast")
    with pytest.raises(UnbinError, match="UNBIN_COMPILED='fast'.*auto, always, never"):
        wanted(10, 1000)
