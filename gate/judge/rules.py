"""Judge diagnostics against the policy's limits and waivers.

Each enabled limit yields findings; a waiver covers a finding of its rule when every feature of
the finding is listed in the waiver. An expired waiver covers nothing and is itself a warning; a
waiver that covers nothing is reported as stale (information only).
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass, replace
from typing import Literal

from gate.design.plan import Design
from gate.diagnose.auxiliary import auxiliary_for, number
from gate.diagnose.diagnostics import Dependency, Diagnostics
from gate.judge.findings import Finding, Level
from gate.numerics.kernels import INTERCEPT
from gate.policy.models import Policy, Waiver

INTERCEPT_NAME = "(intercept)"
#: A waiver in use that expires within this many days gets an information finding, so the
#: owner hears of it before the gate starts failing (`gate history --horizon` defaults to it).
WAIVER_EXPIRY_HORIZON_DAYS = 30


@dataclass(frozen=True)
class WaiverState:
    index: int
    waiver: Waiver
    state: Literal["active", "expired", "stale"]
    covered: int


def judge(diagnostics: Diagnostics, design: Design, policy: Policy, today: dt.date
          ) -> tuple[tuple[Finding, ...], tuple[WaiverState, ...]]:
    names = design.features
    limits = policy.limits
    raw: list[Finding] = []
    if limits.pairwise_correlation.level != "off":
        raw += _pair_findings(diagnostics, names, policy)
    if limits.vif.level != "off":
        raw += _vif_findings(diagnostics, design, policy)
    if limits.condition_number.level != "off":
        raw += _condition_findings(diagnostics, names, policy)
    if limits.rank_deficiency.level != "off":
        raw += _rank_findings(diagnostics, names, policy)
    return _apply_waivers(raw, policy, today)


def _finding_level(level: str) -> Level:
    """Only enabled limits produce findings, so their level is fail or warn."""
    return "fail" if level == "fail" else "warn"


def vif_breaches(value: float, limit: float) -> bool:
    """VIF (or GVIF^(1/df)) > limit; infinite and undefined values breach too."""
    return not value <= limit


def pair_breaches(r: float, limit: float) -> bool:
    """|r| >= limit."""
    return abs(r) >= limit


def index_breaches(index: float, limit: float) -> bool:
    """Condition index > limit."""
    return index > limit


def involved_columns(proportions: list[tuple[int, float]], proportion: float) -> list[int]:
    """Columns whose variance-decomposition proportion on one index is >= ``proportion``
    (Belsley, Kuh & Welsch 1980: a near dependency involves two or more such columns)."""
    return [c for c, share in proportions if share >= proportion]


def _pair_findings(d: Diagnostics, names: tuple[str, ...], policy: Policy) -> list[Finding]:
    limit = policy.limits.pairwise_correlation
    i, j, r = d.pairs(limit.max)
    return [
        Finding("pairwise_correlation", _finding_level(limit.level), (names[a], names[b]),
                float(v), limit.max, pair_text(names[a], names[b], float(v), limit.max),
                subject="pair")
        for a, b, v in zip(i.tolist(), j.tolist(), r.tolist())
    ]


def pair_text(a: str, b: str, r: float, limit: float) -> str:
    """The one notation for a pair: 'a and b move together: r = +0.95 (|r| >= 0.8)'; a negative
    r reads 'move in opposite directions'."""
    how = "move together" if r >= 0 else "move in opposite directions"
    return f"{a} and {b} {how}: r = {r:+.3f} (|r| >= {limit:g})"


def _vif_findings(d: Diagnostics, design: Design, policy: Policy) -> list[Finding]:
    limit = policy.limits.vif
    names = design.features
    grouped = {k for g in design.groups for k in g.indices}
    out: list[Finding] = []
    breaching = [k for k in range(d.vif.size) if vif_breaches(float(d.vif[k]), limit.max)]
    for k in sorted(breaching, key=lambda k: -float(d.vif[k])):
        if k in grouped:
            continue  # dummies are judged as a group (GVIF), not one by one
        vif = float(d.vif[k])
        if math.isinf(vif):
            message = (f"{names[k]}: VIF ∞ (infinite: {names[k]} is part of an exact "
                       "dependency)")
            out.append(Finding("vif", _finding_level(limit.level), (names[k],), None, limit.max,
                               message, subject="feature", value_kind="infinite"))
            continue
        aux = auxiliary_for(d, k)
        cause = f"{aux.equation(names)}; " if aux is not None else f"{names[k]}: "
        message = (f"{cause}VIF {number(vif)} > {limit.max:g} (standard error "
                   f"×{number(math.sqrt(vif))})" + _effective_rows_text(d.rows, vif))
        out.append(Finding("vif", _finding_level(limit.level), (names[k],), vif, limit.max,
                           message, subject="feature"))
    for group, result in zip(design.groups, d.groups):
        scaled = result.vif_scale
        if math.isnan(result.gvif):
            out.append(Finding("vif", _finding_level(limit.level), (group.column,), None,
                               limit.max, f"{group.column}: GVIF undefined (a dummy is part of "
                               "an exact dependency)", subject="group",
                               value_kind="undefined"))
        elif vif_breaches(scaled, limit.max):
            out.append(Finding("vif", _finding_level(limit.level), (group.column,), scaled, limit.max,
                               f"{group.column} ({result.df} dummies): GVIF^(1/df) "
                               f"{number(scaled)} > {limit.max:g} (GVIF {number(result.gvif)}, "
                               f"standard error ×{number(result.adjusted)})"
                               + _effective_rows_text(d.rows, scaled), subject="group"))
    return out


def effective_rows_label(rows: int, inflation: float) -> str:
    """n / VIF as text: whole rows from 10 up, two significant digits below (never "0")."""
    effective = rows / inflation
    return f"{effective:,.0f}" if effective >= 10 else f"{effective:.2g}"


def _effective_rows_text(rows: int, inflation: float) -> str:
    """Var(b_j) grows by VIF_j: the coefficient is as precise as with n / VIF_j rows."""
    return (f"; its coefficient is as precise as with {effective_rows_label(rows, inflation)} "
            f"of the {rows:,} rows (n / VIF)")


def removed_text(dependencies: int) -> str:
    """The one phrase for a condition index computed without the exact dependencies (text,
    HTML, JUnit): one column per dependency is removed, the full design's number is ∞."""
    return f"after removing {dependencies} exact dependenc{'y' if dependencies == 1 else 'ies'}"


