"""Structural collinearity: features that are (close to) the square of a feature or the product
of two, and what centring the parents before forming the term would do to the VIF.

Detection reads a small sample of rows, not the whole table. Why a sample: a square or a product
is a row-wise identity, so any rows reveal it, while the Gram of the main pass holds only second
moments (the correlation of x_j with x_i * x_k needs third and fourth moments, i.e. p^3 extra
sums in the main pass, for a question that matters only for the few features in breach). The
check runs only when some feature's VIF exceeds the policy's limit, only for those features,
and reads the first ``SAMPLE_ROWS`` used rows (one chunk): a bounded extra read whatever the
table size. It sees the first rows only; a table sorted so that its first rows are unusual can
hide or fake a *near* relation, which is why the finding is information, never a judgement.

The VIF after centring is exact, not estimated from the sample: with x_j = a + b x_i x_k + e,
the centred term a + b (x_i - m_i)(x_k - m_k) + e equals x_j - b m_k x_i - b m_i x_k plus a
constant (for a square, x_j - 2 b m_i x_i), a linear combination of existing design columns.
So the centred design is X A for a known A, its co-moment matrix is A' M A from the main pass's
Gram, and its VIFs follow from the Cholesky factor of its correlation matrix (numerics.md).

Centred before testing. Every sample column is centred on its sample mean before any term is
formed: the raw product is rebuilt as u_i u_k + m_k u_i + m_i u_k (u = x - m), which has no
cancellation at a large offset, and the test asks whether the *centred* term u_i u_k adds what
the parents leave unexplained linearly. Both fits span the same space as the raw ones (1, x_i,
x_k, x_i x_k), so the answer does not depend on the offset, only the rounding does. Without
this, a linear relation at a large offset (``big_offset = 1e12 + c``) was called a square: its
raw square is linear in c to 24 digits and the uncentred linear fit lost the rest to rounding.

Computed or measured. A term the user *computed* from its parent (x^2 or a product formed in the
pipeline) equals a + b * parent_term over the whole sample up to rounding; a *measured* quantity
(an area measured alongside a radius) only approximately. The term is "computed" when the affine
fit leaves max |residual| <= ``COMPUTED_TOLERANCE`` * (max x_j - min x_j) on the sample (about
what six significant digits leave), "measured" otherwise. The spread, not the magnitude, is the
scale: at a large offset (x = 1e4 + u) x itself is a quadratic in x^2 to 9 digits of its
magnitude, yet only to 5 digits of its spread, while x^2 is x * x to rounding. Only a computed term can be
centred before squaring, so only it gets the centred VIF (``vif_centred`` is None otherwise).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np

from gate.design.plan import Design, DesignPlan, encode_block
from gate.diagnose.diagnostics import Diagnostics
from gate.numerics.kernels import (
    FloatArray,
    cholesky_or_none,
    squared_row_norms,
    triangular_inverse,
)
from gate.policy.models import Policy
from gate.read.sources import TableSource

#: Rows read for the check (the first used rows of the table).
SAMPLE_ROWS = 2048
#: Rows used to screen every candidate term before the full sample confirms it.
SCREEN_ROWS = 256
#: Squares and products of sample columns are formed in the data's units; columns of larger
#: (or smaller nonzero) magnitude skip this information-only search rather than overflow.
STRUCTURAL_MAGNITUDE = 2.0**120
#: |corr(x_j, term)| at or above this on the sample: x_j is (close to) an affine function of the
#: term. Common practice, no source: 0.999 leaves 0.2% of x_j's variance unexplained.
STRUCTURAL_CORRELATION = 0.999
#: The term must leave at most this fraction of what the parents leave linearly
#: (1 - |r_term| <= (1 - R_linear) / 10), so a plain linear near-duplicate is not called a square.
LINEAR_IMPROVEMENT = 10.0
#: Computed (not measured): the affine fit x_j ~ a + b * term leaves at most this fraction of
#: the spread of x_j (max - min) on the sample. Six significant digits leave about 5e-7 of it; a
#: measurement error this small cannot be told from rounding anyway.
COMPUTED_TOLERANCE = 1e-6
#: Screened terms confirmed per target, best screening correlation first.
MAX_CONFIRM = 8
#: Parents screened per check: the features most correlated (main-pass |r|) with any breaching
#: feature. A square or product that inflates a VIF is correlated with its parents (that is the
#: inflation), so this bounds the work at MAX_PARENTS^2 / 2 terms whatever the width.
MAX_PARENTS = 120


@dataclass(frozen=True)
class StructuralTerm:
    """Feature ``feature`` ~ intercept + slope * (parents[0] * parents[-1])."""

    feature: int
    kind: Literal["square", "product"]
    parents: tuple[int, ...]
    correlation: float  # on the sample
    intercept: float
    slope: float
    sample_rows: int
    vif: float
    vif_centred: float | None  # None when an exact dependency makes it undefined
    parent_vif: tuple[float, ...]
    parent_vif_centred: tuple[float | None, ...]
    #: True: x_j equals intercept + slope * term to rounding over the sample (formed from its
    #: parents, so centring before forming it is a remedy); False: only close (measured).
    computed: bool = True
    max_residual: float = 0.0  # max |x_j - intercept - slope * term| on the sample

    def describe(self, names: tuple[str, ...]) -> str:
        j = names[self.feature]
        parents = [names[k] for k in self.parents]
        what = (f"the square of {parents[0]}" if self.kind == "square"
                else f"the product of {parents[0]} and {parents[1]}")
        verb = "squaring" if self.kind == "square" else "multiplying"
        seen = (f"r = {self.correlation:.5f} on the first {self.sample_rows:,} rows")
        if not self.computed:
            return (f"{j} is close to {what} ({seen}) but not computed from it: it differs "
                    f"from {self.intercept:.6g} + {self.slope:.6g} x that term by up to "
                    f"{self.max_residual:.3g}, more than rounding, so it looks measured. "
                    f"Structural collinearity between measured quantities: centring "
                    f"{' and '.join(parents)} does not change {j}; keep one of them")
        if self.vif_centred is None:
            return (f"{j} is (close to) {what} ({seen}): structural collinearity. The VIF "
                    f"after centring cannot be shown while {' or '.join(parents)} or {j} sits "
                    "in an exact dependency; resolve that first")
        centred = f"{self.vif_centred:.3g}"
        parent_part = "; ".join(
            f"{p} {v:.3g} -> {'n/a' if c is None else f'{c:.3g}'}"
            for p, v, c in zip(parents, self.parent_vif, self.parent_vif_centred))
        return (f"{j} is (close to) {what} ({seen}): structural collinearity. Centring "
                f"{' and '.join(parents)} before {verb} changes its VIF from {self.vif:.3g} to "
                f"{centred} (parents: {parent_part})")


def structural_terms(source: TableSource, plan: DesignPlan, design: Design,
                     diagnostics: Diagnostics, policy: Policy) -> tuple[StructuralTerm, ...]:
    """Squares and products among the features whose VIF exceeds the policy's limit."""
    limit = policy.limits.vif.max
    grouped = {k for g in design.groups for k in g.indices}
    numeric = np.asarray([j for j in range(len(design.features)) if j not in grouped
                          and np.isfinite(diagnostics.correlation[j, j])], dtype=np.intp)
    targets = [int(j) for j in numeric if diagnostics.vif[j] > limit]
    if not targets or numeric.size < 2:
        return ()
    rows = np.asarray(targets, dtype=np.intp)
    strength = np.nanmax(np.abs(diagnostics.correlation[np.ix_(rows, numeric)]), axis=0)
    parents = numeric[np.argsort(-strength, kind="stable")[:MAX_PARENTS]]
    sample = read_sample(source, plan, design)
    if sample.shape[0] < 8 or not _moderate(sample[:, sorted({*targets, *parents.tolist()})]):
        return ()
    found = detect_terms(sample, targets, np.sort(parents))
    return tuple(_with_vifs(term, diagnostics) for term in found)


