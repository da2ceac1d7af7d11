"""Exact-pass routing: decide from the main pass whether the centred Gram settles the rank and
gives every VIF to ``ACCURACY_TARGET``.

The Gram squares the condition number, so it resolves singular-value ratios of the
standardised design down to about sqrt(p eps), not to the rank tolerance, and its VIFs carry a
relative error that grows with the VIFs themselves (``gram_vif_error_bound``). The Gram route is
taken only while every ratio is at least ``GRAM_RESOLUTION`` (certified by
``gate.numerics.kernels.certified_cholesky``) *and* that error bound is at most
``ACCURACY_TARGET``; otherwise an exact TSQR pass over the centred, scaled rows decides rank
and gives the VIFs. A policy tolerance coarser than ``GRAM_RESOLUTION`` is counted on the
Gram's Cholesky factor (which resolves ratios that large) under the same two conditions.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from gate.numerics.kernels import (
    EPS,
    BoolArray,
    FloatArray,
    IntArray,
    certified_cholesky,
    correlation_block,
)
from gate.stats.accumulators import CentredGram, TriangularFactor, powers_of_two

#: Smallest singular-value ratio of the standardised design that the Gram route decides on its
#: own (about 100 x sqrt(eps)); below it an exact TSQR pass decides rank. Echoed in the verdict.
GRAM_RESOLUTION = 1e-5
#: Relative accuracy promised for every reported VIF (README "Accuracy"); the Gram route is
#: used only while its error bound is at most this.
ACCURACY_TARGET = 1e-9
#: Error bound of a Gram-route VIF, derivation. The route computes P = corr^-1 from a computed
#: correlation matrix corr + E. To first order dP = -P E P, so for every j
#:     |dP_jj| = |(P e_j)' E (P e_j)| <= ||E||_2 (P^2)_jj <= ||E||_2 ||P||_2 P_jj,
#: i.e. relative error of VIF_j <= ||E||_2 ||P||_2, with VIF_max <= ||P||_2 <= sum(VIF).
#: ||P||_2 is bounded above from the inverse Cholesky factor A (P = A A'), in O(p^2):
#: ||P||_2 = ||A||_2^2 <= min(||A||_F^2, ||A||_1 ||A||_inf) (Golub & Van Loan 2.3.2).
#: E has two parts, both measured on this code (tools: a sweep of n 2,000..300,000,
#: p 3..50, chunks 300..65,536 rows, VIF 2e2..5e9; reference VIFs from Householder QR of the
#: two-pass-centred rows, itself accurate to ~sqrt(VIF) eps):
#:   * rounding of the products, sums, Chan merges, Cholesky and triangular inverse, for
#:     columns centred near zero: ||E||_2 <= 2.4 eps measured (worst of 48 cases);
#:     GRAM_ROUNDING_FACTOR = 16 keeps a margin of about 6.
#:   * chunk means far from zero: each chunk mean is rounded relative to |mean|, and the Chan
#:     update's (mean_b - mean_a)^2 term carries that error into the co-moment, so E grows with
#:     r = max_j |mean_j| / sd_j: measured ||E||_2 <= 0.011 r eps (r 2e2..2e9);
#:     GRAM_SHIFT_FACTOR = 0.1 keeps a margin of about 9.
#: So bound = eps ||P||_2 (GRAM_ROUNDING_FACTOR + GRAM_SHIFT_FACTOR r). Without offsets the Gram
#: route then serves VIFs up to about 1e-9 / (16 eps) = 2.8e5; a VIF of 8e7 (measured error
#: 1.3e-7 on the Gram) goes through the exact pass.
GRAM_ROUNDING_FACTOR = 16.0
GRAM_SHIFT_FACTOR = 0.1


@dataclass(frozen=True)
class ExactPassPlan:
    """What the main pass decided, and what an exact pass (if needed) must factor.

    Column j of the design is held in units of 2**exponent[j] (``CentredGram``): ``centre``
    and ``scale`` are the (weighted) mean and centred norm of the non-constant columns in those
    units, so the exact pass standardises any finite column without over- or underflow.
    """

    constant: BoolArray
    needs_exact_pass: bool
    #: The Gram certified every singular-value ratio >= GRAM_RESOLUTION: full rank, no
    #: dependency search (the exact pass, if it runs, runs only for accuracy).
    full_rank_certified: bool
    columns: IntArray  # non-constant design columns, in design order
    centre: FloatArray
    scale: FloatArray
    exponent: IntArray
    tolerance: float
    #: Relative error bound of the Gram route's VIFs (inf when the Gram did not certify full
    #: rank); the Gram route is used only while it is <= ACCURACY_TARGET.
    gram_vif_error_bound: float
    cholesky: FloatArray | None = field(default=None, repr=False)  # Rt when the Gram route serves
    cholesky_inverse: FloatArray | None = field(default=None, repr=False)  # its inverse (kernels.triangular_inverse)
    #: The correlation matrix of ``columns`` the Cholesky factor came from (the Gram route),
    #: handed to the diagnostics so that it is formed once per check.
    correlation: FloatArray | None = field(default=None, repr=False)

    def empty_factor(self) -> TriangularFactor:
        """The exact pass's starting factor: an intercept column, then the kept columns."""
        return TriangularFactor.empty(self.columns.size + 1)


