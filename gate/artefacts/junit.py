"""JUnit XML (``--junit FILE``): the verdict as test results a CI system can display.

Layout (the widely used JUnit XML conventions: ``testsuites > testsuite > testcase``):

* one ``testcase`` per rule and subject: every finding is a test case named
  ``rule[subject]`` (subject = the features involved in design order, the segment, or
  ``design``), so names are stable across runs; every enabled rule with no fail or warn
  finding left (none, or all waived or information) also has one passing test case
  ``rule[all features]``, so dashboards show every check that ran; a rule turned off by the
  policy is one skipped test case;
* a fail finding carries ``<failure>``; a warning passes but says so in ``<system-out>``
  (shown by most CI systems) and in a suite property ``warning.N``; a waived finding is
  ``<skipped>`` with the waiver's owner, reason and expiry in its message;
* at most ``MAX_CASES_PER_RULE`` cases per rule, most severe first; the rest is one case
  ``rule[N more]`` that fails if any of them fails;
* ``tests``, ``failures``, ``errors`` (always 0: errors mean the gate could not judge, which
  exits 2 without a report) and ``skipped`` count the test cases; ``testsuites`` repeats them.

ElementTree escapes text and attributes; characters XML 1.0 cannot carry at all (control
characters in a column name) are replaced by U+FFFD.
"""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET
from collections import Counter
from pathlib import Path

from gate.artefacts.files import write_atomic
from gate.errors import shown
from gate.judge.findings import Finding
from gate.judge.verdict import Verdict
from gate.policy.models import RULES

SUITE_NAME = "collinearity-gate"
#: Test cases per rule before the rest (the least severe) is folded into one case; a design
#: with thousands of correlated pairs would otherwise give a JUnit file CI systems choke on.
MAX_CASES_PER_RULE = 500
MAX_WARNING_PROPERTIES = 100
CLASS_PREFIX = "collinearity_gate"
_XML_INVALID = re.compile("[^\u0009\u000a\u000d\u0020-\ud7ff\ue000-\ufffd\U00010000-\U0010ffff]")


def junit_xml(verdict: Verdict) -> str:
    """The JUnit XML document for ``verdict`` (UTF-8 text with an XML declaration)."""
    cases: list[ET.Element] = []
    names: Counter[str] = Counter()
    warnings: list[str] = []
    counts = Counter[str]()
    with_findings = {f.rule for f in verdict.findings if f.counts}
    limits = verdict.policy.limits.model_dump()

    by_rule: dict[str, list[Finding]] = {}
    for finding in verdict.findings:
        by_rule.setdefault(finding.rule, []).append(finding)
    for rule, findings in by_rule.items():
        findings.sort(key=_severity)  # stable: the policy's order within a severity
        for finding in findings[:MAX_CASES_PER_RULE]:
            case = _case(finding.rule, _subject(finding), names)
            if finding.waived:
                case.append(_element("skipped", message=_waiver_text(verdict, finding)))
                counts["skipped"] += 1
            elif finding.level == "fail":
                failure = _element("failure", message=shown(finding.message, None),
                                   type=f"{finding.rule}.fail")
                failure.text = _clean(_details(finding))
                case.append(failure)
                counts["failures"] += 1
            elif finding.level == "warn":
                warnings.append(f"{finding.rule}[{_subject(finding)}]: "
                                f"{shown(finding.message, None)}")
                out = ET.SubElement(case, "system-out")
                out.text = _clean(f"WARNING (does not fail the gate): "
                                  f"{shown(finding.message, None)}\n"
                                  + _details(finding))
            else:
                out = ET.SubElement(case, "system-out")
                out.text = _clean(f"{finding.level.upper()}: {shown(finding.message, None)}")
            cases.append(case)
        rest = findings[MAX_CASES_PER_RULE:]
        if rest:
            cases.append(_rest_case(rule, rest, names, counts, warnings))
    for rule in RULES:
        if rule in with_findings:
            continue
        level = limits[rule]["level"]
        case = _case(rule, "all features", names)
        if level == "off":
            case.append(_element("skipped", message="limit turned off by the policy"))
            counts["skipped"] += 1
        cases.append(case)

    tests = len(cases)
    suite = _element(
        "testsuite", name=SUITE_NAME, tests=str(tests), failures=str(counts["failures"]),
        errors="0", skipped=str(counts["skipped"]), time="0", timestamp=_timestamp(verdict),
        hostname="localhost", id="0", package=CLASS_PREFIX)
    properties = ET.SubElement(suite, "properties")
    for name, value in _properties(verdict, warnings):
        properties.append(_element("property", name=name, value=value))
    suite.extend(cases)
    root = _element("testsuites", name=SUITE_NAME, tests=str(tests),
                    failures=str(counts["failures"]), errors="0",
                    skipped=str(counts["skipped"]), time="0")
    root.append(suite)
    ET.indent(root)
    return ('<?xml version="1.0" encoding="UTF-8"?>\n'
            + ET.tostring(root, encoding="unicode") + "\n")


