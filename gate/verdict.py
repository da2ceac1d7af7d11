"""The verdict: a frozen object that answers questions and serialises to verdict.json.

Arrays stay inside ``Diagnostics``; feature names are reattached here, once.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from gate.design import Design
from gate.diagnostics import GRAM_RESOLUTION, INTERCEPT, Diagnostics
from gate.errors import GateFailed
from gate.judge import INTERCEPT_NAME, Finding, Status, WaiverState, describe_dependency
from gate.policy import Policy

SCHEMA_VERSION = 1
EXIT_CODES: dict[str, int] = {"pass": 0, "warn": 0, "fail": 1}


def tool_version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("collinearity-gate")
    except PackageNotFoundError:
        return "0+unknown"


@dataclass(frozen=True)
class TableInfo:
    source: str
    sha256: str | None
    rows: int
    rows_used: int
    rows_dropped: int
    missing: dict[str, int]


@dataclass(frozen=True)
class Verdict:
    status: Status
    findings: tuple[Finding, ...]
    waivers: tuple[WaiverState, ...]
    table: TableInfo
    policy: Policy
    design: Design
    diagnostics: Diagnostics
    label: str | None
    created_at: str  # UTC, ISO 8601
    tool_version: str

    @property
    def exit_code(self) -> int:
        """0 for pass or warn, 1 for fail (what `gate check` returns)."""
        return EXIT_CODES[self.status]

    @property
    def features(self) -> tuple[str, ...]:
        return self.design.features

    @property
    def passed(self) -> bool:
        return self.status != "fail"

    def raise_for_status(self) -> Verdict:
        """Raise :class:`gate.GateFailed` (carrying this verdict) when the status is fail."""
        if self.status == "fail":
            raise GateFailed(self)
        return self

    def vif(self) -> dict[str, float | None]:
        return {name: _number(v) for name, v in zip(self.features, self.diagnostics.vif)}

    def to_dict(self) -> dict[str, Any]:
        """The verdict.json document (interface v1 fields plus provenance)."""
        d = self.diagnostics
        names = self.features
        limits = self.policy.limits
        i, j, r = d.pairs(limits.pairwise_correlation.max)
        cond = d.condition
        breaching = [k for k in range(cond.indices.size)
                     if cond.indices[k] > limits.condition_number.max]
        return {
            "schema_version": SCHEMA_VERSION,
            "status": self.status,
            "label": self.label,
            "created_at": self.created_at,
            "tool": {"name": "collinearity-gate", "version": self.tool_version},
            "table": {
                "source": self.table.source,
                "sha256": self.table.sha256,
                "rows": self.table.rows,
                "rows_used": self.table.rows_used,
                "rows_dropped": self.table.rows_dropped,
                "missing": dict(self.table.missing),
                "weight": self.design.weight,
            },
            "policy": {
                "name": self.policy.name,
                "source": self.policy.source,
                "sha256": self.policy.sha256,
                "limits": self.policy.limits.model_dump(mode="json"),
            },
            "features": list(names),
            "groups": [
                {"column": g.column, "reference": g.reference,
                 "features": [names[k] for k in g.indices]}
                for g in self.design.groups
            ],
            "design_notes": list(self.design.notes),
            "diagnostics": {
                "vif": self.vif(),
                "gvif": {
                    g.column: {"gvif": _number(res.gvif), "df": res.df,
                               "gvif_adjusted": _number(res.adjusted)}
                    for g, res in zip(self.design.groups, d.groups)
                },
                "condition_number": _number(d.condition_number),
                "condition_number_reduced": _number(d.condition_number_reduced),
                "condition_scaling": cond.scaling,
                "condition_indices": [_number(v) for v in cond.indices],
                "variance_proportions": [
                    {"index": _number(cond.indices[k]),
                     "proportions": {_name(c, names): _number(cond.proportions[k, pos])
                                     for pos, c in enumerate(cond.columns)
                                     if cond.proportions[k, pos] >= 0.01}}
                    for k in breaching
                ],
                "rank": d.rank,
                "columns": d.features + 1,
                "dependencies": [
                    {"terms": {names[k]: c for k, c in dep.terms.items()},
                     "constant": dep.constant, "kind": dep.kind,
                     "relation": describe_dependency(dep, names)}
                    for dep in d.dependencies
                ],
                "pairs": [{"a": names[a], "b": names[b], "r": v}
                          for a, b, v in zip(i.tolist(), j.tolist(), r.tolist())],
                "rank_tolerance": d.rank_tolerance,
                "gram_resolution": GRAM_RESOLUTION,
                "route": d.route,
            },
            "findings": [
                {"rule": f.rule, "level": f.level, "features": list(f.features),
                 "value": _number(f.value), "limit": _number(f.limit), "waived": f.waived,
                 "waiver": f.waiver, "message": f.message}
                for f in self.findings
            ],
            "waivers": [
                {"rule": w.waiver.rule, "features": list(w.waiver.features),
                 "owner": w.waiver.owner, "reason": w.waiver.reason,
                 "expires": w.waiver.expires.isoformat(), "state": w.state,
                 "covered": w.covered}
                for w in self.waivers
            ],
        }


def _number(value: float | None) -> float | None:
    """JSON has no inf/NaN: null stands for infinite or undefined."""
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _name(column: int, names: tuple[str, ...]) -> str:
    return INTERCEPT_NAME if column == INTERCEPT else names[column]
