"""The only copy of each numerical kernel; arrays in, arrays out, no gate imports.

Every kernel names its formula and reference. Callers: the exact-pass routing
(``gate.stats.routing``), the diagnostics (``gate.diagnose.diagnostics``), and suggest's
evaluation of candidate sets (``gate.remedies.search``).

numpy.linalg only (LAPACK dpotrf, dgesv, dsyevd, dgesdd; BLAS dsyrk through ``a @ a.T``): importing
scipy.linalg costs about 0.23 s per process with numpy 2.4 / scipy 1.17 (it clones numpy's
namespace, which loads numpy.f2py and numpy.testing), more than a commit hook's whole check
of a small table. scipy stays for the rank-deficient paths (pivoted QR, QR downdates),
suggest, and the proportions of the largest condition indices of a factor of order
:data:`TOP_ROWS_MIN_ORDER` or more (where it saves more than its import), imported where they
run.
"""

from __future__ import annotations

import math
from typing import Literal, NamedTuple

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.intp]
BoolArray = NDArray[np.bool_]
#: Belsley-Kuh-Welsch scaling: unit-length columns of [1, X], or centred and scaled X.
Scaling = Literal["unit_length", "standardized"]

EPS = float(np.finfo(np.float64).eps)
#: Intercept position in the condition-index column lists.
INTERCEPT = -1


def correlation_block(comoment: FloatArray, columns: IntArray, scale: FloatArray) -> FloatArray:
    block = comoment[np.ix_(columns, columns)] / np.outer(scale, scale)
    np.clip(block, -1.0, 1.0, out=block)  # |r| <= 1; rounding can land a duplicate at 1 + eps
    np.fill_diagonal(block, 1.0)
    return block


def cholesky_or_none(matrix: FloatArray) -> FloatArray | None:
    """Upper Cholesky factor R (R'R = matrix), or None when the matrix is not numerically
    positive definite (LAPACK dpotrf fails, or the factor has a non-finite or zero diagonal).
    The one place a failed Cholesky is handled."""
    if matrix.size == 0:
        return np.zeros((0, 0))
    try:
        r: FloatArray = np.asarray(np.linalg.cholesky(matrix, upper=True), dtype=np.float64)
        # R'R = matrix, already C-ordered (numpy >= 2.0): no copy of a transposed L
    except np.linalg.LinAlgError:
        return None
    return r if np.all(np.isfinite(r)) and np.all(np.diag(r) > 0) else None


def certified_cholesky(corr: FloatArray, resolution: float
                       ) -> tuple[FloatArray | None, FloatArray | None]:
    """Upper Cholesky factor of corr and its inverse if every singular-value ratio of the
    standardised design is certainly at least ``resolution``, else (None, None).

    With A = Rt^-1: 1 / lambda_min = ||A||_2^2 <= min(||A||_F^2, ||A||_1 ||A||_inf), where
    ||A||_F^2 = trace(corr^-1) = sum(VIF); and lambda_max <= min(p, ||corr||_inf) (Golub & Van
    Loan, "Matrix Computations", 4th ed., 2.3.2 and 8.1). These O(p^2) bounds certify the
    singular-value ratio without an eigen-decomposition in all but borderline cases; only then
    do the eigenvalues decide.
    """
    rt = cholesky_or_none(corr)
    if rt is None:
        return None, None
    inverse = _upper_inverse(rt)
    finite = bool(np.all(np.isfinite(inverse)))
    if finite:
        vif_sum = float(np.einsum("ij,ij->", inverse, inverse))
        if vif_sum * corr.shape[0] * resolution**2 < 1.0:
            return rt, inverse
        absolute = np.abs(inverse)
        inverse_norm_sq = min(vif_sum, float(absolute.sum(axis=0).max())
                              * float(absolute.sum(axis=1).max()))
        largest = min(float(corr.shape[0]), float(np.abs(corr).sum(axis=1).max()))
        if inverse_norm_sq * largest * resolution**2 < 1.0:
            return rt, inverse
    eigenvalues = np.linalg.eigvalsh(corr)
    if eigenvalues[0] >= (resolution**2) * eigenvalues[-1]:
        return rt, (inverse if finite else None)
    return None, None


