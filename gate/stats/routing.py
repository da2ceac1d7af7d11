"""Exact-pass routing: decide from the main pass whether the centred Gram settles the rank.

The Gram squares the condition number, so it resolves singular-value ratios of the
standardised design down to about sqrt(p eps), not to the rank tolerance. While every ratio is
at least ``GRAM_RESOLUTION`` (certified by ``gate.numerics.kernels.certified_cholesky``) the
Gram suffices; otherwise an exact TSQR pass over the centred, scaled rows decides.
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
from gate.stats.accumulators import CentredGram

#: Smallest singular-value ratio of the standardised design that the Gram route decides on its
#: own (about 100 x sqrt(eps)); below it an exact TSQR pass decides rank. Echoed in the verdict.
GRAM_RESOLUTION = 1e-5


@dataclass(frozen=True)
class ExactPassPlan:
    """What the main pass decided, and what an exact pass (if needed) must factor."""

    constant: BoolArray
    needs_exact_pass: bool
    columns: IntArray  # non-constant design columns, in design order
    centre: FloatArray
    scale: FloatArray
    tolerance: float
    cholesky: FloatArray | None = field(default=None, repr=False)  # Rt when the Gram sufficed
    cholesky_inverse: FloatArray | None = field(default=None, repr=False)  # its inverse (dtrtri)


def default_tolerance(rows: int, columns: int) -> float:
    """max(n, p+1) * eps: the relative singular-value cut-off of numpy's matrix_rank."""
    return max(rows, columns + 1) * EPS


def plan_exact_pass(gram: CentredGram, *, tolerance: float | None = None) -> ExactPassPlan:
    """Find constants and decide whether the Gram alone can settle the rank."""
    p = gram.mean.shape[0]
    tol = default_tolerance(gram.rows, p) if tolerance is None else tolerance
    centred_sq = np.clip(np.diag(gram.comoment).copy(), 0.0, None)
    uncentred = np.sqrt(centred_sq + gram.weight_sum * gram.mean**2)
    scale = np.sqrt(centred_sq)
    constant = (scale <= tol * uncentred) | (uncentred == 0.0)
    columns = np.flatnonzero(~constant)
    centre, col_scale = gram.mean[columns], scale[columns]
    if columns.size == 0:
        return ExactPassPlan(constant, False, columns, centre, col_scale, tol, np.zeros((0, 0)))
    corr = correlation_block(gram.comoment, columns, col_scale)
    if tol >= GRAM_RESOLUTION:
        # The Gram resolves ratios above GRAM_RESOLUTION; a coarser tolerance is decided here.
        return ExactPassPlan(constant, False, columns, centre, col_scale, tol, None)
    rt, rt_inverse = certified_cholesky(corr, GRAM_RESOLUTION)
    return ExactPassPlan(constant, rt is None, columns, centre, col_scale, tol, rt, rt_inverse)


def exact_pass_block(plan: ExactPassPlan, values: FloatArray,
                     weights: FloatArray | None) -> FloatArray:
    """Rows of the exact pass: centred by the global means, scaled, times sqrt(weight)."""
    block = (values[:, plan.columns] - plan.centre) / plan.scale
    if weights is not None:
        block *= np.sqrt(weights)[:, None]
    return block