def read_sample(source: TableSource, plan: DesignPlan, design: Design,
                rows: int = SAMPLE_ROWS) -> FloatArray:
    """The first ``rows`` used rows over the design columns (one chunk, or a few if rows drop)."""
    selection = list(design.selection)
    blocks: list[FloatArray] = []
    have = 0
    for chunk in source.chunks(plan.read_columns, rows):
        values, _, _ = encode_block(plan, chunk)
        blocks.append(values[:, selection])
        have += values.shape[0]
        if have >= rows:
            break
    if not blocks:
        return np.zeros((0, len(selection)))
    return np.vstack(blocks)[:rows]


def _moderate(block: FloatArray) -> bool:
    """Every column's largest |value| within STRUCTURAL_MAGNITUDE^+-1 (or zero): squares and
    products are formed in the data's units, which beyond that could over- or underflow."""
    largest = np.max(np.abs(block), axis=0) if block.size else np.zeros(0)
    nonzero = largest[largest > 0.0]
    return bool(np.all(nonzero <= STRUCTURAL_MAGNITUDE)
                and np.all(nonzero >= 1.0 / STRUCTURAL_MAGNITUDE))


def _standardise(block: FloatArray) -> tuple[FloatArray, np.ndarray]:
    centred = block - block.mean(axis=0)
    norm = np.linalg.norm(centred, axis=0)
    ok = norm > 1e-12 * np.maximum(np.abs(block).max(axis=0), 1e-300)
    return centred / np.where(ok, norm, 1.0), ok