#: Below this order the inverse of a triangular block is one dense solve.
_INVERSE_BLOCK = 64


def _upper_inverse(r: FloatArray) -> FloatArray:
    """Inverse of a nonsingular upper-triangular matrix, by halves:
    inv([[A, B], [0, C]]) = [[inv(A), -inv(A) B inv(C)], [0, inv(C)]], so all the work is in
    matrix products (about 2n^3/3 flops; LAPACK dtrtri does n^3/3 with triangular products,
    which numpy does not expose). The blocked triangular inversions are analysed in Du Croz &
    Higham (1992), IMA J. Numer. Anal. 12:1-19 (recalled from memory, not re-checked here);
    the accuracy tests check this kernel against mpmath. A block of order <= 64 is solved
    densely: LU with partial pivoting of an upper-triangular matrix pivots nowhere and has
    L = I, so ``solve(block, I)`` is exactly the triangular back substitution."""
    n = r.shape[0]
    if n <= _INVERSE_BLOCK:
        with np.errstate(all="ignore"):
            return np.asarray(np.linalg.solve(r, np.eye(n)))
    half = n // 2
    top = _upper_inverse(r[:half, :half])
    bottom = _upper_inverse(r[half:, half:])
    inverse = np.zeros_like(r)
    inverse[:half, :half] = top
    inverse[half:, half:] = bottom
    with np.errstate(all="ignore"):  # an inverse beyond the float range: inf, checked by callers
        inverse[:half, half:] = -((top @ r[:half, half:]) @ bottom)
    return inverse


def triangular_inverse(r: FloatArray) -> FloatArray:
    """Inverse of the upper-triangular factor; LinAlgError when it is singular."""
    if r.size == 0:
        return np.zeros((0, 0))
    if not np.all(np.diag(r) != 0.0):
        raise np.linalg.LinAlgError("singular triangular factor after rank reduction")
    inverse = _upper_inverse(np.ascontiguousarray(r))
    if not np.all(np.isfinite(inverse)):
        raise np.linalg.LinAlgError("singular triangular factor after rank reduction")
    return inverse


def upper_times_transpose(upper: FloatArray) -> FloatArray:
    """U U' for upper-triangular U. numpy hands ``a @ a.T`` (one buffer, one operand the
    transposed view of the other) to BLAS dsyrk and mirrors the triangle, so the product is
    symmetric by construction."""
    if upper.size == 0:
        return np.zeros((0, 0))
    upper = np.ascontiguousarray(upper)
    return np.asarray(upper @ upper.T)


#: Largest condition number for which the singular values and right vectors of a scaled
#: factor come from the eigen-decomposition of r'r (LAPACK dsyevd) instead of its SVD (dgesdd):
#: 2.5x faster at order 2,001 (1.1 s vs 2.7 s on the benchmark machine). Squaring the matrix
#: makes the relative error of mu_k about eps * (mu_max / mu_k)^2 instead of eps * mu_max / mu_k
#: (Golub & Van Loan, "Matrix Computations", 4th ed., 8.1 and 8.6; recalled, not re-checked),
#: so the eigen route serves only while that stays far below the 1e-9 accuracy target.
#: Measured (orders 20-1,000, condition 100): indices within 1.4e-13, proportions within 5.5e-12
#: of the SVD route; the accuracy tests check both routes against mpmath.
EIGEN_ROUTE_CONDITION = 100.0


class Spectrum(NamedTuple):
    """Singular values ``mu`` (descending) of a scaled factor and, when asked for, its right
    singular vectors as the rows of ``vt``; ``method`` names the LAPACK route that served."""
    mu: FloatArray
    vt: FloatArray | None
    method: Literal["eigh", "svd"]


