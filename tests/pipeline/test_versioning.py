"""Versioned updates: the run manifest records where the spec stands in git, and `unbin
compare` shows the two commits beside what moved (the result tables stay byte-stable)."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest

from unbin.pipeline.runner import spec_git
from unbin.results.compare import compare_commits

pytestmark = pytest.mark.skipif(shutil.which("git") is None, reason="git is not installed")


def _git(repo: Path, *args: str) -> str:
    return subprocess.run(["git", "-C", str(repo), *args], check=True, capture_output=True,
                          text=True).stdout.strip()


def _repo(tmp_path: Path) -> tuple[Path, Path]:
    repo = tmp_path / "study"
    repo.mkdir()
    _git(repo, "init", "-q")
    _git(repo, "config", "user.email", "analyst@example.org")
    _git(repo, "config", "user.name", "Analyst")
    spec = repo / "spec.yaml"
    spec.write_text("study: s\n", encoding="utf-8")
    _git(repo, "add", "spec.yaml")
    _git(repo, "commit", "-q", "-m", "first spec")
    return repo, spec


def test_spec_outside_a_repository_records_nothing(tmp_path: Path) -> None:
    spec = tmp_path / "spec.yaml"
    spec.write_text("study: s\n", encoding="utf-8")
    assert spec_git(spec) is None


def test_commit_and_clean_state_follow_git(tmp_path: Path) -> None:
    repo, spec = _repo(tmp_path)
    first = _git(repo, "rev-parse", "HEAD")  # git itself is the reference
    assert spec_git(spec) == {"commit": first, "clean": True, "spec_tracked": True,
                              "spec_unchanged": True}
    spec.write_text("study: s2\n", encoding="utf-8")
    state = spec_git(spec)
    assert state is not None and state["commit"] == first
    assert state["clean"] is False and state["spec_unchanged"] is False
    _git(repo, "commit", "-q", "-am", "second spec")
    second = _git(repo, "rev-parse", "HEAD")
    assert second != first
    assert spec_git(spec) == {"commit": second, "clean": True, "spec_tracked": True,
                              "spec_unchanged": True}
    other = repo / "other.yaml"  # an untracked spec in a clean tree
    other.write_text("study: o\n", encoding="utf-8")
    assert spec_git(other) == {"commit": second, "clean": True, "spec_tracked": False,
                               "spec_unchanged": False}


def test_compare_names_both_commits(tmp_path: Path) -> None:
    repo, spec = _repo(tmp_path)
    old = {"spec_git": spec_git(spec)}
    spec.write_text("study: s2\n", encoding="utf-8")
    new = {"spec_git": spec_git(spec)}
    (row,) = compare_commits(old, new).to_dict("records")
    head = _git(repo, "rev-parse", "HEAD")[:12]
    assert row["change"] == "spec commit (same)"
    assert row["old"] == f"{head} (clean)"
    assert row["new"] == f"{head} (uncommitted changes; spec changed since the commit)"
    assert compare_commits({}, {}).empty
    (row,) = compare_commits({}, new).to_dict("records")
    assert row["old"] == "not in a git repository" and row["change"] == "spec commit"
