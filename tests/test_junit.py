"""JUnit XML: golden structure checks against the common JUnit XML conventions.

Conventions checked (as CI systems read them): root ``testsuites`` holding ``testsuite``
elements; ``testsuite`` carries name, tests, failures, errors, skipped, time, timestamp;
``testcase`` carries name, classname, time and at most one of failure/error/skipped, plus
optional system-out; counts equal the number of such children (common practice, no source).
"""

from __future__ import annotations

import datetime as dt
import xml.etree.ElementTree as ET
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import make_clean_frame, make_docks_frame, policy_from

from gate.api import check
from gate.artefacts.junit import junit_xml
from gate.judge.verdict import Verdict
from gate.policy.models import Policy

TODAY = dt.date(2026, 12, 1)
SUITE_ATTRIBUTES = {"name", "tests", "failures", "errors", "skipped", "time", "timestamp"}
CASE_ATTRIBUTES = {"name", "classname", "time"}
CASE_CHILDREN = {"failure", "error", "skipped", "system-out", "system-err"}

WAIVED_POLICY = """
policy_version: 1
name: junit-test
limits:
  pairwise_correlation: {max: 0.8, level: warn}
  vif: {max: 5, level: fail}
  condition_number: {max: 30, level: "off"}
  rank_deficiency: {level: fail}
waivers:
  - rule: pairwise_correlation
    features: [air_temp_c, felt_temp_c]
    reason: "both kept on purpose <ridge & co>"
    owner: demand-modelling
    expires: 2027-06-30
"""


def _parse(verdict: Verdict) -> ET.Element:
    text = junit_xml(verdict)
    assert text.startswith('<?xml version="1.0" encoding="UTF-8"?>')
    return ET.fromstring(text.encode("utf-8"))


def _assert_conventions(root: ET.Element) -> None:
    assert root.tag == "testsuites"
    suites = root.findall("testsuite")
    assert len(suites) == 1 and len(root) == 1
    totals = {"tests": 0, "failures": 0, "errors": 0, "skipped": 0}
    for suite in suites:
        assert SUITE_ATTRIBUTES <= set(suite.attrib)
        cases = suite.findall("testcase")
        assert {child.tag for child in suite} <= {"properties", "testcase"}
        counted = {
            "tests": len(cases),
            "failures": sum(1 for c in cases if c.find("failure") is not None),
            "errors": sum(1 for c in cases if c.find("error") is not None),
            "skipped": sum(1 for c in cases if c.find("skipped") is not None),
        }
        for key, value in counted.items():
            assert int(suite.attrib[key]) == value, key
            totals[key] += value
        dt.datetime.fromisoformat(suite.attrib["timestamp"])
        float(suite.attrib["time"])
        names = [c.attrib["name"] for c in cases]
        assert len(names) == len(set(names)), "test case names must be unique"
        for case in cases:
            assert CASE_ATTRIBUTES <= set(case.attrib)
            kinds = [child.tag for child in case]
            assert set(kinds) <= CASE_CHILDREN
            assert sum(kinds.count(k) for k in ("failure", "error", "skipped")) <= 1
        for prop in suite.iter("property"):
            assert set(prop.attrib) == {"name", "value"}
    for key, value in totals.items():
        assert int(root.attrib[key]) == value


def test_failing_table_with_waiver_and_rule_off() -> None:
    verdict = check(make_docks_frame(), policy_from(WAIVED_POLICY), today=TODAY)
    root = _parse(verdict)
    _assert_conventions(root)
    cases = {c.attrib["name"]: c for c in root.iter("testcase")}
    unwaived_fails = [f for f in verdict.findings if f.level == "fail" and not f.waived]
    assert int(root.attrib["failures"]) == len(unwaived_fails) > 0
    for finding in unwaived_fails:
        case = cases[f"{finding.rule}[{', '.join(finding.features) or 'design'}]"]
        failure = case.find("failure")
        assert failure is not None and failure.attrib["message"] == finding.message
        assert case.attrib["classname"] == f"collinearity_gate.{finding.rule}"
    waived = cases["pairwise_correlation[air_temp_c, felt_temp_c]"].find("skipped")
    assert waived is not None
    assert "demand-modelling" in waived.attrib["message"]
    assert "<ridge & co>" in waived.attrib["message"]  # round-trips through XML escaping
    off = cases["condition_number[all features]"].find("skipped")
    assert off is not None and "off" in off.attrib["message"]
    props = {p.attrib["name"]: p.attrib["value"] for p in root.iter("property")}
    assert props["status"] == "fail"
    assert props["policy.sha256"] == verdict.policy.sha256


def test_warnings_are_visible_but_do_not_fail() -> None:
    rng = np.random.default_rng(11)
    x = rng.normal(size=400)
    frame = pd.DataFrame({"load_kw": x, "load_kw_lagged": x + rng.normal(0, 0.6, 400),
                          "price": rng.normal(size=400)})
    verdict = check(frame, today=TODAY)
    assert verdict.status == "warn"
    root = _parse(verdict)
    _assert_conventions(root)
    assert root.attrib["failures"] == "0"
    warned = [c for c in root.iter("testcase") if c.find("system-out") is not None]
    assert warned and all("WARNING" in (c.findtext("system-out") or "") for c in warned)
    props = {p.attrib["name"]: p.attrib["value"] for p in root.iter("property")}
    assert int(props["warnings"]) == len(warned)
    assert props["warning.1"].startswith("pairwise_correlation[load_kw, load_kw_lagged]")