def spectrum(r: FloatArray, *, vectors: bool, try_eigen: bool = True) -> Spectrum:
    """Singular values (and right vectors) of a square factor: from r'r when its eigenvalues
    certify a condition number of at most ``EIGEN_ROUTE_CONDITION``, else from the SVD of r.
    The computed eigenvalues carry an absolute error of a small multiple of eps * lambda_max,
    so the ratio they show is the true one to many digits whenever it is this small. A factor
    above the limit pays for both (the eigen-decomposition is about 0.4 of the SVD's time).
    ``try_eigen=False``: the caller's own eigenvalues already showed the condition number over
    the limit; straight to the SVD."""
    found = _eigen_spectrum(r, vectors=vectors) if try_eigen else None  # p x p arrays freed
    if found is not None:
        return found
    if vectors:
        u, mu, vt = np.linalg.svd(r, full_matrices=False)  # LAPACK dgesdd
        del u  # p x p, not needed: freed before the proportions are formed
        return Spectrum(mu, vt, "svd")
    return Spectrum(np.asarray(np.linalg.svd(r, compute_uv=False), dtype=np.float64), None, "svd")


def _eigen_spectrum(r: FloatArray, *, vectors: bool) -> Spectrum | None:
    with np.errstate(all="ignore"):  # an overflowing product falls through to the SVD
        gram = r.T @ r
        if not bool(np.all(np.isfinite(gram))):
            return None
        if vectors:
            lam, v = np.linalg.eigh(gram)  # ascending
        else:
            lam, v = np.linalg.eigvalsh(gram), None
    del gram
    if not (lam[0] > 0.0 and lam[-1] <= EIGEN_ROUTE_CONDITION**2 * lam[0]):
        return None
    mu = np.sqrt(lam[::-1])
    return Spectrum(mu, None if v is None else np.ascontiguousarray(v[:, ::-1].T), "eigh")


def belsley_kuh_welsch(r: FloatArray, *, try_eigen: bool = True
                       ) -> tuple[FloatArray, FloatArray]:
    """Condition indices mu_max / mu_k (ascending) and variance-decomposition proportions
    ``proportions[k, j]`` (each column sums to 1) from the singular values and right vectors of
    the scaled factor ``r`` (Belsley, Kuh & Welsch 1980, "Regression Diagnostics", ch. 3):
    phi_jk = v_jk^2 / mu_k^2, pi_kj = phi_jk / sum_k phi_jk."""
    if r.size == 0:
        return np.ones(0), np.zeros((0, 0))
    mu, vt, _ = spectrum(r, vectors=True, try_eigen=try_eigen)
    assert vt is not None
    indices = mu[0] / mu
    phi = (vt.T / mu) ** 2  # phi[j, k] = v_jk^2 / mu_k^2
    return np.asarray(indices), np.asarray((phi / phi.sum(axis=1, keepdims=True)).T)


#: From this order of the scaled factor up, a caller that needs the proportions of only the
#: largest condition indices (:func:`belsley_kuh_welsch_top`) gets them from one
#: tridiagonalisation of r'r and eigenvectors for those indices alone, instead of every
#: eigenvector: at order 2,001, 0.5-0.6 s instead of 1.0 s for dsyevd, of which importing
#: scipy.linalg (for LAPACK routines numpy does not wrap) takes about 0.25 s. Below this order
#: dsyevd costs less than that import.
TOP_ROWS_MIN_ORDER = 1500


class ConditionRows(NamedTuple):
    """Every condition index (ascending) and the variance-decomposition proportions of the
    largest: ``proportions[k]`` for ``k >= first`` (NaN rows before ``first`` were not
    computed; ``first == 0``: every row)."""
    indices: FloatArray
    proportions: FloatArray
    first: int