def write_junit(verdict: Verdict, path: str | Path) -> Path:
    return write_atomic(path, junit_xml(verdict))


def _severity(finding: Finding) -> int:
    if finding.waived:
        return 3
    return {"fail": 0, "warn": 1}.get(finding.level, 2)


def _rest_case(rule: str, rest: list[Finding], names: Counter[str], counts: Counter[str],
               warnings: list[str]) -> ET.Element:
    """One test case standing for the findings past MAX_CASES_PER_RULE (the least severe)."""
    levels = Counter("waived" if f.waived else f.level for f in rest)
    summary = ", ".join(f"{n} {level}" for level, n in sorted(levels.items()))
    text = (f"{len(rest)} more {rule} findings ({summary}) are not listed one by one here; "
            "verdict.json lists every finding")
    case = _case(rule, f"{len(rest)} more", names)
    if levels["fail"]:
        failure = _element("failure", message=text, type=f"{rule}.fail")
        case.append(failure)
        counts["failures"] += 1
    elif levels["warn"]:
        warnings.append(f"{rule}[{len(rest)} more]: {text}")
        out = ET.SubElement(case, "system-out")
        out.text = _clean(f"WARNING (does not fail the gate): {text}")
    elif levels["waived"] == len(rest):
        case.append(_element("skipped", message=f"waived: {text}"))
        counts["skipped"] += 1
    else:
        out = ET.SubElement(case, "system-out")
        out.text = _clean(text)
    return case


def _case(rule: str, subject: str, names: Counter[str]) -> ET.Element:
    name = f"{rule}[{subject}]"
    names[name] += 1
    if names[name] > 1:  # keep names unique so CI histories do not merge two cases
        name = f"{name}#{names[name]}"
    return _element("testcase", name=name, classname=f"{CLASS_PREFIX}.{rule}", time="0")


def _subject(finding: Finding) -> str:
    if finding.subject == "segment" and finding.segment is not None:
        return shown(finding.segment, None)
    return ", ".join(shown(name, None) for name in finding.features) or "design"


def _details(finding: Finding) -> str:
    lines = [f"rule: {finding.rule}", f"level: {finding.level}",
             f"features: {', '.join(finding.features) or '(whole design)'}"]
    if finding.value is not None:
        lines.append(f"value: {finding.value:.6g}")
    if finding.limit is not None:
        lines.append(f"limit: {finding.limit:g}")
    return "\n".join(lines)


def _waiver_text(verdict: Verdict, finding: Finding) -> str:
    if finding.waiver is None:
        return f"waived: {finding.message}"
    w = verdict.policy.waivers[finding.waiver]
    return (f"waived by {w.owner} until {w.expires.isoformat()}: {w.reason} "
            f"(finding: {finding.message})")


def _properties(verdict: Verdict, warnings: list[str]) -> list[tuple[str, str]]:
    t = verdict.table
    out = [
        ("status", verdict.status),
        ("table", t.source),
        ("table.sha256", t.sha256 or ""),
        ("rows.used", str(t.rows_used)),
        ("rows.dropped", str(t.rows_dropped)),
        ("policy", verdict.policy.name),
        ("policy.sha256", verdict.policy.sha256),
        ("label", verdict.label or ""),
        ("tool.version", verdict.tool_version),
        ("warnings", str(len(warnings))),
    ]
    out += [(f"warning.{k + 1}", text) for k, text in enumerate(warnings[:MAX_WARNING_PROPERTIES])]
    return out


def _timestamp(verdict: Verdict) -> str:
    """ISO 8601 without the zone suffix (the JUnit convention); the verdict time is UTC."""
    return verdict.created_at.replace("+00:00", "").rstrip("Z")[:19]


def _element(tag: str, **attributes: str) -> ET.Element:
    return ET.Element(tag, {k: _clean(v) for k, v in attributes.items()})


def _clean(text: str) -> str:
    return _XML_INVALID.sub("\ufffd", text)
