"""Confirm a remedy with the one judge: the fail-level findings `gate check` would give the
design without the dropped units, computed from the verdict's statistics (no row is read).

The reduced statistics are exact restrictions of the main pass: the centred cross-products of
the kept columns are ``corr_KK * s_K s_K'`` with the same means, weight sum and row count, which
is what the main pass accumulates for those columns when the policy excludes the others. They go
through the same exact-pass routing, diagnostics and judge as a check.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable

import numpy as np

from gate.design.plan import Design, Group
from gate.diagnose.diagnostics import compute_diagnostics
from gate.judge.findings import Finding, unwaived
from gate.judge.rules import judge
from gate.judge.verdict import Verdict
from gate.stats.accumulators import CentredGram
from gate.stats.routing import plan_exact_pass


def reduced_design(design: Design, dropped: Iterable[str]) -> tuple[Design, list[int]]:
    """The design without the dropped units (features; categorical columns as a whole) and the
    positions of the kept features in the original design."""
    gone = set(dropped)
    group_of = {k: g.column for g in design.groups for k in g.indices}
    kept = [k for k, name in enumerate(design.features)
            if group_of.get(k, name) not in gone]
    position = {old: new for new, old in enumerate(kept)}
    groups = tuple(Group(g.column, g.reference, g.levels,
                         tuple(position[k] for k in g.indices))
                   for g in design.groups if g.column not in gone)
    features = tuple(design.features[k] for k in kept)
    selection = tuple(design.selection[k] for k in kept)
    return Design(features, groups, selection, design.weight, design.counts,
                  design.notes), kept


def judge_without(verdict: Verdict, dropped: Iterable[str], today: dt.date
                  ) -> tuple[list[Finding], str | None]:
    """Unwaived fail-level findings of the design without ``dropped`` (whole table), and a
    reason when the statistics alone cannot settle them (the reduced design is so close to
    singular that `gate check` would read the rows again for an exact pass)."""
    design, kept = reduced_design(verdict.design, dropped)
    d = verdict.diagnostics
    idx = np.asarray(kept, dtype=np.intp)
    scales = d.scales[idx]
    corr = np.nan_to_num(d.correlation[np.ix_(idx, idx)], nan=0.0)
    np.fill_diagonal(corr, 1.0)
    comoment = corr * np.outer(scales, scales)
    gram = CentredGram.from_moments(d.rows, d.weight_sum, d.means[idx].copy(), comoment)
    tolerance = verdict.policy.limits.rank_deficiency.tolerance
    exact = plan_exact_pass(gram, tolerance=tolerance)
    if exact.needs_exact_pass:
        return [], ("the design left is so close to singular that only an exact pass over the "
                    "rows can judge it")
    diagnostics = compute_diagnostics(
        gram, exact, groups=tuple(g.indices for g in design.groups),
        scaling=verdict.policy.limits.condition_number.scaling)
    findings, _ = judge(diagnostics, design, verdict.policy, today)
    return unwaived(findings, "fail"), None


def confirm(verdict: Verdict, dropped: Iterable[str], today: dt.date) -> list[str]:
    """Why the design without ``dropped`` would still fail `gate check` (empty: it passes
    every fail-level limit), over the whole table and every judged segment."""
    drops = list(dropped)
    problems: list[str] = []
    parts: list[tuple[str, Verdict]] = [("", verdict)]
    for segment in verdict.segments:
        if segment.verdict is not None:
            parts.append((f"[{segment.label}] ", segment.verdict))
    for label, part in parts:
        failing, unsettled = judge_without(part, drops, today)
        if unsettled:
            problems.append(f"{label}{unsettled}")
        problems += [f"{label}{f.message}" for f in failing]
    return problems
