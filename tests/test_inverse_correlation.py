"""The inverse correlation matrix is formed only when read (``Diagnostics.inverse_correlation``,
from the rows of inv(R) kept in design order); what it holds must not depend on that.

Reference: numpy's ``linalg.inv`` of the correlation matrix of the kept columns, on
scikit-learn's bundled diabetes data (442 x 10) with two exactly dependent columns added (a
copy of ``bmi`` scaled by 2, and ``s1 - s2``), so one column per dependency is dropped and the
kept columns are a proper subset.
"""

from __future__ import annotations

import numpy as np
from sklearn.datasets import load_diabetes

import gate


def test_inverse_correlation_over_the_kept_columns_matches_numpy() -> None:
    data = load_diabetes(as_frame=True).data
    frame = data.assign(bmi_twice=2.0 * data["bmi"], s1_minus_s2=data["s1"] - data["s2"])
    d = gate.check(frame).diagnostics
    names = list(frame.columns)
    kept = d.kept
    assert list(kept) == sorted(kept) and kept.size == len(names) - 2
    dropped = sorted(set(range(len(names))) - set(kept.tolist()))
    assert {names[k] for k in dropped} <= {"bmi", "bmi_twice", "s1", "s2", "s1_minus_s2"}
    expected = np.linalg.inv(np.corrcoef(frame.to_numpy()[:, kept], rowvar=False))
    inverse = d.inverse_correlation
    np.testing.assert_allclose(inverse[np.ix_(kept, kept)], expected, rtol=1e-9, atol=1e-9)
    assert np.isnan(inverse[dropped]).all() and np.isnan(inverse[:, dropped]).all()
    free = kept[np.isfinite(d.vif[kept])]  # columns outside every dependency: VIF = [P]_jj
    assert free.size == len(names) - 5
    np.testing.assert_allclose(np.diag(inverse)[free], d.vif[free], rtol=1e-12)
    assert d.inverse_correlation is inverse  # formed once