def belsley_kuh_welsch_top(r: FloatArray, *, above: float, at_least: int,
                           min_order: int | None = None,
                           denominators: FloatArray | None = None) -> ConditionRows:
    """:func:`belsley_kuh_welsch` for a caller that reads the proportions of the largest
    indices only: rows for every index > ``above`` and for at least the ``at_least`` largest.

    For a factor of order ``min_order`` or more on the eigen route (condition number at most
    :data:`EIGEN_ROUTE_CONDITION`), the way LAPACK's dsyevx does it, with the tridiagonal form
    kept: dsytrd reduces r'r = Q T Q', dsterf gives every eigenvalue of T, dstebz (bisection)
    and dstein (inverse iteration) the eigenvectors of T for the smallest eigenvalues asked
    for, and dormqr applies Q to them. The denominators sum_k v_jk^2 / mu_k^2 need every
    vector; they are the diagonal of inv(r'r): ``denominators`` when the caller has them
    (:func:`inverse_cross_product_diagonal`), else the squared row norms of inv(r)
    (:func:`_upper_inverse`). Anything else (smaller orders, a condition number over the
    limit, most rows asked for, a LAPACK error) takes :func:`belsley_kuh_welsch`: every row.
    ``min_order`` defaults to :data:`TOP_ROWS_MIN_ORDER` (read at call time).
    """
    try_eigen = True
    if r.shape[0] >= max(TOP_ROWS_MIN_ORDER if min_order is None else min_order, 2):
        found = _top_rows_tridiagonal(r, above, at_least, denominators)
        if isinstance(found, ConditionRows):
            return found
        try_eigen = found  # False: its eigenvalues showed the condition over the limit
    indices, proportions = belsley_kuh_welsch(r, try_eigen=try_eigen)
    return ConditionRows(indices, proportions, 0)


def rows_wanted(indices: FloatArray, above: float, at_least: int) -> int:
    """How many of the largest indices :func:`belsley_kuh_welsch_top` gives proportions for."""
    return min(int(indices.size), max(int(np.count_nonzero(indices > above)), at_least))


def _top_rows_tridiagonal(r: FloatArray, above: float, at_least: int,
                          denominators: FloatArray | None) -> ConditionRows | bool:
    """The rows, or whether the every-row kernel should still try the eigen route (False when
    the eigenvalues here showed the condition number over the limit: the SVD serves)."""
    n = r.shape[0]
    # Upper-triangular and nonsingular (every scaled design factor is): inv(r) below.
    if np.any(np.tril(r, -1)) or not np.all(np.diag(r) != 0.0):
        return True
    from scipy.linalg import lapack

    with np.errstate(all="ignore"):
        gram = r.T @ r
    if not bool(np.all(np.isfinite(gram))):
        return True
    lwork = int(lapack.dsytrd_lwork(n, lower=1)[0])
    reflectors, d, e, tau, info = lapack.dsytrd(gram, lower=1, lwork=max(lwork, 1),
                                                overwrite_a=1)
    del gram  # overwritten by the reflectors
    if info != 0:
        return True
    lam, info = lapack.dsterf(d, e)  # every eigenvalue, ascending
    if info != 0:
        return True
    if not (lam[0] > 0.0 and lam[-1] <= EIGEN_ROUTE_CONDITION**2 * lam[0]):
        return False
    mu = np.sqrt(lam[::-1])
    indices = np.asarray(mu[0] / mu)
    count = rows_wanted(indices, above, at_least)
    if 2 * count > n:  # most rows: every eigenvector at once is no dearer
        return True
    proportions = np.full((n, n), np.nan)
    if count == 0:
        return ConditionRows(indices, proportions, n)
    # Eigenvalues 1..count of T by bisection (abstol 2 * safe minimum: LAPACK's advice for the
    # most accurate vectors), then their vectors by inverse iteration, as dsyevx.
    m, w, block, split, info = lapack.dstebz(d, e, 2, 0.0, 0.0, 1, count,
                                             2.0 * float(np.finfo(np.float64).tiny), "B")
    if info != 0 or m != count:
        return True
    z, info = lapack.dstein(d, e, w[:m], block, split)
    if info != 0:
        return True
    z = np.asarray(z)[:, np.argsort(w[:m], kind="stable")]  # ascending, as lam
    # Q = H(1) ... H(n-1): the reflectors of dsytrd (lower) act on rows 1..n-1 (LAPACK dormtr).
    if n > 1:
        rotated, _, info = lapack.dormqr("L", "N", reflectors[1:, :n - 1], tau, z[1:],
                                         lwork=max(1, 64 * count))
        if info != 0:
            return True
        z[1:] = rotated
    if denominators is None or not bool(np.all(np.isfinite(denominators))):
        with np.errstate(all="ignore"):
            denominators = squared_row_norms(_upper_inverse(np.ascontiguousarray(r)))
    if not bool(np.all(np.isfinite(denominators) & (denominators > 0.0))):
        return True
    first = n - count
    # Column i of z belongs to the i-th smallest eigenvalue, i.e. to index position n-1-i.
    phi = z * z / lam[:count]  # phi[j, i] = v_ji^2 / mu^2
    proportions[first:] = (phi / denominators[:, None]).T[::-1]
    return ConditionRows(indices, proportions, first)


