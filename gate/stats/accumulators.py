"""Mergeable row statistics: one pass over the rows, in chunks, in any order.

Two accumulators, both associative so chunks, files, threads and Dask partitions combine in
any order and the result depends on the split only through rounding:

* :class:`CentredGram` -- weight sum, weighted means and the centred cross-product (co-moment)
  matrix, merged with the pairwise update of Chan, Golub & LeVeque (1979), "Updating formulae
  and a pairwise algorithm for computing sample variances", COMPSTAT 1979 (weighted form).
  Costs about n p^2 flops; it is the main pass.
* :class:`TriangularFactor` -- the R factor of the centred, scaled, weighted rows, merged by
  stacking and re-factoring (TSQR; Demmel, Grigori, Hoemmen & Langou 2012, SIAM J. Sci. Comput.
  34:A206-A239). About 10x the cost of the Gram; run only when the Gram cannot tell an exact
  dependency from a near one (see ``gate.diagnose.diagnostics``).

Memory is O(p^2) for either, whatever the number of rows.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from gate.numerics.kernels import FloatArray, IntArray


@dataclass(frozen=True)
class CentredGram:
    """Weighted count, mean and centred cross-product of a block of rows.

    ``comoment = sum_i w_i (x_i - mean)(x_i - mean)'``; ``weight_sum = sum_i w_i``;
    ``rows`` counts rows with positive weight.
    """

    rows: int
    weight_sum: float
    mean: FloatArray
    comoment: FloatArray

    @classmethod
    def empty(cls, p: int) -> CentredGram:
        return cls(0, 0.0, np.zeros(p), np.zeros((p, p)))

    @classmethod
    def from_block(cls, values: FloatArray, weights: FloatArray | None = None, *,
                   overwrite: bool = False) -> CentredGram:
        """Statistics of one block (n x p, finite values; weights >= 0 or None).

        ``overwrite=True`` centres ``values`` in place (the passes own their blocks), which
        saves allocating and first-touching a second block per chunk.
        """
        n, p = values.shape
        if weights is None:
            if n == 0:
                return cls.empty(p)
            mean = values.mean(axis=0)
            centred = np.subtract(values, mean, out=values if overwrite else None)
            return cls(n, float(n), mean, centred.T @ centred)
        total = float(weights.sum())
        if total <= 0.0:
            return cls.empty(p)
        mean = (weights @ values) / total
        centred = np.subtract(values, mean, out=values if overwrite else None)
        centred *= np.sqrt(weights)[:, None]
        return cls(int(np.count_nonzero(weights > 0)), total, mean, centred.T @ centred)

    def merge(self, other: CentredGram) -> CentredGram:
        """Pairwise update (Chan, Golub & LeVeque 1979), weighted: exact in exact arithmetic."""
        if other.weight_sum == 0.0:
            return self
        if self.weight_sum == 0.0:
            return other
        total = self.weight_sum + other.weight_sum
        delta = other.mean - self.mean
        mean = self.mean + delta * (other.weight_sum / total)
        comoment = self.comoment + other.comoment
        comoment += np.outer(delta, delta) * (self.weight_sum * other.weight_sum / total)
        return CentredGram(self.rows + other.rows, total, mean, comoment)

    def select(self, columns: IntArray) -> CentredGram:
        """The statistics of a subset of the columns (exact: no recomputation)."""
        return CentredGram(self.rows, self.weight_sum, self.mean[columns],
                           self.comoment[np.ix_(columns, columns)])


@dataclass(frozen=True)
class TriangularFactor:
    """Upper-triangular R with R'R = Z'Z for the rows Z seen so far (TSQR merge)."""

    r: FloatArray

    @classmethod
    def empty(cls, p: int) -> TriangularFactor:
        return cls(np.zeros((0, p)))

    @classmethod
    def from_block(cls, block: FloatArray) -> TriangularFactor:
        if block.shape[0] == 0:
            return cls.empty(block.shape[1])
        return cls(np.asarray(np.linalg.qr(block, mode="r")))

    def merge(self, other: TriangularFactor) -> TriangularFactor:
        if other.r.shape[0] == 0:
            return self
        if self.r.shape[0] == 0:
            return other
        return TriangularFactor(np.asarray(np.linalg.qr(np.vstack([self.r, other.r]), mode="r")))

    def square(self) -> FloatArray:
        """The p x p factor with a non-negative diagonal (zero rows added when n < p)."""
        p = self.r.shape[1]
        r = np.zeros((p, p))
        k = min(self.r.shape[0], p)
        r[:k] = self.r[:k]
        signs = np.where(np.diag(r) < 0, -1.0, 1.0)
        return r * signs[:, None]