def default_tolerance(rows: int, columns: int) -> float:
    """max(n, p+1) * eps: the relative singular-value cut-off of numpy's matrix_rank."""
    return max(rows, columns + 1) * EPS


def gram_vif_error_bound(inverse_factor: FloatArray, shift: float) -> float:
    """eps ||P||_2 (GRAM_ROUNDING_FACTOR + GRAM_SHIFT_FACTOR shift), ||P||_2 bounded from the
    inverse Cholesky factor A of the correlation matrix (P = A A'); see the derivation above."""
    if inverse_factor.size == 0:
        return 0.0
    absolute = np.abs(inverse_factor)
    frobenius_sq = float(np.einsum("ij,ij->", inverse_factor, inverse_factor))
    norm_bound = min(frobenius_sq, float(absolute.sum(axis=0).max())
                     * float(absolute.sum(axis=1).max()))
    return EPS * norm_bound * (GRAM_ROUNDING_FACTOR + GRAM_SHIFT_FACTOR * shift)


def plan_exact_pass(gram: CentredGram, *, tolerance: float | None = None) -> ExactPassPlan:
    """Find constants and decide whether the Gram alone settles the rank and the VIFs."""
    p = gram.scaled_mean.shape[0]
    tol = default_tolerance(gram.rows, p) if tolerance is None else tolerance
    scale = gram.centred_norms()  # units 2**exponent: scale-free comparisons only
    uncentred = np.sqrt(scale**2 + gram.weight_sum * gram.scaled_mean**2)
    constant = (scale <= tol * uncentred) | (uncentred == 0.0)
    columns = np.flatnonzero(~constant)
    centre, col_scale = gram.scaled_mean[columns], scale[columns]
    exponent = gram.exponent[columns]
    if columns.size == 0:
        return ExactPassPlan(constant, False, True, columns, centre, col_scale, exponent, tol,
                             0.0, np.zeros((0, 0)), np.zeros((0, 0)))
    corr = correlation_block(gram.scaled_comoment, columns, col_scale)
    rt, rt_inverse = certified_cholesky(corr, GRAM_RESOLUTION)
    if rt is None or rt_inverse is None:
        return ExactPassPlan(constant, True, rt is not None and tol < GRAM_RESOLUTION, columns,
                             centre, col_scale, exponent, tol, float("inf"))
    # max |mean| / sd over the columns: sd = scale / sqrt(W).
    shift = float(np.max(np.abs(centre) * np.sqrt(gram.weight_sum) / col_scale))
    bound = gram_vif_error_bound(rt_inverse, shift)
    # Every ratio is >= GRAM_RESOLUTION: that settles full rank at a finer tolerance; a coarser
    # one (policy) is still counted, on the Gram's factor, which resolves ratios that large.
    certified = tol < GRAM_RESOLUTION
    if bound > ACCURACY_TARGET:
        return ExactPassPlan(constant, True, certified, columns, centre, col_scale, exponent,
                             tol, bound)
    return ExactPassPlan(constant, False, certified, columns, centre, col_scale, exponent, tol,
                         bound, rt, rt_inverse, corr)


def exact_pass_block(plan: ExactPassPlan, values: FloatArray,
                     weights: FloatArray | None) -> FloatArray:
    """Rows of the exact pass: [1, (x 2**-e - centre) / scale], times sqrt(weight).

    The leading ones column makes the factor's trailing block the factor of the rows centred at
    their exact (weighted) mean, whatever rounding the main pass's mean carries (a column far
    from zero would otherwise keep a shift of eps |mean| that limits large VIFs); the power of
    two 2**-e is exact, so extreme magnitudes neither overflow nor underflow.
    """
    n = values.shape[0]
    block = np.empty((n, plan.columns.size + 1))
    block[:, 0] = 1.0
    np.multiply(values[:, plan.columns], powers_of_two(-plan.exponent), out=block[:, 1:])
    block[:, 1:] -= plan.centre
    block[:, 1:] /= plan.scale
    if weights is not None:
        block *= np.sqrt(weights)[:, None]
    return block
