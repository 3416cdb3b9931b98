"""Robustness: bad input, fuzzed specs, interrupted runs."""
