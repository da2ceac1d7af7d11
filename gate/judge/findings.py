"""Findings with a stable identity, the one level order, and the one rule for what counts.

A finding's identity is (rule, subject kind, features in canonical design order, segment): it
does not depend on the data (a condition index's features are listed in design order, not by
proportion), so runs, `gate diff`, JUnit test names and the history compare findings by it.
Writers read the structured fields (``subject``, ``value_kind``, ``segment``); none parses
``message``.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Literal

from gate.errors import ExitCode

Level = Literal["fail", "warn", "info"]
Status = Literal["pass", "warn", "fail"]
#: The one level order, most severe first (text, HTML, JUnit and `check-files` list in it).
LEVELS: tuple[Level, ...] = ("fail", "warn", "info")
#: Status order, least severe first: a higher rank is worse (diff, history, segments).
STATUS_RANK: dict[str, int] = {"pass": 0, "warn": 1, "fail": 2}

#: What a finding is about.
Subject = Literal["feature", "pair", "group", "dependency", "condition_index", "rows", "waiver",
                  "segment", "structural"]
#: finite: ``value`` holds the number; infinite: the value is +inf (``value`` None);
#: undefined: no number exists (e.g. GVIF of a group inside an exact dependency).
ValueKind = Literal["finite", "infinite", "undefined"]

Identity = tuple[str, str, tuple[str, ...], str | None]


@dataclass(frozen=True)
class Finding:
    rule: str
    level: Level
    features: tuple[str, ...]  # canonical: design order (pairs: the earlier feature first)
    value: float | None  # None when value_kind is not "finite"
    limit: float | None
    message: str
    waived: bool = False
    waiver: int | None = None  # index into policy.waivers
    subject: Subject = "rows"
    value_kind: ValueKind = "finite"
    segment: str | None = None  # the segment label; None for the whole table

    @property
    def identity(self) -> Identity:
        """(rule, subject, features, segment): stable across runs and data."""
        return (self.rule, self.subject, self.features, self.segment)

    @property
    def counts(self) -> bool:
        """Whether this finding counts towards the status (not waived, not information)."""
        return not self.waived and self.level != "info"


def value_kind(value: float | None) -> ValueKind:
    if value is None or math.isnan(value):
        return "undefined"
    return "infinite" if math.isinf(value) else "finite"


def finite_or_none(value: float | None) -> float | None:
    return value if value is not None and math.isfinite(value) else None


def unwaived(findings: Iterable[Finding], level: Level) -> list[Finding]:
    """The findings of ``level`` that no waiver covers: the one rule for what counts."""
    return [f for f in findings if f.level == level and not f.waived]


def level_counts(findings: Sequence[Finding]) -> dict[str, int]:
    """Counts by the one set of words: fail, warn, info (unwaived) and waived."""
    out: dict[str, int] = {level: len(unwaived(findings, level)) for level in LEVELS}
    out["waived"] = sum(1 for f in findings if f.waived)
    return out


def counts_text(findings: Sequence[Finding]) -> str:
    """'2 fail, 1 warn, 3 info, 0 waived': the same words in text, HTML, JUnit, check-files."""
    counts = level_counts(findings)
    return ", ".join(f"{counts[key]} {key}" for key in (*LEVELS, "waived"))


def status_of(findings: Iterable[Finding]) -> Status:
    levels = {f.level for f in findings if f.counts}
    return "fail" if "fail" in levels else "warn" if "warn" in levels else "pass"


def exit_code_of(status: str) -> ExitCode:
    """0 for pass or warn, 1 for fail: what `gate check` returns."""
    return ExitCode.FAILED if status == "fail" else ExitCode.OK


def worst_status(statuses: Iterable[str]) -> Status:
    worst: Status = "pass"
    for status in statuses:
        if STATUS_RANK[status] > STATUS_RANK[worst]:
            worst = status  # type: ignore[assignment]
    return worst
