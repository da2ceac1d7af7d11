"""The only copy of each numerical kernel (Cholesky, triangular inverse, VIF, GVIF, BKW, Schur loss)."""