def squared_row_norms(matrix: FloatArray) -> FloatArray:
    """VIF_j = squared norm of row j of inv(Rt) = [corr^-1]_jj (numerics.md)."""
    return np.asarray(np.einsum("ij,ij->i", matrix, matrix))


def gvif(correlation_block_gg: FloatArray, inverse_block_gg: FloatArray) -> float:
    """Generalised VIF of a group G (Fox & Monette 1992, JASA 87:178-183):
    det(corr_GG) * det([corr^-1]_GG) (Schur complement form); NaN when undefined."""
    sign_c, log_c = np.linalg.slogdet(correlation_block_gg)
    sign_p, log_p = np.linalg.slogdet(inverse_block_gg)
    return float(np.exp(log_c + log_p)) if sign_c > 0 and sign_p > 0 else float("nan")


def scaled_design_factor(weight_sum: float, means: FloatArray, kept: IntArray,
                         r_kept: FloatArray, scales: FloatArray, scaling: Scaling
                         ) -> tuple[FloatArray, tuple[int, ...]]:
    """The factor whose singular values give the Belsley-Kuh-Welsch condition indices.

    ``r_kept`` is the upper factor of the correlation matrix of the ``kept`` columns (any subset
    of the design, e.g. a candidate set in ``gate.remedies.search``); ``scales`` are centred column
    norms and ``means`` the (weighted) means over all design columns.

    unit_length: [[sqrt(W), sqrt(W) m'], [0, R11]] with R11 = r_kept * s, each column scaled to
    unit length (Belsley, Kuh & Welsch 1980, ch. 3); standardized: ``r_kept`` itself.
    Returns the factor and the design column of each of its columns (INTERCEPT = -1).
    """
    if scaling == "standardized":
        return r_kept, tuple(int(k) for k in kept)
    top, spread = _unit_length_parts(weight_sum, means, kept, scales)
    k = kept.size
    r = np.zeros((k + 1, k + 1))
    r[0, 0] = 1.0
    r[0, 1:] = top
    np.multiply(r_kept, spread, out=r[1:, 1:])
    r /= np.sqrt(np.einsum("ij,ij->j", r, r))  # unit-length columns
    return r, (INTERCEPT, *(int(c) for c in kept))


def _unit_length_parts(weight_sum: float, means: FloatArray, kept: IntArray,
                       scales: FloatArray) -> tuple[FloatArray, FloatArray]:
    """First row sqrt(W) m_j u_j and column scales s_j u_j of the unit-length factor before its
    columns are normalised. u_j is a power of two near max(|m_j|, s_j), applied before anything
    is multiplied or squared (exact; column scaling is what the unit-length step does anyway),
    so columns near 1e308 or 1e-308 neither overflow nor underflow."""
    m, s = means[kept], scales[kept]
    _, exponent = np.frexp(np.maximum(np.abs(m), s))
    unit = np.ldexp(1.0, -np.clip(exponent, -1020, 1023))
    return np.sqrt(weight_sum) * (m * unit), s * unit


