"""matrices.npz: the full p x p matrices, written only on request (`--full-matrices`).

verdict.json stays proportional to what breaches (pairs at or above the limit, proportions of
the breaching condition indices); whoever needs the whole picture of a wide table gets it here
in binary: ``numpy.load(path)`` (no pickle) returns

=====================  ==========================================================
``features``           feature names (p,), unicode
``correlation``        Pearson r (p, p); NaN rows/columns for constant features
``inverse_correlation``  inverse of the correlation matrix (p, p); NaN outside the
                       columns kept after exact dependencies
``vif``                VIF (p,); inf inside an exact dependency
``condition_indices``  Belsley-Kuh-Welsch condition indices (k,), ascending
``proportions``        variance-decomposition proportions (k, m): row = index,
                       column = ``proportion_columns``
``proportion_columns`` names of the proportion columns (m,); "(intercept)" first with
                       unit-length scaling
``condition_scaling``  "unit_length" or "standardized" (0-d)
``means``, ``scales``  weighted means and centred column norms (p,)
=====================  ==========================================================
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from gate.artefacts.files import write_atomic
from gate.judge.rules import INTERCEPT_NAME
from gate.judge.verdict import Verdict
from gate.numerics.kernels import INTERCEPT


def matrices(verdict: Verdict) -> dict[str, np.ndarray]:
    """The arrays written to matrices.npz (names as in the module docstring)."""
    d = verdict.diagnostics
    names = verdict.features
    cond = d.condition
    return {
        "features": np.array(names, dtype=str),
        "correlation": d.correlation,
        "inverse_correlation": d.inverse_correlation,
        "vif": d.vif,
        "condition_indices": cond.indices,
        "proportions": cond.all_proportions(),
        "proportion_columns": np.array(
            [INTERCEPT_NAME if c == INTERCEPT else names[c] for c in cond.columns], dtype=str),
        "condition_scaling": np.array(cond.scaling),
        "means": d.means,
        "scales": d.scales,
    }


def write_matrices_npz(verdict: Verdict, path: str | Path) -> Path:
    """Write matrices.npz atomically (temp file in the same folder, then rename)."""
    arrays = matrices(verdict)
    # Uncompressed: correlation matrices of real data barely compress, and zlib on 2 x p^2
    # doubles would cost more than the whole check at p = 5,000.
    return write_atomic(path, lambda handle: np.savez(handle, **arrays))  # type: ignore[arg-type]
