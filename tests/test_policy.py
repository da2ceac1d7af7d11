"""The policy file: strict schema, located error messages, packaged policies.

The meta-tests walk the pydantic models themselves, so a key added later is covered without
editing this file: every field must reject a wrong value with a message naming the file, the
line and the key path, and every mapping must reject an unknown key, listing the allowed ones.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import time
import typing
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import annotated_types
import pytest
import yaml
from pydantic import BaseModel, ValidationError

from gate.errors import PolicyError, shown
from gate.policy.models import (
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
    from gate.policy.models import parse_policy

    policy = parse_policy("policy_version: 1\nname: x\nlimits:\n  vif: {max: 5, level: off}\n")
    assert policy.limits.vif.level == "off"


# --- the YAML reader (issue 9 item 7, issue 10 items 4-5) ---------------------------------------

MINIMAL = "policy_version: 1\nname: fleet\n"


def refused(text: str | bytes) -> str:
    with pytest.raises(PolicyError) as caught:
        parse_policy(text, source=SOURCE)
    message = str(caught.value)
    assert "\n" not in message and message.startswith(SOURCE), message
    return message


def test_duplicate_keys_are_refused_naming_both_lines() -> None:
    text = MINIMAL + "limits:\n  vif: {max: 5}\n  vif: {max: 50}\n"
    assert refused(text) == (f"{SOURCE}: line 5: limits.vif: duplicate key (first given on "
                             "line 4); keep one of the two")
    assert "line 3: name: duplicate key (first given on line 2)" in refused(
        MINIMAL + "name: other\n")
    assert "duplicate key" in refused(MINIMAL + "limits:\n  vif: {max: 5, max: 50}\n")
    assert "waivers[0].owner: duplicate key" in refused(
        MINIMAL + "waivers:\n  - {rule: vif, features: [a], reason: r, owner: a, owner: b, "
        "expires: 2030-01-01}\n")


@pytest.mark.parametrize(("value", "word"), [("1:30", "1:30"), ("0b101", "0b101"),
                                             ("-1:30:00", "-1:30:00")])
def test_yaml11_numbers_are_not_numbers(value: str, word: str) -> None:
    # YAML 1.1 reads 1:30 as 90 (base 60); YAML 1.2 core reads it as text, and the message says.
    message = refused(MINIMAL + f"limits:\n  vif: {{max: {value}}}\n")
    assert message.startswith(f"{SOURCE}: line 4: limits.vif.max: ")
    assert f"YAML 1.2, where {word} is text" in message and "plain decimal" in message


@pytest.mark.parametrize("word", ["no", "yes", "on", "No", "OFF", "y"])
def test_yaml11_boolean_words_are_not_levels(word: str) -> None:
    message = refused(MINIMAL + f"limits:\n  vif: {{level: {word}}}\n")
    assert f"limits.vif.level: input should be 'fail', 'warn' or 'off', got '{word}'" in message
    assert "YAML 1.2" in message


def test_yaml12_scalars() -> None:
    policy = parse_policy(MINIMAL + "description: no\nsegments: {by: [on], min_rows: 010}\n"
                          "limits:\n  vif: {max: 0x10}\n  condition_number: {max: 1e2}\n")
    assert policy.description == "no" and policy.segments is not None
    assert policy.segments.by == ("on",)
    assert policy.segments.min_rows == 10  # YAML 1.2: decimal, not the YAML 1.1 octal 8
    assert policy.limits.vif.max == 16.0 and policy.limits.condition_number.max == 100.0


@pytest.mark.parametrize("text", ["policy_version: true\nname: fleet\n",
                                  MINIMAL + "limits:\n  vif: {max: true}\n",
                                  MINIMAL + "segments: {by: [a], min_rows: false}\n"])
def test_numbers_are_never_booleans(text: str) -> None:
    assert "input should be a number, not true or false" in refused(text)


@pytest.mark.parametrize("value", [".inf", "-.inf", ".nan", ".NaN", "1e400"])
def test_non_finite_limits_are_refused(value: str) -> None:
    message = refused(MINIMAL + f"limits:\n  vif: {{max: {value}}}\n")
    assert message.startswith(f"{SOURCE}: line 4: limits.vif.max: input should be a finite "
                              "number"), message


@pytest.mark.parametrize(("date", "why"), [("2027-13-45", "month value is outside"),
                                           ("0000-01-01", "year 0 is out of range"),
                                           ("2027-02-30", "day value is outside")])
def test_impossible_waiver_dates_are_located(date: str, why: str) -> None:
    text = MINIMAL + ("waivers:\n  - rule: vif\n    features: [a]\n    reason: r\n"
                      f"    owner: o\n    expires: {date}\n")
    message = refused(text)
    assert message.startswith(f"{SOURCE}: line 8: waivers[0].expires: ") and why in message
    assert f"'{date}'" in message


def test_huge_integers_are_refused() -> None:
    message = refused(MINIMAL + "segments: {by: [a], min_rows: " + "9" * 5000 + "}\n")
    assert message == (f"{SOURCE}: line 3: an integer of 5,000 digits is refused (at most 30); "
                       "no policy key needs more")


def test_aliases_and_merge_keys_are_refused() -> None:
    assert refused(MINIMAL + "columns:\n  include: &all ['*']\n  exclude: *all\n") == (
        f"{SOURCE}: line 5: aliases (*name) are not allowed in a policy; write the value out")
    assert "limits.vif.<<: unknown key" in refused(MINIMAL + "limits:\n  vif:\n    <<: {max: 5}\n")


def test_alias_bomb_is_refused_at_once() -> None:
    # issue 10: a few hundred bytes of nested aliases expanded for minutes into a 2 GB message.
    lines = ["a0: &a0 [x, x, x, x, x, x, x, x, x]"]
    lines += [f"a{k}: &a{k} [" + ", ".join([f"*a{k - 1}"] * 9) + "]" for k in range(1, 10)]
    text = "\n".join(lines) + "\npolicy_version: 1\nname: *a9\n"
    assert len(text.encode()) < 600
    started = time.perf_counter()
    message = refused(text)
    assert time.perf_counter() - started < 1.0
    assert "aliases" in message and len(message) < 300


@pytest.mark.parametrize("depth", [33, 5000])
def test_deep_nesting_is_refused_without_recursion_error(depth: int) -> None:
    message = refused(MINIMAL + "description: " + "[" * depth + "]" * depth + "\n")
    assert "nested deeper than 32 levels" in message


def test_oversized_policy_is_refused(tmp_path: Path) -> None:
    big = MINIMAL + "# padding\n" * 120_000
    assert "larger than 1,048,576 bytes" in refused(big)
    path = tmp_path / "big.yaml"
    path.write_text(big)
    with pytest.raises(PolicyError, match="larger than"):
        load_policy(path)


def test_policy_must_be_a_regular_file(tmp_path: Path) -> None:
    fifo = tmp_path / "policy.fifo"
    os.mkfifo(fifo)  # nothing writes to it: reading it would hang
    with pytest.raises(PolicyError, match="not a regular file"):
        load_policy(fifo)
    with pytest.raises(PolicyError, match="is a folder"):
        load_policy(tmp_path)


def test_echoed_values_are_capped_and_escaped() -> None:
    name = "fake\ngate: PASS all good\x1b[2J\u202e"
    message = refused(MINIMAL + f"limits:\n  vif: {{max: {json.dumps(name * 50)}}}\n")
    assert "\n" not in message and "\x1b" not in message and "\u202e" not in message
    assert "fake\\ngate: PASS all good\\x1b[2J\\u202e" in message
    got = message.split("got ", 1)[1]
    assert got.startswith("'") and got.endswith("…'") and len(got) == 202


def test_shown_is_the_one_capping_and_escaping_rule() -> None:
    assert shown("plain") == "plain" and shown("x" * 200) == "x" * 200
    assert shown("x" * 201) == "x" * 199 + "…"
    assert shown("a\tb\r\n\x00\x7f\u2028") == "a\\tb\\r\\n\\x00\\x7f\\u2028"
    assert shown("ab", quote=True) == "'ab'" and shown(3.5) == "3.5"
    assert len(shown(list(range(10**6)))) <= 200
    assert shown("\n" * 300, None) == "\\n" * 300


def test_bad_keys_in_unknown_key_messages_are_escaped() -> None:
    message = refused(MINIMAL + "\"col\\nour\": red\n")
    assert "col\\nour: unknown key" in message


# --- immutability and provenance (issue 9 item 8) ----------------------------------------------

def test_a_loaded_policy_is_deeply_immutable() -> None:
    policy = parse_policy(dump(FULL_POLICY), source=SOURCE)
    with pytest.raises(AttributeError):
        policy.columns.exclude.append("a")  # type: ignore[attr-defined]
    with pytest.raises(TypeError):
        policy.columns.reference["depot"] = "east"  # type: ignore[index]
    with pytest.raises(TypeError):
        policy.columns.reference.update({"depot": "east"})
    with pytest.raises(AttributeError):
        policy.waivers.append(policy.waivers[0])  # type: ignore[attr-defined]
    with pytest.raises(AttributeError):
        policy.waivers[0].features.append("a")  # type: ignore[attr-defined]
    with pytest.raises(ValidationError):
        policy.columns.max_levels = 5000  # type: ignore[misc]
    assert isinstance(policy.columns.include, tuple)
    assert isinstance(policy.segments.by, tuple)  # type: ignore[union-attr]
    # YAML lists still work everywhere, and copies keep working (the Dask engine pickles).
    import copy
    import pickle

    assert pickle.loads(pickle.dumps(policy)) == policy == copy.deepcopy(policy)


def test_effective_sha256_is_the_canonical_json_of_the_model(tmp_path: Path) -> None:
    a = tmp_path / "a.yaml"
    b = tmp_path / "b.yaml"
    a.write_text(MINIMAL)
    b.write_text("# same policy, spelled out\n" + MINIMAL + "limits:\n  vif: {max: 5.0}\n")
    pa_, pb = load_policy(a), load_policy(b)
    assert pa_.sha256 != pb.sha256  # file bytes differ
    assert pa_.effective_sha256 == pb.effective_sha256  # what is enforced does not
    # hashlib + json as the outside reference for the canonical form.
    canonical = json.dumps(pa_.model_dump(mode="json"), sort_keys=True, separators=(",", ":"),
                           ensure_ascii=False)
    assert pa_.effective_sha256 == hashlib.sha256(canonical.encode()).hexdigest()
    stricter = parse_policy(MINIMAL + "limits:\n  vif: {max: 4.0}\n")
    assert stricter.effective_sha256 != pa_.effective_sha256


def test_target_accepts_one_name_or_a_list() -> None:
    assert parse_policy(MINIMAL + "columns: {target: rentals}\n").columns.target == ("rentals",)
    assert parse_policy(MINIMAL + "columns: {target: [a, b]}\n").columns.target == ("a", "b")


def test_reference_levels_are_text() -> None:
    policy = parse_policy(MINIMAL + "columns: {reference: {axle_count: 2, depot: west}}\n")
    assert dict(policy.columns.reference) == {"axle_count": "2", "depot": "west"}
    assert "columns.reference.depot" in refused(MINIMAL + "columns: {reference: {depot: [a]}}\n")


def test_starter_policy_is_valid_and_names_the_new_keys() -> None:
    from gate.policy.template import STARTER_POLICY

    policy = parse_policy(STARTER_POLICY)
    assert policy.columns.max_levels == 50 and policy.columns.target == ()
    for key in ("target:", "reference:", "max_levels:", "common practice, no source"):
        assert key in STARTER_POLICY


# --- through the command line: exit 2, one line, no traceback ----------------------------------

@pytest.mark.parametrize(("body", "expected"), [
    ("limits:\n  vif: {max: 5}\n  vif: {max: 50}\n", "line 5: limits.vif: duplicate key"),
    ("limits:\n  vif: {max: .inf}\n", "limits.vif.max: input should be a finite number"),
    ("waivers:\n  - {rule: vif, features: [a], reason: r, owner: o, expires: 2027-13-45}\n",
     "waivers[0].expires"),
    ("segments: {by: [a], min_rows: " + "7" * 5000 + "}\n", "integer of 5,000 digits"),
    ("description: " + "[" * 5000 + "]" * 5000 + "\n", "nested deeper than 32 levels"),
    ("name2: &x [1]\nname3: *x\n", "aliases"),
])
def test_cli_refuses_bad_policies_with_exit_2(run_cli: Any, clean_frame: Any, write_table: Any,
                                              tmp_path: Path, body: str, expected: str) -> None:
    policy = tmp_path / "bad.yaml"
    policy.write_text(MINIMAL + body)
    table = write_table(clean_frame)
    for argv in (["policy", "validate", str(policy)],
                 ["check", str(table), "--policy", str(policy), "--out", str(tmp_path / "o")]):
        result = run_cli(argv)
        assert result.code == 2, result
        assert result.err.count("\n") == 1 and "Traceback" not in result.err, result.err
        assert expected in result.err and str(policy) in result.err


def test_cli_escapes_control_characters_in_any_error(run_cli: Any, clean_frame: Any,
                                                     write_table: Any, tmp_path: Path) -> None:
    policy = tmp_path / "p.yaml"
    policy.write_text(MINIMAL + 'columns: {weight: "w\\ngate: PASS all good\\x1b[31m"}\n')
    result = run_cli(["check", str(write_table(clean_frame)), "--policy", str(policy),
                      "--out", str(tmp_path / "o")])
    assert result.code == 2 and result.err.count("\n") == 1, result.err
    assert "w\\ngate: PASS all good\\x1b[31m" in result.err and "\x1b" not in result.err


def test_cli_without_policy_says_which_policy_applies(run_cli: Any, clean_frame: Any,
                                                      write_table: Any, tmp_path: Path) -> None:
    table = write_table(clean_frame)
    result = run_cli(["check", str(table), "--out", str(tmp_path / "o")])
    assert result.code in (0, 1)
    assert "no --policy given: the packaged policy 'default' applies" in result.err
    assert "every numeric column is a feature" in result.err
    policy = tmp_path / "p.yaml"
    policy.write_text(MINIMAL)
    quiet = run_cli(["check", str(table), "--policy", str(policy), "--out", str(tmp_path / "q")])
    assert "no --policy given" not in quiet.err


def test_verdict_records_both_policy_hashes(run_cli: Any, clean_frame: Any, write_table: Any,
                                           tmp_path: Path) -> None:
    policy = tmp_path / "p.yaml"
    policy.write_text("# provenance\n" + MINIMAL)
    run_cli(["check", str(write_table(clean_frame)), "--policy", str(policy),
             "--out", str(tmp_path / "o")])
    document = json.loads((tmp_path / "o" / "verdict.json").read_text())
    loaded = load_policy(policy)
    assert document["policy"]["sha256"] == hashlib.sha256(policy.read_bytes()).hexdigest()
    assert document["policy"]["effective_sha256"] == loaded.effective_sha256
    assert document["policy"]["effective_sha256"] != document["policy"]["sha256"]
