"""Tables on disk, their provenance, and comparing two result folders."""
