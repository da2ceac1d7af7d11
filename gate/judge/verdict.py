"""The verdict: a frozen object that answers questions and serialises to verdict.json.

Arrays stay inside ``Diagnostics``; feature names are reattached here, once.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any

from gate.design.plan import Design
from gate.diagnose.auxiliary import Auxiliary, auxiliary_for
from gate.diagnose.diagnostics import Diagnostics
from gate.diagnose.structural import StructuralTerm
from gate.errors import GateFailed
from gate.judge.findings import (
    Finding,
    Status,
    counts_text,
    exit_code_of,
    finite_or_none,
    status_of,
    unwaived,
)
from gate.judge.rules import INTERCEPT_NAME, WaiverState, describe_dependency, vif_breaches
from gate.numerics.kernels import INTERCEPT
from gate.policy.models import Policy
from gate.stats.routing import GRAM_RESOLUTION

SCHEMA_VERSION = 1


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
    database: dict[str, Any] | None = None  # gate.sql provenance (password masked)


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
    structural: tuple[StructuralTerm, ...] = ()  # squares/products among breaching features
    segments: tuple[SegmentVerdict, ...] = ()  # per-segment verdicts (policy `segments`)
    #: `--full-matrices` was asked: verdict.json carries every feature's auxiliary regression,
    #: not only the breaching features' (see ``auxiliary``).
    full_matrices: bool = False

    @property
    def exit_code(self) -> int:
        """0 for pass or warn, 1 for fail (what `gate check` returns)."""
        return int(exit_code_of(self.status))

    @property
    def features(self) -> tuple[str, ...]:
        return self.design.features

    @property
    def passed(self) -> bool:
        return self.status != "fail"

    def raise_for_status(self) -> Verdict:
        """Raise :class:`gate.GateFailed` (carrying this verdict) when the status is fail."""
        if self.status == "fail":
            worst = unwaived(self.findings, "fail")
            detail = "; ".join(f.message for f in worst[:3])
            more = f" (+{len(worst) - 3} more)" if len(worst) > 3 else ""
            raise GateFailed(self, f"collinearity gate failed: {detail}{more}")
        return self

    def vif(self) -> dict[str, float | None]:
        return {name: finite_or_none(v) for name, v in zip(self.features, self.diagnostics.vif)}

    def effective_rows(self) -> dict[str, float]:
        """n / VIF per feature (n / GVIF^(1/df) per categorical column).

        Var(b_j) = sigma^2 VIF_j / (n s_j^2): the coefficient is as precise as it would be with
        n / VIF_j rows of uncorrelated features, and its standard error grows by sqrt(VIF_j).
        0 for a feature in an exact dependency (its coefficient is not identified).
        """
        n = float(self.diagnostics.rows)
        out = {name: _effective(n, float(v)) for name, v in zip(self.features,
                                                                 self.diagnostics.vif)}
        for group, result in zip(self.design.groups, self.diagnostics.groups):
            out[group.column] = _effective(n, result.vif_scale)
        return out

    def with_full_matrices(self) -> Verdict:
        """This verdict, reporting every feature's auxiliary regression (``--full-matrices``)."""
        return replace(self, full_matrices=True)

    def auxiliary(self) -> dict[str, Auxiliary]:
        """Auxiliary regressions by feature name: for each feature whose VIF breaches the VIF
        limit (dummies are judged as groups and excluded), or for every feature when
        ``full_matrices``. Features inside an exact dependency have none (see dependencies)."""
        limit = self.policy.limits.vif
        grouped = {k for g in self.design.groups for k in g.indices}
        d = self.diagnostics
        out: dict[str, Auxiliary] = {}
        if not self.full_matrices and limit.level == "off":
            return out
        for k, name in enumerate(self.features):
            wanted = self.full_matrices or (limit.level != "off" and k not in grouped
                                            and vif_breaches(float(d.vif[k]), limit.max))
            aux = auxiliary_for(d, k) if wanted else None
            if aux is not None:
                out[name] = aux
        return out

    def with_segments(self, segments: tuple[SegmentVerdict, ...]) -> Verdict:
        """This (whole-table) verdict plus one finding per segment; status = the worst."""
        extra = tuple(f for f in (segment.finding() for segment in segments) if f is not None)
        findings = self.findings + extra
        return replace(self, segments=segments, findings=findings, status=status_of(findings))

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
                **({"database": dict(self.table.database)} if self.table.database else {}),
            },
            "policy": {
                "name": self.policy.name,
                "source": self.policy.source,
                "sha256": self.policy.sha256,
                "effective_sha256": self.policy.effective_sha256,
                "limits": self.policy.limits.model_dump(mode="json"),
            },
            "target": list(self.policy.columns.target),
            "features": list(names),
            "groups": [
                {"column": g.column, "reference": g.reference,
                 "reference_reason": g.reference_reason,
                 "features": [names[k] for k in g.indices]}
                for g in self.design.groups
            ],
            "design_notes": list(self.design.notes),
            "diagnostics": {
                "vif": self.vif(),
                "gvif": {
                    g.column: {"gvif": finite_or_none(res.gvif), "df": res.df,
                               "gvif_adjusted": finite_or_none(res.adjusted),
                               "vif_equivalent": finite_or_none(res.vif_scale),
                               "se_inflation": finite_or_none(res.adjusted)}
                    for g, res in zip(self.design.groups, d.groups)
                },
                "auxiliary": {
                    name: {"r2": finite_or_none(aux.r2),
                           "intercept": finite_or_none(aux.shown_intercept()),
                           "coefficients": {names[c]: finite_or_none(v)
                                            for c, v, _ in aux.shown_terms()},
                           "terms_left_out": aux.omitted(),
                           "residual_sd": finite_or_none(aux.residual_sd),
                           "equation": aux.equation(names)}
                    for name, aux in self.auxiliary().items()
                },
                "condition_number": finite_or_none(d.condition_number),
                "condition_number_after_removing_dependencies": finite_or_none(
                    d.condition_number_reduced),
                "condition_scaling": cond.scaling,
                "condition_indices": [finite_or_none(v) for v in cond.indices],
                "variance_proportions": [
                    {"index": finite_or_none(cond.indices[k]),
                     "proportions": {_name(c, names): finite_or_none(share)
                                     for c, share in zip(cond.columns, cond.shares(k).tolist())
                                     if share >= 0.01}}
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
                "gram_vif_error_bound": finite_or_none(d.gram_vif_error_bound),
                "route": d.route,
                "effective_rows": {k: finite_or_none(v) for k, v in self.effective_rows().items()},
                "se_inflation": {name: finite_or_none(math.sqrt(v)) if v >= 1 else None
                                 for name, v in zip(names, d.vif.tolist())},
                "structural": [
                    {"feature": names[t.feature], "kind": t.kind,
                     "parents": [names[k] for k in t.parents], "r": t.correlation,
                     "sample_rows": t.sample_rows, "vif": finite_or_none(t.vif),
                     "vif_centred": finite_or_none(t.vif_centred),
                     "parent_vif": [finite_or_none(v) for v in t.parent_vif],
                     "parent_vif_centred": [finite_or_none(v) for v in t.parent_vif_centred],
                     "computed": t.computed, "max_residual": finite_or_none(t.max_residual)}
                    for t in self.structural
                ],
            },
            "findings": [
                {"rule": f.rule, "level": f.level, "features": list(f.features),
                 "subject": f.subject, "segment": f.segment, "value_kind": f.value_kind,
                 "value": finite_or_none(f.value), "limit": finite_or_none(f.limit), "waived": f.waived,
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
            **({"segments": [s.to_dict() for s in self.segments]}
               if self.segments or self.policy.segments is not None else {}),
        }


def _effective(n: float, inflation: float) -> float:
    if math.isinf(inflation):
        return 0.0
    return n / inflation if inflation >= 1.0 else math.nan


@dataclass(frozen=True)
class SegmentVerdict:
    """One segment's verdict; ``verdict`` is None when the segment was reported, not judged."""

    by: tuple[str, ...]
    key: tuple[str | None, ...]
    rows: int
    rows_used: int
    verdict: Verdict | None
    reason: str | None = None

    @property
    def label(self) -> str:
        return ", ".join(f"{c}={'(missing)' if v is None else v}"
                         for c, v in zip(self.by, self.key))

    @property
    def judged(self) -> bool:
        return self.verdict is not None

    @property
    def status(self) -> str:
        return self.verdict.status if self.verdict is not None else "not_judged"

    def finding(self) -> Finding | None:
        """The whole-table finding that carries this segment's outcome (None: it passes;
        verdict.json's ``segments`` still lists it)."""
        if self.verdict is None:
            return Finding("segment", "info", (), float(self.rows_used), None,
                           f"segment {self.label}: reported, not judged ({self.reason})",
                           subject="segment", segment=self.label)
        if self.verdict.status == "pass":
            return None
        level = self.verdict.status
        worst = unwaived(self.verdict.findings, level)
        order = {name: k for k, name in enumerate(self.verdict.features)}
        features = tuple(sorted({x for f in worst for x in f.features},
                                key=lambda name: (order.get(name, len(order)), name)))
        first = f"; worst: {worst[0].message}" if worst else ""
        return Finding("segment", level, features, None, None,
                       f"segment {self.label} ({self.rows_used:,} rows): "
                       f"{self.verdict.status} ({counts_text(self.verdict.findings)}){first}",
                       subject="segment", value_kind="undefined", segment=self.label)

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "key": dict(zip(self.by, self.key)), "label": self.label, "status": self.status,
            "judged": self.judged, "reason": self.reason, "rows": self.rows,
            "rows_used": self.rows_used,
        }
        if self.verdict is not None:
            inner = self.verdict.to_dict()
            out["features"] = inner["features"]
            out["findings"] = inner["findings"]
            diagnostics = inner["diagnostics"]
            out["diagnostics"] = {k: diagnostics[k] for k in (
                "vif", "gvif", "effective_rows", "condition_number", "rank", "dependencies",
                "pairs")}
        return out


def _name(column: int, names: tuple[str, ...]) -> str:
    return INTERCEPT_NAME if column == INTERCEPT else names[column]