def offset_index(d: Diagnostics, column: int) -> float:
    """Condition index of [1, x] alone with unit-length columns: how far x's offset (a large
    mean relative to its spread, like a calendar year or epoch seconds) makes it collinear with
    the intercept. With c = |cos(1, x)| = sqrt(W)|m| / sqrt(W m^2 + s^2) (s the centred norm)
    the singular values are sqrt(1 +- c), so the index is sqrt((1+c)/(1-c)) =
    (1 + c) sqrt(W m^2 + s^2) / s."""
    m, s, w = float(d.means[column]), float(d.scales[column]), d.weight_sum
    if s <= 0.0:
        return math.inf
    total = math.hypot(math.sqrt(w) * m, s)
    return (1.0 + math.sqrt(w) * abs(m) / total) * total / s


def _condition_findings(d: Diagnostics, names: tuple[str, ...], policy: Policy) -> list[Finding]:
    """One finding per near dependency (an index over the limit with two or more proportions
    >= the policy's proportion; Belsley, Kuh & Welsch 1980), features in design order; every
    other index over the limit is diffuse, and all of them make ONE information finding."""
    limit = policy.limits.condition_number
    cond = d.condition
    out: list[Finding] = []
    removed = len(d.dependencies)
    after = f" {removed_text(removed)}" if cond.reduced else ""
    diffuse: list[float] = []
    for k in range(cond.indices.size - 1, -1, -1):
        index = float(cond.indices[k])
        if not index_breaches(index, limit.max):
            break
        row = cond.shares(k)
        shares = [(c, float(row[pos])) for pos, c in enumerate(cond.columns)]
        chosen = set(involved_columns(shares, limit.proportion))
        if len(chosen) < 2:
            diffuse.append(index)
            continue
        involved = sorted(((c, p) for c, p in shares if c in chosen), key=lambda item: -item[1])
        label = ", ".join(f"{_column_name(c, names)} ({p:.2f})" for c, p in involved)
        columns = sorted(c for c in chosen if c != INTERCEPT)  # design order
        features = tuple(names[c] for c in columns)
        with_intercept = INTERCEPT in chosen
        message = (f"near dependency among {', '.join(features)}"
                   + (" and the intercept" if with_intercept else "")
                   + f": condition index {number(index)} > {limit.max:g}{after}; variance "
                   f"proportions >= {limit.proportion:g}: {label}"
                   + (_offset_advice(d, columns, names, limit.max) if with_intercept else ""))
        out.append(Finding("condition_number", _finding_level(limit.level), features, index,
                           limit.max, message, subject="condition_index"))
    if diffuse:
        count = len(diffuse)
        out.append(Finding(
            "condition_number", "info", (), max(diffuse), limit.max,
            f"{count} condition ind{'ex' if count == 1 else 'ices'} over {limit.max:g} "
            f"(largest {number(max(diffuse))}){after} with fewer than two variance proportions "
            f">= {limit.proportion:g}: diffuse ill-conditioning spread over many columns, not "
            "one relation to remove (the VIFs show which features it inflates)",
            subject="condition_index"))
    return out


