"""The workflow validates its spec once and names the text it validated for its jobs
(``UNBIN_VALIDATED_SPEC``): the same text is then built without validating again; any other
text is validated as always."""

from __future__ import annotations

import hashlib
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
import yaml

from unbin.errors import SpecError
from unbin.spec import VALIDATED_ENV, load_spec, validated_spec


def _minimal() -> dict[str, Any]:
    return {"study": "s", "cohorts": [{"name": "c", "path": "c.csv"}],
            "groupings": {"egfr": {"cuts": [30, 45, 60]}},
            "analyses": [{"name": "a", "outcome": {"type": "binary", "event": "dead"},
                          "exposure": "egfr"}]}


def _write(path: Path, raw: dict[str, Any]) -> Path:
    path.write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    return path


def test_validated_text_builds_the_same_spec(tmp_path: Path,
                                             monkeypatch: pytest.MonkeyPatch) -> None:
    path = _write(tmp_path / "spec.yaml", _minimal())
    spec, sha = validated_spec(path)
    assert sha == hashlib.sha256(path.read_bytes()).hexdigest()  # hashlib: the file's bytes
    monkeypatch.setenv(VALIDATED_ENV, sha)
    assert load_spec(path) == spec


def test_other_text_is_still_validated(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    good = _write(tmp_path / "good.yaml", _minimal())
    _, sha = validated_spec(good)
    monkeypatch.setenv(VALIDATED_ENV, sha)
    raw = _minimal()
    raw["analyses"][0]["outcome"]["evnt"] = raw["analyses"][0]["outcome"].pop("event")
    bad = _write(tmp_path / "bad.yaml", raw)
    with pytest.raises(SpecError, match="unknown key 'evnt'"):
        load_spec(bad)
    # The validated file edited afterwards is another text: validated again.
    _write(good, raw)
    with pytest.raises(SpecError, match="unknown key 'evnt'"):
        load_spec(good)


def test_a_job_with_the_validated_text_does_not_import_the_schema_library(
        tmp_path: Path) -> None:
    path = _write(tmp_path / "spec.yaml", _minimal())
    _, sha = validated_spec(path)
    code = ("import sys; from unbin.spec import load_spec; load_spec(sys.argv[1]); "
            "print('jsonschema' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code, str(path)], capture_output=True,
                         text=True, check=True, env={**_env(), VALIDATED_ENV: sha})
    assert out.stdout.strip() == "False"
    out = subprocess.run([sys.executable, "-c", code, str(path)], capture_output=True,
                         text=True, check=True, env=_env())
    assert out.stdout.strip() == "True"


def _env() -> dict[str, str]:
    import os

    return {k: v for k, v in os.environ.items() if k != VALIDATED_ENV}
