"""An optional scikit-learn step: run the gate when a pipeline is fitted.

Install with ``pip install "collinearity-gate[sklearn]"``. The step is a transformer that checks
the training features on ``fit`` and passes data through unchanged in ``transform``::

    from sklearn.linear_model import LinearRegression
    from sklearn.pipeline import make_pipeline
    from gate.sklearn import CollinearityGate

    model = make_pipeline(CollinearityGate(policy="policy.yaml"), LinearRegression())
    model.fit(features, rentals)   # raises gate.GateFailed when the policy fails

``on_fail="warn"`` turns a failing verdict into a :class:`CollinearityWarning` instead (the
model is still fitted); ``on_warn`` does the same for a verdict whose status is warn. The verdict
is kept as ``verdict_``.
"""

from __future__ import annotations

import warnings
from pathlib import Path
from typing import Any, Literal

import numpy as np
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.utils.validation import _check_feature_names_in, check_is_fitted, validate_data

from gate.api import check
from gate.errors import GateFailed
from gate.judge.findings import unwaived
from gate.judge.verdict import Verdict
from gate.policy.models import Policy


class CollinearityWarning(UserWarning):
    """The gate judged the training features as failing (with on_fail="warn") or warning."""


class CollinearityGate(TransformerMixin, BaseEstimator):  # type: ignore[misc]
    """Check the training features for multicollinearity on fit; pass them through unchanged.

    Parameters
    ----------
    policy : a :class:`gate.Policy`, a path to a policy YAML file, or None (packaged default)
    on_fail : "raise" (raise :class:`gate.GateFailed`, carrying the verdict) or "warn"
    on_warn : "warn" (a :class:`CollinearityWarning` when the status is warn) or "ignore"
    label : free text carried into the verdict

    Attributes
    ----------
    verdict_ : the :class:`gate.Verdict` of the last fit
    n_features_in_, feature_names_in_ : as scikit-learn sets them
    """

    def __init__(self, policy: Policy | str | Path | None = None, *,
                 on_fail: Literal["raise", "warn"] = "raise",
                 on_warn: Literal["warn", "ignore"] = "warn", label: str | None = None) -> None:
        self.policy = policy
        self.on_fail = on_fail
        self.on_warn = on_warn
        self.label = label

    def fit(self, X: Any, y: Any = None) -> CollinearityGate:
        if self.on_fail not in ("raise", "warn"):
            raise ValueError(f"on_fail must be 'raise' or 'warn', got {self.on_fail!r}")
        if self.on_warn not in ("warn", "ignore"):
            raise ValueError(f"on_warn must be 'warn' or 'ignore', got {self.on_warn!r}")
        validate_data(self, X, reset=True, skip_check_array=True)
        verdict = check(self._frame(X), self.policy, label=self.label)
        self.verdict_: Verdict = verdict
        if verdict.status == "fail":
            try:
                verdict.raise_for_status()
            except GateFailed as failure:
                if self.on_fail == "raise":
                    raise
                warnings.warn(CollinearityWarning(str(failure)), stacklevel=2)
        elif verdict.status == "warn" and self.on_warn == "warn":
            messages = [f.message for f in unwaived(verdict.findings, "warn")]
            warnings.warn(CollinearityWarning(
                f"collinearity gate warns: {'; '.join(messages[:3])}"), stacklevel=2)
        return self

    def transform(self, X: Any) -> Any:
        """Return ``X`` itself (the gate never changes the data)."""
        check_is_fitted(self, "verdict_")
        validate_data(self, X, reset=False, skip_check_array=True)
        return X

    def get_feature_names_out(self, input_features: Any = None) -> np.ndarray:
        check_is_fitted(self, "verdict_")
        return np.asarray(_check_feature_names_in(self, input_features), dtype=object)

    def _frame(self, X: Any) -> Any:
        import pandas as pd

        if isinstance(X, pd.DataFrame):
            return X.rename(columns=str)
        values = np.asarray(X)
        if values.ndim != 2:
            raise ValueError(f"expected a 2-D array of features, got shape {values.shape}")
        names = getattr(self, "feature_names_in_", None)
        columns = [str(n) for n in names] if names is not None else \
            [f"x{k}" for k in range(values.shape[1])]
        return pd.DataFrame(values, columns=columns)

    def __sklearn_tags__(self) -> Any:
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True  # missing values follow the policy's `missing` rule
        tags.requires_fit = True
        return tags
