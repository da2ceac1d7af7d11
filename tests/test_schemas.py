"""JSON Schemas generated from the pydantic models, checked with the jsonschema library, and
the policy commands (`gate policy init/validate/schema`, `gate verdict schema`)."""

from __future__ import annotations

import copy
import datetime as dt
import json
from pathlib import Path
from typing import Any

import jsonschema
import numpy as np
import pandas as pd
import pytest
import yaml
from conftest import make_clean_frame, make_docks_frame, policy_from

from gate.api import check
from gate.artefacts.verdict_json import verdict_json
from gate.judge.document import policy_schema, verdict_schema
from gate.policy.models import packaged_policy_path
from gate.policy.template import STARTER_POLICY

TODAY = dt.date(2026, 12, 1)
VALIDATOR = jsonschema.Draft202012Validator


def _document(frame: pd.DataFrame, policy_text: str | None = None) -> dict[str, Any]:
    policy = policy_from(policy_text) if policy_text else None
    verdict = check(frame, policy, label="schema test", today=TODAY)
    document: dict[str, Any] = json.loads(verdict_json(verdict))
    return document


def _near_pair(rows: int = 300, noise: float = 0.6, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=rows)
    return pd.DataFrame({"load_kw": x, "load_kw_lagged": x + rng.normal(0, noise, rows),
                         "price": rng.normal(size=rows)})


def _weighted() -> pd.DataFrame:
    frame = _near_pair(noise=0.1)
    frame["trips_weight"] = np.random.default_rng(4).uniform(0.5, 3.0, len(frame))
    return frame


WEIGHT_POLICY = """
policy_version: 1
name: weighted
columns: {weight: trips_weight}
"""

WAIVER_POLICY = """
policy_version: 1
name: waivers
waivers:
  - {rule: pairwise_correlation, features: [air_temp_c, felt_temp_c], reason: kept,
     owner: team-a, expires: 2027-01-31}
  - {rule: vif, features: [wind_kmh], reason: nothing to waive, owner: team-b,
     expires: 2027-01-31}
  - {rule: vif, features: [air_temp_c, felt_temp_c], reason: old, owner: team-c,
     expires: 2025-01-31}
"""


def _wide() -> pd.DataFrame:
    rng = np.random.default_rng(8)
    return pd.DataFrame(rng.normal(size=(6, 9)), columns=[f"sensor_{k}" for k in range(9)])


def _with_missing() -> pd.DataFrame:
    frame = make_clean_frame()
    frame.loc[[2, 5, 9], "humidity"] = np.nan
    return frame


def _segmented_with_square() -> pd.DataFrame:
    rng = np.random.default_rng(6)
    temp = rng.normal(20.0, 4.0, 400)
    return pd.DataFrame({"temp_c": temp, "temp_c_sq": temp**2, "wind": rng.normal(size=400),
                         "region": rng.choice(["north", "south", "isle"], 400,
                                              p=[0.5, 0.45, 0.05])})


SEGMENT_POLICY = """
policy_version: 1
name: segmented
segments: {by: [region], min_rows: 30}
"""

CASES = {
    "pass": (make_clean_frame, None, "pass"),
    "warn": (_near_pair, None, "warn"),
    "fail": (lambda: _near_pair(noise=0.1), None, "fail"),
    "rank-deficient and categorical": (make_docks_frame, None, "fail"),
    "weighted": (_weighted, WEIGHT_POLICY, "fail"),
    "waived, stale and expired waivers": (make_docks_frame, WAIVER_POLICY, "fail"),
    "more features than rows": (_wide, None, "fail"),
    "missing values dropped": (_with_missing, None, "pass"),
    "segments and a structural square": (_segmented_with_square, SEGMENT_POLICY, "fail"),
}


@pytest.fixture(scope="module")
def documents() -> dict[str, dict[str, Any]]:
    return {name: _document(make(), text) for name, (make, text, _) in CASES.items()}


def test_schemas_are_valid_json_schema() -> None:
    VALIDATOR.check_schema(verdict_schema())
    VALIDATOR.check_schema(policy_schema())


@pytest.mark.parametrize("name", list(CASES))
def test_suite_verdicts_validate(documents: dict[str, dict[str, Any]], name: str) -> None:
    document = documents[name]
    assert document["status"] == CASES[name][2]
    VALIDATOR(verdict_schema()).validate(document)


