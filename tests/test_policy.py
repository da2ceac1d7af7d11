"""The policy file: strict schema, located error messages, packaged policies.

The meta-tests walk the pydantic models themselves, so a key added later is covered without
editing this file: every field must reject a wrong value with a message naming the file, the
line and the key path, and every mapping must reject an unknown key, listing the allowed ones.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import typing
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import annotated_types
import pytest
import yaml
from pydantic import BaseModel, ValidationError

from gate.errors import PolicyError
from gate.policy import (
    Policy,
    load_policy,
    packaged_policy_path,
    parse_policy,
)

SOURCE = "fleet-policy.yaml"

#: A policy with every section present, so every key has a line.
FULL_POLICY: dict[str, Any] = {
    "policy_version": 1,
    "name": "fleet-maintenance",
    "description": "Invented limits for a fleet-maintenance model.",
    "columns": {"include": ["*"], "exclude": ["vehicle_id"], "categorical": ["depot"],
                "weight": "trip_weight", "target": ["days_to_failure"],
                "reference": {"depot": "west"}, "max_levels": 50},
    "missing": "drop_rows",
    "limits": {
        "pairwise_correlation": {"max": 0.8, "level": "warn", "method": "pearson"},
        "vif": {"max": 5.0, "level": "fail"},
        "condition_number": {"max": 30.0, "level": "warn", "scaling": "unit_length",
                             "proportion": 0.5},
        "rank_deficiency": {"level": "fail", "tolerance": 1e-10},
    },
    "waivers": [{"rule": "vif", "features": ["odometer_km", "engine_hours"],
                 "reason": "both kept on purpose", "owner": "fleet-analytics",
                 "expires": dt.date(2030, 1, 31)}],
    "segments": {"by": ["depot"], "min_rows": 30},
}


def _model_of(annotation: Any) -> type[BaseModel] | None:
    """The pydantic model inside an annotation (Model, list[Model], Model | None)."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return annotation
    for arg in typing.get_args(annotation):
        model = _model_of(arg)
        if model is not None:
            return model
    return None


def _is_list(annotation: Any) -> bool:
    return typing.get_origin(annotation) in (list, tuple)


def walk_fields(model: type[BaseModel] = Policy, path: tuple[Any, ...] = ()
                ) -> Iterator[tuple[tuple[Any, ...], Any]]:
    """(key path, FieldInfo) for every field of every model reachable from Policy."""
    for name, info in model.model_fields.items():
        here = (*path, name)
        yield here, info
        inner = _model_of(info.annotation)
        if inner is not None:
            yield from walk_fields(inner, (*here, 0) if _is_list(info.annotation) else here)


def walk_models(model: type[BaseModel] = Policy, path: tuple[Any, ...] = ()
                ) -> Iterator[tuple[tuple[Any, ...], type[BaseModel]]]:
    yield path, model
    for name, info in model.model_fields.items():
        inner = _model_of(info.annotation)
        if inner is not None:
            yield from walk_models(inner, (name, 0) if _is_list(info.annotation) else
                                   (*path, name))


def bad_values(info: Any) -> list[Any]:
    """Values the field must reject: one of the wrong type, and each constraint's boundary."""
    if _model_of(info.annotation) is not None:
        values: list[Any] = [42]
    elif typing.get_origin(info.annotation) is dict:
        values = [["a", "list"]]
    else:
        values = [{"nested": "mapping"}]
    is_int = info.annotation is int
    if float in (info.annotation, *typing.get_args(info.annotation)):
        values += [float("inf"), float("nan")]  # limits must be finite (issue 10)
    if int in (info.annotation, *typing.get_args(info.annotation)) or float in (
            info.annotation, *typing.get_args(info.annotation)):
        values.append(True)  # a number is never a boolean (issue 9)
    for meta in info.metadata:
        if isinstance(meta, annotated_types.Gt):
            values.append(meta.gt)
        elif isinstance(meta, annotated_types.Ge):
            values.append(meta.ge - (1 if is_int else 1e-6))
        elif isinstance(meta, annotated_types.Lt):
            values.append(meta.lt)
        elif isinstance(meta, annotated_types.Le):
            values.append(meta.le + (1 if is_int else 1e-6))
        elif isinstance(meta, annotated_types.MinLen) and meta.min_length > 0:
            values.append([] if _is_list(info.annotation) else "")
    return values


def set_at(data: dict[str, Any], path: tuple[Any, ...], value: Any) -> dict[str, Any]:
    import copy

    out = copy.deepcopy(data)
    node: Any = out
    for item in path[:-1]:
        node = node[item]
    node[path[-1]] = value
    return out


def dump(data: dict[str, Any]) -> str:
    return yaml.safe_dump(data, sort_keys=False, default_flow_style=False)