def inverse_cross_product_diagonal(weight_sum: float, means: FloatArray, kept: IntArray,
                                   r_kept: FloatArray, r_kept_inverse: FloatArray,
                                   scales: FloatArray, scaling: Scaling) -> FloatArray:
    """diag(inv(r'r)) of :func:`scaled_design_factor`'s r (the denominators of the
    variance-decomposition proportions, sum_k v_jk^2 / mu_k^2), from inv(r_kept) in O(k^2)
    instead of inverting r.

    standardized: r = r_kept, so the squared row norms of inv(r_kept) (the VIFs). unit_length:
    r = r0 D^-1 with r0 = [[1, a'], [0, R C]] (a the first row, C = diag(c) the column scales of
    :func:`_unit_length_parts`, D the column norms of r0), so inv(r) = D inv(r0) and
    inv(r0) = [[1, -(a/c)' inv(R)], [0, C^-1 inv(R)]]: row 0 has squared norm
    1 + ||(a/c)' inv(R)||^2 and row j the squared norm of row j of inv(R) over c_j^2, each
    times D_j^2 = a_j^2 + c_j^2 ||R e_j||^2.
    """
    rows = squared_row_norms(r_kept_inverse)
    if scaling == "standardized":
        return rows
    top, spread = _unit_length_parts(weight_sum, means, kept, scales)
    with np.errstate(all="ignore"):  # beyond the float range: not finite, callers fall back
        norms = np.concatenate(([1.0], top**2 + spread**2 * np.einsum("ij,ij->j", r_kept,
                                                                      r_kept)))
        through = (top / spread) @ r_kept_inverse
        inner = np.concatenate(([1.0 + float(through @ through)], rows / spread**2))
        return np.asarray(norms * inner)


def condition_indices(weight_sum: float, means: FloatArray, kept: IntArray, r_kept: FloatArray,
                      scales: FloatArray, scaling: Scaling) -> FloatArray:
    """Condition indices mu_max / mu_k (ascending) of the design restricted to ``kept``.

    Singular values only (no proportions), for searches that evaluate many column subsets.
    Belsley, Kuh & Welsch (1980), "Regression Diagnostics", ch. 3.
    """
    r, _ = scaled_design_factor(weight_sum, means, kept, r_kept, scales, scaling)
    if r.size == 0:
        return np.ones(0)
    mu = spectrum(r, vectors=False).mu
    return np.asarray(mu[0] / mu)


def auxiliary_regression(inverse_row: FloatArray, feature: int, means: FloatArray,
                         scales: FloatArray) -> tuple[FloatArray, FloatArray, float, float, float]:
    """Least-squares regression of column ``feature`` on the other columns (and an intercept),
    from row ``feature`` of the inverse correlation matrix P of those columns: no pass over the
    rows, O(p) work.

    With s the centred (weighted) column norms and m the means (numerics.md, Round 2):
    standardised coefficients b_k = -P_jk / P_jj, slopes beta_k = b_k s_j / s_k,
    intercept = m_j - beta' m_{-j}, R^2 = 1 - 1 / P_jj, and the (weighted) residual sum of
    squares s_j^2 / P_jj. Returns (slopes, standardised, intercept, R^2, residual sum of
    squares); the arrays hold every column, with 0 at ``feature``.
    """
    with np.errstate(over="ignore", invalid="ignore"):  # slopes between columns 1e300 apart
        return _auxiliary_regression(inverse_row, feature, means, scales)


def _auxiliary_regression(row: FloatArray, feature: int, means: FloatArray, scales: FloatArray
                          ) -> tuple[FloatArray, FloatArray, float, float, float]:
    pjj = float(row[feature])
    standardised = -row / pjj
    standardised[feature] = 0.0
    slopes = standardised * scales[feature] / np.where(scales > 0, scales, 1.0)
    slopes[feature] = 0.0
    intercept = float(means[feature] - slopes @ means)
    return (np.asarray(slopes), np.asarray(standardised), intercept, 1.0 - 1.0 / pjj,
            float(scales[feature]) / math.sqrt(pjj) if pjj > 0 else math.nan)
