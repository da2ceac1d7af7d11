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

#: A chunk is accumulated in the data's own units when, for every column, the mean is below
#: 2**MEAN_EXPONENT and the uncentred sum of squares lies within 2**+-SQUARES_EXPONENT (or the
#: column is exactly zero): then nothing overflowed, and any centred value whose square fell
#: below 2**-1022 is under 2**-211 of the column's size, far below any rank tolerance. The
#: result is then scaled by powers of two (exact), which is bit-for-bit what scaling the values
#: first would give. Otherwise (|x| beyond about 1e120 or below about 1e-90) the chunk is
#: accumulated again on values scaled per column: checking the results costs O(p^2), where a
#: max |x| scan before every chunk would cost about a quarter of the Gram (measured).
MEAN_EXPONENT = 400
SQUARES_EXPONENT = 600
#: Exponent of an all-zero column: below any real one, so a merge takes the other side's; also
#: the floor for subnormal columns, so that 2**-exponent stays finite.
ZERO_EXPONENT = -1020


def column_exponents(values: FloatArray) -> IntArray:
    """Per column, e with max |x| < 2**e <= 2 max |x| (``frexp``); ZERO_EXPONENT for zeros."""
    return magnitude_exponents(np.maximum(values.max(axis=0), -values.min(axis=0)))


def magnitude_exponents(magnitude: FloatArray) -> IntArray:
    """e with magnitude < 2**e <= 2 magnitude; ZERO_EXPONENT for zero magnitudes."""
    _, exponent = np.frexp(magnitude)
    exponent = np.maximum(exponent, ZERO_EXPONENT).astype(np.intp)
    exponent[magnitude == 0.0] = ZERO_EXPONENT
    return np.asarray(exponent)


def powers_of_two(exponent: IntArray) -> FloatArray:
    """2**exponent, exactly (``ldexp``: no overflow for exponent <= 1023, subnormals below)."""
    return np.asarray(np.ldexp(1.0, exponent))