def test_passing_table_has_one_passing_case_per_rule() -> None:
    root = _parse(check(make_clean_frame(), today=TODAY))
    _assert_conventions(root)
    names = sorted(c.attrib["name"] for c in root.iter("testcase"))
    assert names == sorted(f"{rule}[all features]" for rule in (
        "pairwise_correlation", "vif", "condition_number", "rank_deficiency"))
    assert all(len(c) == 0 for c in root.iter("testcase"))


def test_hostile_column_names_are_escaped_and_control_characters_shown() -> None:
    rng = np.random.default_rng(5)
    x = rng.normal(size=200)
    nasty = '<script>alert("x")</script> & \'quote\''
    frame = pd.DataFrame({nasty: x, "bell\x07name": x * 2.0 + 1.0,
                          "other": rng.normal(size=200)})
    verdict = check(frame, today=TODAY)
    text = junit_xml(verdict)
    assert "<script>" not in text and "\x07" not in text
    root = ET.fromstring(text)
    _assert_conventions(root)
    names = " ".join(c.attrib["name"] for c in root.iter("testcase"))
    assert nasty in names and "bell\\x07name" in names  # control characters shown escaped


def test_cli_writes_junit(tmp_path: Path, run_cli: Any, write_table: Any) -> None:
    table = write_table(make_docks_frame(), "docks.csv")
    target = tmp_path / "reports" / "gate.xml"
    result = run_cli(["check", table, "--out", tmp_path / "out", "--junit", target])
    assert result.code == 1
    _assert_conventions(ET.parse(target).getroot())
    assert str(target) in result.out


def test_segment_findings_are_named_by_segment() -> None:
    rng = np.random.default_rng(6)
    temp = rng.normal(20.0, 4.0, 400)
    frame = pd.DataFrame({"temp_c": temp, "temp_c_sq": temp**2, "wind": rng.normal(size=400),
                          "region": rng.choice(["north", "south", "isle"], 400,
                                               p=[0.5, 0.45, 0.05])})
    policy = policy_from("""
        policy_version: 1
        name: segmented
        segments: {by: [region], min_rows: 30}
        """)
    root = _parse(check(frame, policy, today=TODAY))
    _assert_conventions(root)
    segment_cases = [c.attrib["name"] for c in root.iter("testcase")
                     if c.attrib["classname"].endswith(".segment")]
    assert len(segment_cases) == 3
    assert any(name.startswith("segment[region=isle") for name in segment_cases)


def test_many_findings_per_rule_fold_into_one_case(monkeypatch: pytest.MonkeyPatch) -> None:
    from gate.artefacts import junit

    verdict = check(make_docks_frame(), policy_from(WAIVED_POLICY), today=TODAY)
    vif_fails = [f for f in verdict.findings if f.rule == "vif" and f.level == "fail"]
    assert len(vif_fails) >= 3
    monkeypatch.setattr(junit, "MAX_CASES_PER_RULE", 1)
    root = _parse(verdict)
    _assert_conventions(root)
    vif_cases = [c for c in root.iter("testcase") if c.attrib["classname"].endswith(".vif")]
    assert len(vif_cases) == 2
    rest = vif_cases[1]
    assert rest.attrib["name"] == f"vif[{len(vif_fails) - 1} more]"
    failure = rest.find("failure")
    assert failure is not None and "verdict.json lists every finding" in failure.attrib["message"]


def test_case_names_are_stable_and_every_enabled_rule_has_a_case() -> None:
    # Issue 9.10: names in design order whatever the data; each enabled rule shows up even when
    # it passes, so CI dashboards list every check that ran.
    rng = np.random.default_rng(11)
    n = 400
    base = rng.normal(size=(n, 4))
    frame = pd.DataFrame({"s1": base[:, 0], "s2": base[:, 1],
                          "s3": base[:, 0] + base[:, 1] + 0.01 * rng.normal(size=n),
                          "s5": base[:, 2] + 1e-3 * rng.normal(size=n) + base[:, 0]})
    policy = Policy.model_validate({"name": "ci", "limits": {
        "condition_number": {"max": 10, "level": "fail"}, "vif": {"max": 5, "level": "warn"},
        "pairwise_correlation": {"max": 0.99, "level": "fail"}}})
    names_by_run = []
    for seed in (1, 2):
        shuffled = frame.sample(frac=1.0, random_state=seed).reset_index(drop=True)
        root = ET.fromstring(junit_xml(check(shuffled, policy, today=TODAY)))
        names = [c.attrib["name"] for c in root.iter("testcase")]
        names_by_run.append(sorted(names))
        for name in names:
            if name.startswith("condition_number["):
                listed = name[len("condition_number["):-1].split(", ")
                order = list(frame.columns)
                assert listed == sorted(listed, key=order.index), name
        rules = {name.split("[")[0] for name in names}
        assert {"pairwise_correlation", "vif", "condition_number", "rank_deficiency"} <= rules
        assert "rank_deficiency[all features]" in names  # passing, still listed
    assert names_by_run[0] == names_by_run[1]
