"""Read-only views of FSTs and build directories."""