@dataclass(frozen=True)
class CentredGram:
    """Weighted count, mean and centred cross-product of a block of rows, per-column scaled.

    Column j is held in units of 2**exponent[j] (a power of two near its largest |value|, so
    the scaling is exact in binary): ``mean = scaled_mean * 2**e`` and
    ``comoment = scaled_comoment * 2**(e_j + e_k)`` with
    ``comoment = sum_i w_i (x_i - mean)(x_i - mean)'``; ``weight_sum = sum_i w_i``;
    ``rows`` counts rows with positive weight. So a column times 1e300 or 1e-300 is accumulated
    exactly as the original (its squares would overflow or underflow in its own units), and
    every diagnostic, being scale-free, is read from the scaled arrays.
    """

    rows: int
    weight_sum: float
    scaled_mean: FloatArray
    scaled_comoment: FloatArray
    exponent: IntArray

    @classmethod
    def empty(cls, p: int) -> CentredGram:
        return cls(0, 0.0, np.zeros(p), np.zeros((p, p)), np.full(p, ZERO_EXPONENT, np.intp))

    @classmethod
    def from_moments(cls, rows: int, weight_sum: float, mean: FloatArray,
                     comoment: FloatArray) -> CentredGram:
        """Statistics given in the data's units (a database's sums, a verdict's correlations
        times its scales): held unscaled (exponent 0), which is exact for finite moments."""
        p = mean.shape[0]
        return cls(rows, weight_sum, np.asarray(mean, dtype=np.float64),
                   np.asarray(comoment, dtype=np.float64), np.zeros(p, np.intp))

    @property
    def mean(self) -> FloatArray:
        """Means in the data's units (always finite: |mean| <= max |x|)."""
        return np.asarray(np.ldexp(self.scaled_mean, self.exponent))

    @property
    def comoment(self) -> FloatArray:
        """The co-moment in the data's units; over- or underflows for extreme columns, which is
        why the diagnostics read ``scaled_comoment``."""
        with np.errstate(over="ignore", under="ignore"):
            return np.asarray(np.ldexp(self.scaled_comoment,
                                       self.exponent[:, None] + self.exponent[None, :]))

    def centred_norms(self) -> FloatArray:
        """sqrt(diag(comoment)) in scaled units (multiply by 2**exponent for the data's)."""
        return np.sqrt(np.clip(np.diag(self.scaled_comoment), 0.0, None))

    @classmethod
    def from_block(cls, values: FloatArray, weights: FloatArray | None = None, *,
                   overwrite: bool = False) -> CentredGram:
        """Statistics of one block (n x p, finite values; weights >= 0 or None).

        ``overwrite=True`` centres ``values`` in place (the passes own their blocks), which
        saves allocating and first-touching a second block per chunk. Within the magnitudes
        of MEAN_EXPONENT and SQUARES_EXPONENT the chunk is accumulated in its own units and the
        p x p result rescaled (exact); otherwise the values are scaled and accumulated again.
        """
        n, p = values.shape
        if n == 0:
            return cls.empty(p)
        total = float(n) if weights is None else float(weights.sum())
        if total <= 0.0:
            return cls.empty(p)
        with np.errstate(over="ignore", invalid="ignore"):  # detected below, then redone
            mean = values.mean(axis=0) if weights is None else (weights @ values) / total
            if not np.all(np.abs(mean) < _MEAN_LIMIT):  # also an overflowed sum (inf, nan)
                return cls._from_scaled_values(values, weights, overwrite)
            centred = np.subtract(values, mean, out=values if overwrite else None)
            if weights is not None:
                centred *= np.sqrt(weights)[:, None]
            comoment = centred.T @ centred
            squares = np.diag(comoment) + total * mean**2  # uncentred, weighted
        safe = (squares >= _SQUARES_LOW) & (squares <= _SQUARES_HIGH)
        zero = (squares == 0.0) & (mean == 0.0)  # all zero, or tiny values whose squares vanish
        if not safe.all() and (not (safe | zero).all() or np.any(centred[:, zero])):
            return cls._from_scaled_centred(centred, mean, weights, total)
        exponent = magnitude_exponents(np.sqrt(squares / total))
        unit = np.where(zero, 1.0, powers_of_two(-exponent))  # zero columns stay 0
        rows = n if weights is None else int(np.count_nonzero(weights > 0))
        return cls(rows, total, mean * unit, comoment * np.outer(unit, unit), exponent)

    @classmethod
    def _from_scaled_values(cls, values: FloatArray, weights: FloatArray | None,
                            overwrite: bool) -> CentredGram:
        """A chunk whose means over- or nearly overflow: scale each column by 2**-e (e from its
        largest |value|) before anything else."""
        exponent = column_exponents(values)
        scaled = np.multiply(values, powers_of_two(-exponent), out=values if overwrite else None)
        total = float(scaled.shape[0]) if weights is None else float(weights.sum())
        mean = scaled.mean(axis=0) if weights is None else (weights @ scaled) / total
        centred = np.subtract(scaled, mean, out=scaled)
        if weights is not None:
            centred *= np.sqrt(weights)[:, None]
        rows = scaled.shape[0] if weights is None else int(np.count_nonzero(weights > 0))
        return cls(rows, total, mean, centred.T @ centred, exponent)

    @classmethod
    def _from_scaled_centred(cls, centred: FloatArray, mean: FloatArray,
                             weights: FloatArray | None, total: float) -> CentredGram:
        """A chunk whose squares over- or underflowed: the centred values (x - m, rounded
        relative to themselves, so as exact as centring scaled values) are scaled by 2**-e,
        e from the larger of the column's largest centred |value| and |mean|, and the
        cross-products taken again."""
        exponent = np.maximum(column_exponents(centred), magnitude_exponents(np.abs(mean)))
        unit = powers_of_two(-exponent)
        centred *= unit
        rows = centred.shape[0] if weights is None else int(np.count_nonzero(weights > 0))
        return cls(rows, total, mean * unit, centred.T @ centred, exponent)

    def merge(self, other: CentredGram) -> CentredGram:
        """Pairwise update (Chan, Golub & LeVeque 1979), weighted, on a common scale per column
        (the larger exponent; the other side is scaled down by a power of two, exactly unless a
        contribution falls below 2**-1022 of the column's size): exact in exact arithmetic."""
        if other.weight_sum == 0.0:
            return self
        if self.weight_sum == 0.0:
            return other
        exponent = np.maximum(self.exponent, other.exponent)
        a_mean, a_comoment = self._rescaled(exponent)
        b_mean, b_comoment = other._rescaled(exponent)
        total = self.weight_sum + other.weight_sum
        delta = b_mean - a_mean
        mean = a_mean + delta * (other.weight_sum / total)
        comoment = a_comoment + b_comoment
        comoment += np.outer(delta, delta) * (self.weight_sum * other.weight_sum / total)
        return CentredGram(self.rows + other.rows, total, mean, comoment, exponent)

    def _rescaled(self, exponent: IntArray) -> tuple[FloatArray, FloatArray]:
        """Scaled mean and co-moment in units of 2**exponent (>= self.exponent)."""
        if np.array_equal(exponent, self.exponent):
            return self.scaled_mean, self.scaled_comoment
        with np.errstate(under="ignore"):
            factor = powers_of_two(self.exponent - exponent)
            return self.scaled_mean * factor, self.scaled_comoment * np.outer(factor, factor)

    def select(self, columns: IntArray) -> CentredGram:
        """The statistics of a subset of the columns (exact: no recomputation)."""
        return CentredGram(self.rows, self.weight_sum, self.scaled_mean[columns],
                           self.scaled_comoment[np.ix_(columns, columns)],
                           self.exponent[columns])


_MEAN_LIMIT = float(np.ldexp(1.0, MEAN_EXPONENT))
_SQUARES_LOW = float(np.ldexp(1.0, -SQUARES_EXPONENT))
_SQUARES_HIGH = float(np.ldexp(1.0, SQUARES_EXPONENT))


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
