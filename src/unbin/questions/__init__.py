"""The questions: one module per table, each a builder (refit, spec) -> DataFrame."""
