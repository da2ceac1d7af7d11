"""The compact terminal summary printed by `gate check`."""

from __future__ import annotations

from gate.judge.findings import LEVELS, counts_text
from gate.judge.verdict import Verdict

SHOWN_FINDINGS = 8


def summary_lines(verdict: Verdict) -> list[str]:
    t = verdict.table
    d = verdict.diagnostics
    active = [f for f in verdict.findings if not f.waived]
    lines = [
        f"{verdict.status.upper()}  {t.source}  policy '{verdict.policy.name}'"
        + (f"  label '{verdict.label}'" if verdict.label else ""),
        (f"  rows {t.rows_used:,} used of {t.rows:,} ({t.rows_dropped:,} dropped for missing "
         f"values); {len(verdict.features)} features; rank {d.rank} of {d.features + 1}"),
        f"  findings: {counts_text(verdict.findings)}",
    ]
    ranked = sorted(active, key=lambda f: (LEVELS.index(f.level), f.rule))
    for finding in ranked[:SHOWN_FINDINGS]:
        lines.append(f"  [{finding.level}] {finding.rule}: {finding.message}")
    if len(ranked) > SHOWN_FINDINGS:
        lines.append(f"  ... and {len(ranked) - SHOWN_FINDINGS} more in verdict.json")
    return lines