def _raw_terms(centred: FloatArray, means: FloatArray, i: int, others: np.ndarray
               ) -> FloatArray:
    """x_i * x_k - mean over the rows, for every k in ``others``, from centred columns:
    (m_i + u_i)(m_k + u_k) = u_i u_k + m_k u_i + m_i u_k + const, without the cancellation of
    forming x_i x_k at a large offset."""
    u_i = centred[:, [i]]
    u_k = centred[:, others]
    terms = u_i * u_k + means[others] * u_i + means[i] * u_k
    return np.asarray(terms - terms.mean(axis=0))


def detect_terms(sample: FloatArray, targets: list[int], parents: np.ndarray
                 ) -> list[tuple[int, str, tuple[int, ...], float, float, float, int, bool,
                                 float]]:
    """(feature, kind, parents, r, intercept, slope, rows, computed, max residual) per target
    with a square/product; every column is centred before a term is formed or tested."""
    means = sample.mean(axis=0)
    centred = sample - means
    screen = centred[:SCREEN_ROWS]
    screen = screen - screen.mean(axis=0)
    z_screen, ok_screen = _standardise(screen[:, targets])
    found: dict[int, list[tuple[float, str, tuple[int, ...]]]] = {}
    threshold = STRUCTURAL_CORRELATION - 0.01  # screening is on fewer rows: be lenient
    plist = [int(i) for i in parents]
    screen_means = means + centred[:SCREEN_ROWS].mean(axis=0)
    for a, i in enumerate(plist):
        others = np.asarray(plist[a:], dtype=np.intp)
        terms = _raw_terms(screen, screen_means, i, others)
        z_terms, ok_terms = _standardise(terms)
        corr = np.abs(z_terms.T @ z_screen)  # [term, target]
        corr[~ok_terms] = 0.0
        corr[:, ~ok_screen] = 0.0
        for k_pos, t_pos in zip(*np.nonzero(corr >= threshold)):
            target = targets[int(t_pos)]
            k = int(others[int(k_pos)])
            if target in (i, k):
                continue
            found.setdefault(target, []).append(
                (float(corr[k_pos, t_pos]), "square" if k == i else "product",
                 (i,) if k == i else (i, k)))
    out = []
    for target, screened in sorted(found.items()):
        screened.sort(key=lambda item: -item[0])
        for _, kind, pars in screened[:MAX_CONFIRM]:
            confirmed = _confirm(sample, centred, means, target, pars)
            if confirmed is not None:
                out.append((target, kind, pars, *confirmed, sample.shape[0],
                            *_computed(sample, centred, means, target, pars, *confirmed[1:])))
                break
    return _one_direction(out, sample)


def _one_direction(found: list[tuple[int, str, tuple[int, ...], float, float, float, int, bool,
                                     float]], sample: FloatArray
                   ) -> list[tuple[int, str, tuple[int, ...], float, float, float, int, bool,
                                   float]]:
    """Over a narrow range x is itself close to a quadratic in x^2: when j is found as a term
    of i and i as a term of j, keep the direction with the smaller residual (relative to the
    feature's spread), i.e. the column that was formed from the other."""
    def misfit(item: tuple[int, str, tuple[int, ...], float, float, float, int, bool, float]
               ) -> float:
        spread = float(np.ptp(sample[:, item[0]]))
        return item[8] / spread if spread > 0.0 else math.inf

    by_feature = {item[0]: item for item in found}
    out = []
    for item in found:
        feature, parents = item[0], item[2]
        rivals = [by_feature[p] for p in set(parents) if p in by_feature
                  and feature in by_feature[p][2]]
        if any(misfit(rival) < misfit(item) for rival in rivals):
            continue
        out.append(item)
    return out


def _fit_r(y: FloatArray, columns: list[FloatArray]) -> float:
    """Multiple correlation of centred y on centred columns (each scaled to unit norm)."""
    x = np.column_stack(columns)
    norms = np.linalg.norm(x, axis=0)
    x = x / np.where(norms > 0.0, norms, 1.0)
    fitted = x @ np.linalg.lstsq(x, y, rcond=None)[0]
    total = float(np.sum(y**2))
    return math.sqrt(max(0.0, 1.0 - float(np.sum((y - fitted) ** 2)) / total))


