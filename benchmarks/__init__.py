"""Benchmarks of collinearity-gate against the floor and the peer (not part of the package)."""
