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
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
import scipy.linalg as sla

from gate.design.plan import Design, DesignPlan, encode_block
from gate.diagnose.diagnostics import Diagnostics
from gate.numerics.kernels import FloatArray
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

    def describe(self, names: tuple[str, ...]) -> str:
        j = names[self.feature]
        parents = [names[k] for k in self.parents]
        what = (f"the square of {parents[0]}" if self.kind == "square"
                else f"the product of {parents[0]} and {parents[1]}")
        verb = "squaring" if self.kind == "square" else "multiplying"
        if self.vif_centred is None:
            return (f"{j} is (close to) {what} (r = {self.correlation:.5f} on the first "
                    f"{self.sample_rows:,} rows): structural collinearity. The VIF after "
                    f"centring cannot be shown while {' or '.join(parents)} or {j} sits in an "
                    "exact dependency; resolve that first")
        centred = f"{self.vif_centred:.3g}"
        parent_part = "; ".join(
            f"{p} {v:.3g} -> {'n/a' if c is None else f'{c:.3g}'}"
            for p, v, c in zip(parents, self.parent_vif, self.parent_vif_centred))
        return (f"{j} is (close to) {what} (r = {self.correlation:.5f} on the first "
                f"{self.sample_rows:,} rows): structural collinearity. Centring "
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


def detect_terms(sample: FloatArray, targets: list[int], parents: np.ndarray
                 ) -> list[tuple[int, str, tuple[int, ...], float, float, float, int]]:
    """(feature, kind, parents, r, intercept, slope, rows) per target with a square/product."""
    screen = sample[:SCREEN_ROWS]
    z_screen, ok_screen = _standardise(screen[:, targets])
    best: dict[int, tuple[float, str, tuple[int, ...]]] = {}
    threshold = STRUCTURAL_CORRELATION - 0.01  # screening is on fewer rows: be lenient
    plist = [int(i) for i in parents]
    for a, i in enumerate(plist):
        others = np.asarray(plist[a:], dtype=np.intp)
        terms = screen[:, [i]] * screen[:, others]
        z_terms, ok_terms = _standardise(terms)
        corr = np.abs(z_terms.T @ z_screen)  # [term, target]
        corr[~ok_terms] = 0.0
        corr[:, ~ok_screen] = 0.0
        for k_pos, t_pos in zip(*np.nonzero(corr >= threshold)):
            target = targets[int(t_pos)]
            k = int(others[int(k_pos)])
            if target in (i, k):
                continue
            value = float(corr[k_pos, t_pos])
            if value > best.get(target, (0.0, "", ()))[0]:
                best[target] = (value, "square" if k == i else "product",
                                (i,) if k == i else (i, k))
    out = []
    for target, (_, kind, pars) in sorted(best.items()):
        confirmed = _confirm(sample, target, pars)
        if confirmed is not None:
            r, intercept, slope = confirmed
            out.append((target, kind, pars, r, intercept, slope, sample.shape[0]))
    return out


def _confirm(sample: FloatArray, target: int, parents: tuple[int, ...]
             ) -> tuple[float, float, float] | None:
    y = sample[:, target]
    term = sample[:, parents[0]] * sample[:, parents[-1]]
    if np.std(term) == 0.0 or np.std(y) == 0.0:
        return None
    r = float(np.corrcoef(y, term)[0, 1])
    if abs(r) < STRUCTURAL_CORRELATION:
        return None
    linear = np.column_stack([np.ones_like(y)] + [sample[:, p] for p in set(parents)])
    fitted = linear @ np.linalg.lstsq(linear, y, rcond=None)[0]
    r_linear = math.sqrt(max(0.0, 1.0 - float(np.sum((y - fitted) ** 2))
                             / float(np.sum((y - y.mean()) ** 2))))
    if 1.0 - abs(r) > (1.0 - r_linear) / LINEAR_IMPROVEMENT:
        return None
    slope, intercept = np.polyfit(term, y, 1)
    return r, float(intercept), float(slope)


def _with_vifs(found: tuple[int, str, tuple[int, ...], float, float, float, int],
               d: Diagnostics) -> StructuralTerm:
    feature, kind, parents, r, intercept, slope, rows = found
    centred = centred_vifs(d, feature, parents, slope)
    involved = tuple(dict.fromkeys(parents))
    return StructuralTerm(
        feature=feature, kind="square" if kind == "square" else "product", parents=parents,
        correlation=r, intercept=intercept, slope=slope, sample_rows=rows,
        vif=float(d.vif[feature]),
        vif_centred=None if centred is None or d.in_dependency[feature] else centred[feature],
        parent_vif=tuple(float(d.vif[p]) for p in involved),
        parent_vif_centred=tuple(None if centred is None or d.in_dependency[p] else centred[p]
                                 for p in involved))


def centred_vifs(d: Diagnostics, feature: int, parents: tuple[int, ...], slope: float
                 ) -> dict[int, float] | None:
    """VIFs of the design with the term rebuilt from centred parents (exact, from the Gram).

    New column t = x_j - slope * (m_k x_i + m_i x_k) (square: i = k, so x_j - 2 slope m_i x_i);
    co-moment A' M A with M = diag(s) C diag(s) the main pass's co-moment matrix.
    """
    # the design with one column per exact dependency dropped, as the diagnostics use it
    kept = np.flatnonzero(np.isfinite(np.diag(d.inverse_correlation)))
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
    try:
        r = sla.cholesky(corr, lower=False, check_finite=False)
    except np.linalg.LinAlgError:
        return None
    inverse = sla.solve_triangular(r, np.eye(kept.size), check_finite=False)
    vif = np.einsum("ij,ij->i", inverse, inverse)
    return {int(c): float(vif[position[int(c)]]) for c in kept}
