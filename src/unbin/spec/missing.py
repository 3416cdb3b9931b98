"""The ``missing`` key: how an analysis treats missing values of its exposure, adjusters and
``by`` (per analysis, else the study's; default complete cases)."""

from __future__ import annotations

from dataclasses import dataclass

from .model import Spec

METHODS = ("complete_case", "impute")


@dataclass(frozen=True)
class MissingOptions:
    """``complete_case`` drops incomplete rows (as without the key); ``impute`` builds
    ``imputations`` sets by chained equations, ``iterations`` cycles each."""

    method: str = "complete_case"
    imputations: int = 5
    iterations: int = 10

    @property
    def imputed(self) -> bool:
        return self.method == "impute"

    def describe(self) -> str:
        if not self.imputed:
            return "complete cases"
        return (f"multiple imputation (M = {self.imputations} sets, {self.iterations} "
                "iterations)")


def missing_options(spec: Spec, analysis: str) -> MissingOptions:
    """The analysis' ``missing`` block, else the study's, else complete cases."""
    raw_a = next(x for x in spec.raw["analyses"] if x["name"] == analysis)
    raw = raw_a["missing"] if "missing" in raw_a else spec.raw.get("missing")
    if not raw:
        return MissingOptions()
    return MissingOptions(str(raw.get("method", "complete_case")),
                          int(raw.get("imputations", 5)), int(raw.get("iterations", 10)))
