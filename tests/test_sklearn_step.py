"""The optional scikit-learn step inside real pipelines with linear models."""

from __future__ import annotations

import pickle

import numpy as np
import pandas as pd
import pytest
from sklearn.base import clone
from sklearn.exceptions import NotFittedError
from sklearn.linear_model import LinearRegression, LogisticRegression
from sklearn.pipeline import Pipeline, make_pipeline

from gate.errors import GateFailed
from gate.policy.models import Policy
from gate.sklearn import CollinearityGate, CollinearityWarning

SEED = 20261202
WARN_ON_PAIRS = Policy.model_validate({"name": "pairs-warn", "limits": {
    "pairwise_correlation": {"max": 0.5, "level": "warn"}, "vif": {"max": 10, "level": "fail"}}})


def station_features(rows: int = 400, *, collinear: bool) -> tuple[pd.DataFrame, np.ndarray]:
    """Invented hourly station rows; with ``collinear`` docks_total = free + in_use (+ tiny noise)."""
    rng = np.random.default_rng(SEED)
    frame = pd.DataFrame({"temp_c": rng.normal(12, 6, rows),
                          "docks_free": rng.normal(10, 3, rows),
                          "docks_in_use": rng.normal(8, 3, rows)})
    if collinear:
        frame["docks_total"] = frame.docks_free + frame.docks_in_use + rng.normal(0, .01, rows)
    rentals = 2 + 0.3 * frame.temp_c + 0.5 * frame.docks_in_use + rng.normal(0, 1, rows)
    return frame, rentals.to_numpy()


def test_failing_features_stop_the_pipeline_fit() -> None:
    features, rentals = station_features(collinear=True)
    model = Pipeline([("gate", CollinearityGate()), ("regression", LinearRegression())])
    with pytest.raises(GateFailed) as caught:
        model.fit(features, rentals)
    assert caught.value.verdict.status == "fail"
    assert "docks_total" in str(caught.value)
    with pytest.raises(NotFittedError):
        model.predict(features)


def test_passing_features_fit_and_predict_like_the_bare_model() -> None:
    features, rentals = station_features(collinear=False)
    gated = make_pipeline(CollinearityGate(), LinearRegression()).fit(features, rentals)
    bare = LinearRegression().fit(features, rentals)
    np.testing.assert_array_equal(gated.predict(features), bare.predict(features))
    step = gated.named_steps["collinearitygate"]
    assert step.verdict_.status == "pass"
    assert list(step.feature_names_in_) == list(features.columns)
    assert list(step.get_feature_names_out()) == list(features.columns)
    assert step.transform(features) is features  # passed through unchanged


def test_warn_mode_fits_the_model_and_warns() -> None:
    features, rentals = station_features(collinear=True)
    model = make_pipeline(CollinearityGate(on_fail="warn"), LinearRegression())
    with pytest.warns(CollinearityWarning, match="collinearity gate failed"):
        model.fit(features, rentals)
    assert model.named_steps["collinearitygate"].verdict_.status == "fail"
    assert model.predict(features).shape == (len(features),)


def test_warn_status_warns_or_is_ignored_with_logistic_regression() -> None:
    features, rentals = station_features(collinear=False)
    features = features.assign(feels_like_c=features.temp_c + np.random.default_rng(1).normal(
        0, 5, len(features)))
    busy = (rentals > np.median(rentals)).astype(int)
    model = make_pipeline(CollinearityGate(policy=WARN_ON_PAIRS),
                          LogisticRegression(max_iter=1000))
    with pytest.warns(CollinearityWarning, match="collinearity gate warns"):
        model.fit(features, busy)
    quiet = make_pipeline(CollinearityGate(policy=WARN_ON_PAIRS, on_warn="ignore"),
                          LogisticRegression(max_iter=1000)).fit(features, busy)
    assert quiet.named_steps["collinearitygate"].verdict_.status == "warn"
    assert quiet.score(features, busy) > 0.5


def test_ndarray_input_gets_positional_names() -> None:
    features, rentals = station_features(collinear=True)
    step = CollinearityGate(on_fail="warn")
    with pytest.warns(CollinearityWarning):
        step.fit(features.to_numpy(), rentals)
    assert step.verdict_.features == ("x0", "x1", "x2", "x3")
    assert step.n_features_in_ == 4
    with pytest.raises(ValueError, match="features"):
        step.transform(features.to_numpy()[:, :3])


def test_scikit_learn_conventions() -> None:
    step = CollinearityGate(policy=WARN_ON_PAIRS, on_fail="warn", label="nightly")
    params = step.get_params()
    assert params == {"policy": WARN_ON_PAIRS, "on_fail": "warn", "on_warn": "warn",
                      "label": "nightly"}
    copy = clone(step)
    assert copy.get_params()["on_fail"] == "warn" and copy is not step
    assert copy.set_params(on_fail="raise").on_fail == "raise"
    with pytest.raises(NotFittedError):
        step.transform(np.zeros((2, 2)))
    features, rentals = station_features(collinear=False)
    fitted = CollinearityGate().fit(features, rentals)
    restored = pickle.loads(pickle.dumps(fitted))
    assert restored.verdict_.status == "pass"
    with pytest.raises(ValueError, match="on_fail"):
        CollinearityGate(on_fail="ignore").fit(features)  # type: ignore[arg-type]
