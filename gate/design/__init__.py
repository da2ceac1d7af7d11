"""Stage 2, the design matrix: policy columns -> design plan, encoded blocks, finished design."""
