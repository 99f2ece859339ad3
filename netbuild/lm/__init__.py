"""Language-model utilities: estimation from text, relative-entropy pruning, perplexity."""