def _offset_advice(d: Diagnostics, columns: list[int], names: tuple[str, ...],
                   limit: float) -> str:
    """The intercept is involved: name the columns whose offset alone (their index with the
    intercept, ``offset_index``) exceeds the limit, and what to do about it."""
    offset = [names[c] for c in columns if offset_index(d, c) > limit]
    if not offset:
        return ("; the intercept is involved: the relation includes a constant term, "
                "so the mean levels of these columns are part of it")
    listed = ", ".join(offset)
    them = "it" if len(offset) == 1 else "them"
    return (f"; the intercept is involved because {listed} "
            f"{'sits' if len(offset) == 1 else 'sit'} far from zero relative to "
            f"{'its' if len(offset) == 1 else 'their'} spread (an offset, like a calendar year "
            f"or epoch seconds): centre {them} (subtract a typical value) or set "
            "`scaling: standardized` under limits.condition_number")


def _rank_findings(d: Diagnostics, names: tuple[str, ...], policy: Policy) -> list[Finding]:
    limit = policy.limits.rank_deficiency
    out: list[Finding] = []
    columns = d.features + 1
    if d.rows <= d.features:
        out.append(Finding(
            "rank_deficiency", _finding_level(limit.level), (), float(d.rows), float(columns),
            f"only {d.rows} rows for {columns} design columns (features plus intercept): at "
            f"least {columns - d.rows} exact dependencies are unavoidable; add rows or drop "
            "features", subject="rows"))
    for dep in d.dependencies:
        out.append(Finding("rank_deficiency", _finding_level(limit.level),
                           tuple(names[k] for k in sorted(dep.terms)), None, None,
                           describe_dependency(dep, names), subject="dependency",
                           value_kind="undefined"))
    return out


def describe_dependency(dep: Dependency, names: tuple[str, ...]) -> str:
    """Readable relation, solved for the feature the factorisation expressed."""
    lhs = names[dep.expressed]
    if dep.kind == "constant":
        return f"{lhs} is constant ({dep.constant:.6g} in every used row)"
    own = dep.terms[dep.expressed]
    rhs = [(names[k], -c / own) for k, c in dep.terms.items() if k != dep.expressed]
    constant = dep.constant / own
    text = _linear_text(rhs, constant)
    kind = "duplicate: " if dep.kind == "duplicate" else "exact dependency: "
    return f"{kind}{lhs} = {text}"


