"""Refitting one analysis: the continuous forms beside the legacy groups, and what is computed from the fits (contrasts, risks, interactions, standardisation)."""
