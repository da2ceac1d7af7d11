"""Stage 1, reading tables: file, folder and frame sources yielding Arrow chunks; file provenance."""
