"""Stage 4, diagnostics: statistics -> frozen Diagnostics (arrays only), dependencies."""
