"""Auxiliary regressions: each feature written in its own units as a linear function of the
other features, the near dependency a VIF measures, computed from the main pass's statistics
(inverse correlation, means, scales) with no second pass (numerics.md, Round 2).

A feature inside an exact dependency has none (its relation is the dependency itself). For every
other feature the regressors are the kept columns (one column per exact dependency dropped):
they span the same space as all the other features, so R^2, the fitted values and the residual
are those of the regression on all the others.

Text rule (stated once, used by the terminal, the findings and the README): a term is shown when
its standardised coefficient |b_k| = |beta_k| s_k / s_j is at least ``SHOWN_TERM`` (0.05; common
practice, no source): below it, moving x_k by one standard deviation moves the fitted feature by
less than 5% of the feature's own standard deviation. Left-out terms are held at their means
(folded into the constant), so the shown equation passes through the means as the fit does.
verdict.json lists the same terms and constant (so it grows with the breaching features, not
with p^2) and how many were left out; R^2 and the residual are those of the full fit.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from gate.diagnose.diagnostics import Diagnostics
from gate.numerics.kernels import FloatArray, IntArray, auxiliary_regression

#: Smallest |standardised coefficient| a term needs to be shown in text (common practice,
#: no source).
SHOWN_TERM = 0.05


@dataclass(frozen=True, eq=False)
class Auxiliary:
    """``feature = intercept + sum(slope_k * x_k) + residual`` over the ``regressors``."""

    feature: int
    regressors: IntArray  # design columns, design order
    slopes: FloatArray  # in the features' own units, one per regressor
    standardised: FloatArray  # b_k = slope_k s_k / s_j
    intercept: float  # of the full fit
    r2: float
    residual_sd: float  # sqrt(weighted residual sum of squares / (n - regressors - 1))
    means: FloatArray  # of the regressors, to hold left-out terms at their means

    def shown_terms(self) -> list[tuple[int, float, float]]:
        """(column, slope, standardised) with |standardised| >= SHOWN_TERM, largest first."""
        size = np.abs(self.standardised)
        picked = np.flatnonzero(size >= SHOWN_TERM)
        picked = picked[np.argsort(-size[picked], kind="stable")]
        return [(int(self.regressors[k]), float(self.slopes[k]), float(self.standardised[k]))
                for k in picked]

    def shown_intercept(self) -> float:
        """The constant of the shown equation: the full fit's intercept plus each left-out
        term at its mean, so the shown equation, like the fit, passes through the means (a
        left-out epoch-seconds term would otherwise leave a huge constant behind)."""
        hidden = np.abs(self.standardised) < SHOWN_TERM
        return float(self.intercept + self.slopes[hidden] @ self.means[hidden])

    def omitted(self) -> int:
        """How many regressors the text leaves out by the SHOWN_TERM rule."""
        return int(np.count_nonzero(np.abs(self.standardised) < SHOWN_TERM))

    @np.errstate(over="ignore", invalid="ignore")  # columns ~2^1000 apart: slopes beyond range
    def equation(self, names: tuple[str, ...]) -> str:
        """``y ≈ 1.00·a + 0.980·b + 0.310 (R² 0.99999, residual sd 0.004)``."""
        parts: list[str] = []
        for column, slope, _ in self.shown_terms():
            parts.append(f"{'-' if slope < 0 else '+'} {number(abs(slope))}·{names[column]}")
        constant = self.shown_intercept()
        scale = max(abs(constant), float(np.max(np.abs(self.slopes))) if self.slopes.size else 0.0)
        if constant != 0.0 and abs(constant) > 1e-12 * scale:
            parts.append(f"{'-' if constant < 0 else '+'} {number(abs(constant))}")
        text = " ".join(parts) or "a constant"
        text = text[2:] if text.startswith("+ ") else "-" + text[2:] if text[0] == "-" else text
        omitted = self.omitted()
        extra = (f"; {omitted} term{'s' if omitted != 1 else ''} with |standardised "
                 f"coefficient| < {SHOWN_TERM:g} left out") if omitted else ""
        return (f"{names[self.feature]} ≈ {text} (R² {r2_text(self.r2)}, residual sd "
                f"{number(self.residual_sd)}{extra})")


def number(value: float) -> str:
    """Three significant digits, trailing zeros kept (1.00, 0.980, 1.23e+04); ∞ for infinity."""
    if math.isinf(value):
        return "∞" if value > 0 else "-∞"
    return f"{value:#.3g}".rstrip(".") if value != 0 else "0"


def r2_text(r2: float) -> str:
    """Enough decimals that an R² close to 1 does not read as 1 (1 - R² = 1 / VIF)."""
    if r2 >= 1.0:
        return "1"
    gap = 1.0 - r2
    decimals = max(4, min(15, math.floor(-math.log10(gap)) + 2)) if gap > 0 else 15
    return f"{r2:.{decimals}f}"


@np.errstate(over="ignore", invalid="ignore")  # columns ~2^1000 apart: slopes beyond range
def auxiliary_for(d: Diagnostics, feature: int) -> Auxiliary | None:
    """The auxiliary regression of ``feature``; None inside an exact dependency, for a constant,
    or when no other column is left to regress on."""
    if d.in_dependency[feature] or not np.isfinite(d.vif[feature]):
        return None
    kept = d.kept
    if feature not in kept or kept.size < 2:
        return None
    position = int(np.searchsorted(kept, feature))
    slopes, standardised, intercept, r2, root_ssr = auxiliary_regression(
        d.inverse_correlation[feature, kept], position, d.means[kept], d.scales[kept])
    others = np.delete(np.arange(kept.size), position)
    df = d.rows - others.size - 1
    residual_sd = root_ssr / math.sqrt(df) if df > 0 else math.nan
    return Auxiliary(feature, kept[others], slopes[others], standardised[others], intercept,
                     float(r2), residual_sd, d.means[kept[others]])
