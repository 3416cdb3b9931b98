"""The error hierarchy of unbin. Every message says what the value was, what is wrong and how to fix it."""

from __future__ import annotations


class UnbinError(Exception):
    """Base class of every error unbin raises on purpose."""


class SpecError(UnbinError):
    """The spec (YAML) is malformed or inconsistent with the data. Holds one message per problem."""

    def __init__(self, problems: list[str] | str):
        self.problems = [problems] if isinstance(problems, str) else list(problems)
        super().__init__("\n".join(f"- {p}" for p in self.problems))


class DataError(UnbinError):
    """An extract cannot be read or a column does not hold what the spec says it should."""