def _confirm(sample: FloatArray, centred: FloatArray, means: FloatArray, target: int,
             parents: tuple[int, ...]) -> tuple[float, float, float] | None:
    """(r, intercept, slope) of x_j ~ a + b * x_i x_k, when x_j is that close (|r| >= the
    threshold) AND the centred term u_i u_k explains at least LINEAR_IMPROVEMENT times less
    of x_j's variance remaining than the parents do linearly (offset-free)."""
    y = centred[:, target]
    i, k = parents[0], parents[-1]
    term = _raw_terms(centred, means, i, np.asarray([k], dtype=np.intp))[:, 0]
    term_ss = float(np.sum(term**2))
    y_ss = float(np.sum(y**2))
    if term_ss == 0.0 or y_ss == 0.0:
        return None
    r = max(-1.0, min(1.0, float(np.dot(y, term)) / math.sqrt(term_ss * y_ss)))
    if abs(r) < STRUCTURAL_CORRELATION:
        return None
    linear = [centred[:, p] for p in dict.fromkeys(parents)]
    product = centred[:, i] * centred[:, k]
    product = product - product.mean()
    r_linear = _fit_r(y, linear)
    r_full = _fit_r(y, [*linear, product])
    if 1.0 - r_full > (1.0 - r_linear) / LINEAR_IMPROVEMENT:
        return None
    slope = float(np.dot(y, term)) / term_ss
    mean_term = means[i] * means[k] + float(np.mean(centred[:, i] * centred[:, k]))
    intercept = float(means[target]) - slope * mean_term
    return r, intercept, slope


def _computed(sample: FloatArray, centred: FloatArray, means: FloatArray, target: int,
              parents: tuple[int, ...], intercept: float, slope: float) -> tuple[bool, float]:
    """Whether x_j equals intercept + slope * term to rounding over the sample (a column formed
    from its parents), and the largest residual."""
    i, k = parents[0], parents[-1]
    term = _raw_terms(centred, means, i, np.asarray([k], dtype=np.intp))[:, 0]
    residual = centred[:, target] - slope * term
    residual = residual - residual.mean()
    largest = float(np.max(np.abs(residual)))
    spread = float(np.ptp(sample[:, target]))
    return largest <= COMPUTED_TOLERANCE * spread, largest


def _with_vifs(found: tuple[int, str, tuple[int, ...], float, float, float, int, bool, float],
               d: Diagnostics) -> StructuralTerm:
    feature, kind, parents, r, intercept, slope, rows, computed, largest = found
    # Centring before forming the term is a remedy only for a term formed from its parents.
    centred = centred_vifs(d, feature, parents, slope) if computed else None
    involved = tuple(dict.fromkeys(parents))
    return StructuralTerm(
        feature=feature, kind="square" if kind == "square" else "product", parents=parents,
        correlation=r, intercept=intercept, slope=slope, sample_rows=rows,
        vif=float(d.vif[feature]),
        vif_centred=None if centred is None or d.in_dependency[feature] else centred[feature],
        parent_vif=tuple(float(d.vif[p]) for p in involved),
        parent_vif_centred=tuple(None if centred is None or d.in_dependency[p] else centred[p]
                                 for p in involved),
        computed=computed, max_residual=largest)


def centred_vifs(d: Diagnostics, feature: int, parents: tuple[int, ...], slope: float
                 ) -> dict[int, float] | None:
    """VIFs of the design with the term rebuilt from centred parents (exact, from the Gram).

    New column t = x_j - slope * (m_k x_i + m_i x_k) (square: i = k, so x_j - 2 slope m_i x_i);
    co-moment A' M A with M = diag(s) C diag(s) the main pass's co-moment matrix.
    """
    # the design with one column per exact dependency dropped, as the diagnostics use it
    kept = d.kept
    position = {int(c): k for k, c in enumerate(kept)}
    if feature not in position or any(p not in position for p in parents):
        return None
    scales = d.scales[kept]
    comoment = d.correlation[np.ix_(kept, kept)] * np.outer(scales, scales)
    a = np.eye(kept.size)
    i, k = parents[0], parents[-1]
    a[position[i], position[feature]] -= slope * d.means[k]
    a[position[k], position[feature]] -= slope * d.means[i]
    moved = a.T @ comoment @ a
    norms = np.sqrt(np.diag(moved))
    corr = moved / np.outer(norms, norms)
    r = cholesky_or_none(corr)
    if r is None:
        return None
    vif = squared_row_norms(triangular_inverse(r))
    return {int(c): float(vif[position[int(c)]]) for c in kept}
