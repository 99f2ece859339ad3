"""Builders: records -> Fst. No file access, no printing."""
