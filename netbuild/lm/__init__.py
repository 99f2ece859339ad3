"""Language-model utilities: estimation from text (and, later, pruning)."""
