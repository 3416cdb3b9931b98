"""unbin: refit legacy grouped analyses of continuous predictors on the continuous scale."""

__version__ = "0.1.0"