def expected_line(text: str, path: tuple[Any, ...]) -> int:
    """1-based line of the key at ``path`` in block-style YAML, found by indentation alone."""
    lines = text.splitlines()
    start, indent, found = 0, 0, None
    for item in path:
        if isinstance(item, int):
            # Block sequences sit at the parent key's indent (PyYAML) or two deeper.
            dash = next(len(lines[i]) - len(lines[i].lstrip()) for i in range(start + 1,
                                                                               len(lines)))
            items = [i for i in range(start, len(lines)) if lines[i].startswith(" " * dash + "- ")]
            start = items[item]
            found = start + 1
            indent = dash + 2
            continue
        for i in range(start, len(lines)):
            normalised = lines[i].replace("- ", "  ", 1) if lines[i].lstrip().startswith(
                "- ") else lines[i]
            if normalised.startswith(" " * indent + f"{item}:"):
                start, found = i, i + 1
                break
        else:
            raise AssertionError(f"{item} not found in\n{text}")
        indent += 2
    assert found is not None
    return found


def key_path(path: tuple[Any, ...]) -> str:
    return "".join(f"[{p}]" if isinstance(p, int) else ("." if i else "") + p
                   for i, p in enumerate(path))


def test_full_policy_is_valid() -> None:
    policy = parse_policy(dump(FULL_POLICY), source=SOURCE)
    assert policy.limits.vif.max == 5.0
    assert policy.waivers[0].expires == dt.date(2030, 1, 31)


def test_every_field_is_covered_by_the_full_policy() -> None:
    # Keeps the meta-tests honest: a new key must get a value in FULL_POLICY.
    for path, _ in walk_fields():
        node: Any = FULL_POLICY
        for item in path:
            assert (isinstance(item, int) and item < len(node)) or item in node, \
                f"add {key_path(path)} to FULL_POLICY in tests/test_policy.py"
            node = node[item]


FIELD_CASES = [
    pytest.param(path, value, id=f"{key_path(path)}={value!r}")
    for path, info in walk_fields() for value in bad_values(info)
]


@pytest.mark.parametrize(("path", "value"), FIELD_CASES)
def test_every_field_rejects_a_bad_value_with_file_line_and_key(path: tuple[Any, ...],
                                                                value: Any) -> None:
    text = dump(set_at(FULL_POLICY, path, value))
    with pytest.raises(PolicyError) as caught:
        parse_policy(text, source=SOURCE)
    message = str(caught.value)
    assert "\n" not in message
    assert message.startswith(f"{SOURCE}: line {expected_line(text, path)}: {key_path(path)}: "
                              ), message


MODEL_CASES = [pytest.param(path, model, id=key_path(path) or "(top level)")
               for path, model in walk_models()]


@pytest.mark.parametrize(("path", "model"), MODEL_CASES)
def test_unknown_keys_are_rejected_listing_the_allowed_ones(path: tuple[Any, ...],
                                                            model: type[BaseModel]) -> None:
    data = set_at(FULL_POLICY, (*path, "colour"), "red") if path else {**FULL_POLICY,
                                                                        "colour": "red"}
    text = dump(data)
    with pytest.raises(PolicyError) as caught:
        parse_policy(text, source=SOURCE)
    message = str(caught.value)
    full = (*path, "colour")
    assert message.startswith(f"{SOURCE}: line {expected_line(text, full)}: {key_path(full)}: "
                              "unknown key"), message
    for allowed in model.model_fields:
        assert allowed in message


@pytest.mark.parametrize(("text", "line"), [
    ("policy_version: 1\nname: [fleet\n", 3),
    ("policy_version: 1\nname: fleet\nlimits:\n  vif: {max: 5\n  level: fail\n", 5),
    ("policy_version: 1\n\tname: fleet\n", 2),
])
def test_invalid_yaml_gives_the_line(text: str, line: int) -> None:
    with pytest.raises(PolicyError) as caught:
        parse_policy(text, source=SOURCE)
    message = str(caught.value)
    assert message.startswith(f"{SOURCE}: line ")
    reported = int(message.split("line ")[1].split(":")[0])
    # YAML reports where it noticed the problem: the offending line or the next one.
    assert reported in (line - 1, line, line + 1), message
    assert "YAML" in message


def test_yaml_is_loaded_safely() -> None:
    # yaml.safe_load: python object tags are refused, not executed.
    text = "policy_version: 1\nname: !!python/object/apply:os.getcwd []\n"
    with pytest.raises(PolicyError):
        parse_policy(text, source=SOURCE)


@pytest.mark.parametrize("key", ["reason", "owner", "expires", "rule", "features"])
def test_waivers_need_every_key(key: str) -> None:
    waiver = {k: v for k, v in FULL_POLICY["waivers"][0].items() if k != key}
    text = dump({**FULL_POLICY, "waivers": [waiver]})
    with pytest.raises(PolicyError) as caught:
        parse_policy(text, source=SOURCE)
    message = str(caught.value)
    assert f"waivers[0].{key}" in message and "missing" in message


@pytest.mark.parametrize("key", ["reason", "owner"])
def test_waiver_reason_and_owner_must_not_be_blank(key: str) -> None:
    waiver = {**FULL_POLICY["waivers"][0], key: "   "}
    with pytest.raises(PolicyError) as caught:
        parse_policy(dump({**FULL_POLICY, "waivers": [waiver]}), source=SOURCE)
    assert f"waivers[0].{key}" in str(caught.value)