def _linear_text(terms: list[tuple[str, float]], constant: float) -> str:
    parts: list[str] = []
    for name, coef in terms:
        sign = "-" if coef < 0 else "+"
        magnitude = abs(coef)
        body = name if math.isclose(magnitude, 1.0, rel_tol=1e-9) else f"{magnitude:.6g}*{name}"
        parts.append(f"{sign} {body}")
    if abs(constant) > 1e-9 * max(1.0, *(abs(c) for _, c in terms)):
        parts.append(f"{'-' if constant < 0 else '+'} {abs(constant):.6g}")
    text = " ".join(parts)
    return text[2:] if text.startswith("+ ") else "-" + text[2:] if text else "0"


def _column_name(column: int, names: tuple[str, ...]) -> str:
    return INTERCEPT_NAME if column == INTERCEPT else names[column]


def waiver_covers(waiver_rule: str, listed: set[str] | frozenset[str], rule: str,
                  features: tuple[str, ...] | frozenset[str]) -> bool:
    """A waiver covers a finding of its rule when every feature of the finding is listed.

    A finding naming no feature (n <= p, a diffuse condition index) is not about the listed
    features: the empty set would match every waiver of its rule, so it is never covered.
    """
    return waiver_rule == rule and bool(features) and set(features) <= listed


def active_waivers(policy: Policy, today: dt.date) -> list[Waiver]:
    """Waivers not yet expired on ``today`` (an expired waiver covers nothing)."""
    return [w for w in policy.waivers if w.expires >= today]


def _apply_waivers(raw: list[Finding], policy: Policy, today: dt.date
                   ) -> tuple[tuple[Finding, ...], tuple[WaiverState, ...]]:
    findings = list(raw)
    states: list[WaiverState] = []
    extra: list[Finding] = []
    for index, waiver in enumerate(policy.waivers):
        listed = set(waiver.features)
        expired = waiver.expires < today
        covered = 0
        for pos, finding in enumerate(findings):
            if finding.waived or finding.level == "info" or \
                    not waiver_covers(waiver.rule, listed, finding.rule, finding.features):
                continue
            covered += 1
            if not expired:
                findings[pos] = replace(finding, waived=True, waiver=index)
        who = f"waiver {index + 1} ({waiver.rule}: {', '.join(waiver.features)}; owner " \
              f"{waiver.owner})"
        if expired:
            extra.append(Finding("waiver", "warn", tuple(waiver.features), None, None,
                                 f"{who} expired on {waiver.expires.isoformat()} and no longer "
                                 "applies; renew it with a new date or remove it",
                                 subject="waiver", value_kind="undefined"))
            states.append(WaiverState(index, waiver, "expired", covered))
        elif covered == 0:
            extra.append(Finding("waiver", "info", tuple(waiver.features), None, None,
                                 f"{who} is stale: no finding matches it; remove it",
                                 subject="waiver", value_kind="undefined"))
            states.append(WaiverState(index, waiver, "stale", 0))
        else:
            states.append(WaiverState(index, waiver, "active", covered))
            left = (waiver.expires - today).days
            if left <= WAIVER_EXPIRY_HORIZON_DAYS:
                extra.append(Finding(
                    "waiver", "info", tuple(waiver.features), float(left), None,
                    f"{who} expires on {waiver.expires.isoformat()} (in {left} day"
                    f"{'' if left == 1 else 's'}); it covers {covered} finding"
                    f"{'' if covered == 1 else 's'} now: renew it with a new date, or fix them "
                    "before then", subject="waiver"))
    return tuple(findings + extra), tuple(states)
