"""The demo's output folder for the figure and report tests: the session fixture ``demo_out``
(tests/conftest.py) runs the demo once per session."""

from __future__ import annotations

from pathlib import Path

import pytest


def demo_output(request: pytest.FixtureRequest,
                tmp_path_factory: pytest.TempPathFactory) -> Path:
    return Path(request.getfixturevalue("demo_out"))
