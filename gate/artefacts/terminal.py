"""The compact terminal summary printed by `gate check` (and per table by `check-files`).

It leads with the cause and the next step: an exact dependency's equation comes first, with its
consequences (the features whose VIF it makes infinite) folded under it, then one line with the
`gate suggest` command for the same table and policy. Fail and warn findings follow (causes
before consequences: dependencies, VIFs with their auxiliary equations, near dependencies, then
pairs), at most ``SHOWN_FINDINGS`` of them; information findings carry advice (centre a term,
remove a stale waiver, an identifier-like column) and are never cut.
"""

from __future__ import annotations

import shlex

from gate.judge.findings import LEVELS, Finding, counts_text
from gate.judge.rules import removed_text
from gate.judge.verdict import Verdict

#: Fail and warn findings listed before the rest is summed up (information findings: all).
SHOWN_FINDINGS = 8
#: Causes before consequences within a level.
RULE_ORDER = ("rank_deficiency", "vif", "condition_number", "pairwise_correlation")


def suggest_command(table: str, policy: str | None, chunk_rows: int | None = None,
                    csv_delimiter: str | None = None) -> str:
    """`gate suggest` with the same TABLE, --policy, --chunk-rows and --csv-delimiter as the
    check."""
    words = ["gate", "suggest", table]
    if policy is not None:
        words += ["--policy", policy]
    if chunk_rows is not None:
        words += ["--chunk-rows", str(chunk_rows)]
    if csv_delimiter is not None:
        words += ["--csv-delimiter", csv_delimiter]
    return shlex.join(words)


def default_policy_note(verdict: Verdict) -> str:
    """What stderr says when no --policy was given: which policy applies and what it takes."""
    limits = verdict.policy.limits
    return (f"gate: no --policy given: the packaged policy '{verdict.policy.name}' applies "
            f"(|r| >= {limits.pairwise_correlation.max:g} {limits.pairwise_correlation.level}, "
            f"VIF > {limits.vif.max:g} {limits.vif.level}, condition index > "
            f"{limits.condition_number.max:g} {limits.condition_number.level}, exact "
            f"dependencies {limits.rank_deficiency.level}); every numeric column is a feature "
            "and every text column a categorical. Write your own with `gate policy init`")


def rank_text(verdict: Verdict) -> str:
    """'rank 13 of 14: 1 exact dependency' (or 'rank 14 of 14')."""
    d = verdict.diagnostics
    text = f"rank {d.rank} of {d.features + 1}"
    count = len(d.dependencies)
    if count:
        text += f": {count} exact dependenc{'y' if count == 1 else 'ies'}"
    return text


def condition_text(verdict: Verdict) -> str:
    """'condition number 41.2', or '∞ (260 after removing 1 exact dependency)'."""
    d = verdict.diagnostics
    if d.condition.indices.size == 0:
        return "condition number 1"
    reduced = f"{d.condition_number_reduced:.3g}"
    if d.condition_number is None:
        return f"condition number ∞ ({reduced} {removed_text(len(d.dependencies))})"
    return f"condition number {reduced}"


def _order(finding: Finding) -> tuple[int, int]:
    rule = RULE_ORDER.index(finding.rule) if finding.rule in RULE_ORDER else len(RULE_ORDER)
    return LEVELS.index(finding.level), rule


def _consequences(verdict: Verdict, dependency: Finding, pending: list[Finding]
                  ) -> list[Finding]:
    """The VIF findings (∞ or undefined) that this exact dependency causes."""
    names = set(dependency.features)
    for group in verdict.design.groups:
        if any(verdict.features[k] in names for k in group.indices):
            names.add(group.column)
    return [f for f in pending if f.rule == "vif" and f.value_kind != "finite"
            and set(f.features) <= names]


def finding_lines(verdict: Verdict, suggest: str | None = None) -> list[str]:
    """The findings as text, causes first; ``suggest`` is the next-step command (default: built
    from the verdict's table and policy)."""
    active = sorted((f for f in verdict.findings if not f.waived), key=_order)
    why = "the fewest features to drop so every fail limit passes"
    if suggest is None and verdict.table.database is not None:  # never echo a database URL
        suggest = suggest_command("TABLE.parquet", verdict.policy.source)
        why = f"with the query's rows exported to a Parquet file: {why}"
    elif suggest is None and verdict.table.source.startswith("<"):  # a DataFrame, not a file
        suggest = suggest_command("TABLE.parquet", verdict.policy.source)
        why = f"with the table written to a Parquet file: {why}"
    elif suggest is None:
        suggest = suggest_command(verdict.table.source, verdict.policy.source)
    next_line = f"  next: {suggest}   ({why})"
    lines: list[str] = []
    pending = list(active)
    shown = 0
    dependencies = [f for f in active if f.subject == "dependency"]
    for dependency in dependencies:
        pending.remove(dependency)
        folded = _consequences(verdict, dependency, pending)
        for f in folded:
            pending.remove(f)
        so = (f"; so VIF ∞ for {', '.join(f.features[0] for f in folded)} "
              f"({len(folded)} more {folded[0].level} finding{'s' if len(folded) != 1 else ''})"
              if folded else "")
        lines.append(f"  [{dependency.level}] {dependency.rule}: {dependency.message}{so}")
        shown += 1
    fails = verdict.status == "fail"
    if dependencies and fails:
        lines.append(next_line)
    hidden: list[Finding] = []
    for finding in pending:
        if finding.level != "info" and shown >= SHOWN_FINDINGS:
            hidden.append(finding)
            continue
        if fails and not dependencies and finding.level != "fail" and next_line not in lines:
            lines.append(next_line)
        lines.append(f"  [{finding.level}] {finding.rule}: {finding.message}")
        shown += finding.level != "info"
    if fails and next_line not in lines:
        lines.append(next_line)
    if hidden:
        lines.append(f"  ... and {len(hidden)} more in verdict.json ({counts_text(hidden)})")
    return lines


def first_cause(verdict: Verdict) -> str | None:
    """The first unwaived fail or warn finding in cause order (what `check-files` shows)."""
    active = sorted((f for f in verdict.findings if not f.waived and f.level != "info"),
                    key=_order)
    return f"[{active[0].level}] {active[0].rule}: {active[0].message}" if active else None


def summary_lines(verdict: Verdict, suggest: str | None = None) -> list[str]:
    t = verdict.table
    lines = [
        f"{verdict.status.upper()}  {t.source}  policy '{verdict.policy.name}'"
        + (f"  label '{verdict.label}'" if verdict.label else ""),
        (f"  rows {t.rows_used:,} used of {t.rows:,} ({t.rows_dropped:,} dropped for missing "
         f"values); {len(verdict.features)} features; {rank_text(verdict)}; "
         f"{condition_text(verdict)}"),
        f"  findings: {counts_text(verdict.findings)}",
    ]
    return lines + finding_lines(verdict, suggest)