def test_cases_cover_what_they_claim(documents: dict[str, dict[str, Any]]) -> None:
    docks = documents["rank-deficient and categorical"]
    assert docks["diagnostics"]["dependencies"] and docks["diagnostics"]["gvif"]
    assert docks["diagnostics"]["condition_number"] is None
    assert documents["weighted"]["table"]["weight"] == "trips_weight"
    states = {w["state"] for w in documents["waived, stale and expired waivers"]["waivers"]}
    assert states == {"active", "stale", "expired"}
    assert documents["missing values dropped"]["table"]["rows_dropped"] == 3
    segmented = documents["segments and a structural square"]
    assert len(segmented["segments"]) == 3
    assert {s["judged"] for s in segmented["segments"]} == {True, False}
    assert segmented["diagnostics"]["structural"][0]["kind"] == "square"


@pytest.mark.parametrize("breakage", [
    lambda d: d.update(status="maybe"),
    lambda d: d["findings"][0].pop("rule"),
    lambda d: d["findings"][0].update(colour="red"),
    lambda d: d["diagnostics"]["pairs"].append({"a": "x", "b": "y", "r": 1.5}),
    lambda d: d["diagnostics"].pop("vif"),
    lambda d: d["table"].update(rows=-1),
    lambda d: d["waivers"][0].update(state="pending"),
])
def test_schema_rejects_broken_verdicts(documents: dict[str, dict[str, Any]],
                                        breakage: Any) -> None:
    document = copy.deepcopy(documents["waived, stale and expired waivers"])
    breakage(document)
    with pytest.raises(jsonschema.ValidationError):
        VALIDATOR(verdict_schema()).validate(document)


def _yaml_as_json(text: str) -> Any:
    # YAML dates become date objects; JSON (what the schema describes) carries them as text
    return json.loads(json.dumps(yaml.safe_load(text), default=str))


@pytest.mark.parametrize("text", [
    packaged_policy_path("default.yaml").read_text(encoding="utf-8"),
    packaged_policy_path("exploratory.yaml").read_text(encoding="utf-8"),
    STARTER_POLICY,
    WAIVER_POLICY,
])
def test_policies_validate_against_policy_schema(text: str) -> None:
    VALIDATOR(policy_schema()).validate(_yaml_as_json(text))


def test_policy_schema_rejects_unknown_keys() -> None:
    with pytest.raises(jsonschema.ValidationError):
        VALIDATOR(policy_schema()).validate({"policy_version": 1, "name": "x", "limts": {}})


def test_schema_commands_print_the_generated_schemas(run_cli: Any) -> None:
    policy = run_cli(["policy", "schema"])
    verdict = run_cli(["verdict", "schema"])
    assert policy.code == verdict.code == 0
    assert json.loads(policy.out) == policy_schema()
    assert json.loads(verdict.out) == verdict_schema()


def test_policy_init_writes_a_valid_policy_and_never_overwrites(tmp_path: Path,
                                                                run_cli: Any) -> None:
    target = tmp_path / "team-policy.yaml"
    first = run_cli(["policy", "init", target])
    assert first.code == 0 and target.read_text(encoding="utf-8") == STARTER_POLICY
    target.write_text("name: edited\n", encoding="utf-8")
    again = run_cli(["policy", "init", target])
    assert again.code == 2 and "already exists" in again.err and len(again.err_lines) == 1
    assert target.read_text(encoding="utf-8") == "name: edited\n"
    valid = run_cli(["policy", "validate", packaged_policy_path("default.yaml")])
    assert valid.code == 0 and "valid policy 'default'" in valid.out


def test_policy_init_default_name(tmp_path: Path, run_cli: Any,
                                  monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    assert run_cli(["policy", "init"]).code == 0
    assert (tmp_path / "gate-policy.yaml").exists()


def test_policy_validate_reports_the_first_problem(tmp_path: Path, run_cli: Any) -> None:
    bad = tmp_path / "bad.yaml"
    bad.write_text("policy_version: 1\nname: x\nlimits:\n  vif: {max: 0.5}\n", encoding="utf-8")
    result = run_cli(["policy", "validate", bad])
    assert result.code == 2 and "limits.vif.max" in result.err and len(result.err_lines) == 1