def test_waiver_rule_must_be_a_known_rule() -> None:
    waiver = {**FULL_POLICY["waivers"][0], "rule": "vifs"}
    with pytest.raises(PolicyError) as caught:
        parse_policy(dump({**FULL_POLICY, "waivers": [waiver]}), source=SOURCE)
    message = str(caught.value)
    assert "waivers[0].rule" in message and "pairwise_correlation" in message


def test_a_policy_must_be_a_mapping() -> None:
    for text in ("", "- a\n- b\n", "just text\n"):
        with pytest.raises(PolicyError) as caught:
            parse_policy(text, source=SOURCE)
        assert str(caught.value).startswith(SOURCE)


def test_minimal_policy_gets_the_documented_defaults() -> None:
    policy = parse_policy("policy_version: 1\nname: fleet\n")
    limits = policy.limits
    assert (limits.pairwise_correlation.max, limits.pairwise_correlation.level) == (0.8, "warn")
    assert (limits.vif.max, limits.vif.level) == (5.0, "fail")
    assert (limits.condition_number.max, limits.condition_number.level) == (30.0, "warn")
    assert limits.condition_number.scaling == "unit_length"
    assert limits.rank_deficiency.level == "fail"
    assert limits.rank_deficiency.tolerance is None
    assert policy.missing == "drop_rows"
    assert policy.columns.include == ("*",)
    assert policy.columns.target == () and policy.columns.reference == {}
    assert policy.columns.max_levels == 50


def test_models_are_frozen() -> None:
    policy = parse_policy("policy_version: 1\nname: fleet\n")
    with pytest.raises(ValidationError):
        policy.limits.vif.max = 50.0  # type: ignore[misc]


# --- files --------------------------------------------------------------------------------------

def test_sha256_is_of_the_file_bytes(tmp_path: Path) -> None:
    path = tmp_path / "p.yaml"
    path.write_bytes(b"# comments count too\npolicy_version: 1\nname: fleet\n")
    policy = load_policy(path)
    assert policy.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert policy.source == str(path)


def test_policy_built_in_code_has_a_stable_hash() -> None:
    a = Policy.model_validate({"name": "fleet"})
    b = Policy.model_validate({"name": "fleet"})
    c = Policy.model_validate({"name": "fleet", "limits": {"vif": {"max": 10}}})
    assert a.sha256 == b.sha256 != c.sha256
    assert a.source is None


def test_missing_policy_file(tmp_path: Path) -> None:
    with pytest.raises(PolicyError) as caught:
        load_policy(tmp_path / "absent.yaml")
    assert "absent.yaml" in str(caught.value) and "not found" in str(caught.value)


def test_packaged_default_policy_matches_the_issue() -> None:
    # issue 2: |r| 0.8 warn, VIF 5 fail, condition number 30 warn, rank deficiency fail.
    policy = load_policy(None)
    limits = policy.limits
    assert (limits.pairwise_correlation.max, limits.pairwise_correlation.level) == (0.8, "warn")
    assert (limits.vif.max, limits.vif.level) == (5.0, "fail")
    assert (limits.condition_number.max, limits.condition_number.level) == (30.0, "warn")
    assert limits.rank_deficiency.level == "fail"
    assert policy.source == str(packaged_policy_path())
    text = packaged_policy_path().read_text()
    assert "Belsley" in text and "common practice" in text  # thresholds name their source


def test_packaged_exploratory_policy_matches_the_issue() -> None:
    policy = load_policy(packaged_policy_path("exploratory.yaml"))
    assert policy.limits.vif.max == 10.0
    text = packaged_policy_path("exploratory.yaml").read_text()
    assert "Marquardt" in text


def test_every_shipped_policy_file_is_valid() -> None:
    root = Path(__file__).resolve().parents[1]
    files = sorted((root / "policies").glob("*.yaml")) + sorted(
        p for p in (root / "examples").glob("*.yaml")
        if "policy_version:" in p.read_text(encoding="utf-8"))  # not other tools' configs
    assert len(files) >= 3
    for path in files:
        assert isinstance(load_policy(path), Policy)


def test_meta_test_helpers_see_every_model() -> None:
    # Guard for the meta-test helpers: they must see every model.
    models = {model.__name__ for _, model in walk_models()}
    assert {"Policy", "ColumnSelection", "Limits", "VifLimit", "CorrelationLimit",
            "ConditionLimit", "RankLimit", "Waiver"} <= models


def test_bare_yaml_off_means_level_off() -> None:
    # YAML 1.1 (PyYAML) reads a bare `off` as False; interface.md documents `level: off`.
    from gate.policy import parse_policy

    policy = parse_policy("policy_version: 1\nname: x\nlimits:\n  vif: {max: 5, level: off}\n")
    assert policy.limits.vif.level == "off"
