"""JSON Schema for the policy file and for verdict.json, generated from pydantic models.

The policy schema comes straight from :class:`gate.policy.models.Policy`. The verdict document is
produced by ``Verdict.to_dict`` (gate/verdict.py); the models below describe that document so
its schema is generated, not hand-written, and ``tests/test_schemas.py`` validates real verdicts
against it. Objects that later versions may extend allow extra keys; closed records (findings,
pairs, dependencies, waivers) do not, so a renamed field is caught.
"""

from __future__ import annotations

import json
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from gate.policy.models import Limits, Policy

JSON_SCHEMA_DIALECT = "https://json-schema.org/draft/2020-12/schema"
Number = float | None  # null stands for infinite or undefined (JSON has no inf/NaN)


class _Open(BaseModel):
    model_config = ConfigDict(extra="allow")


class _Closed(BaseModel):
    model_config = ConfigDict(extra="forbid")


class ToolInfo(_Open):
    name: Literal["collinearity-gate"]
    version: str


class DatabaseSource(_Closed):
    url: str = Field(description="Database URL with the password replaced by ***.")
    backend: Literal["duckdb", "postgresql"]
    query: str = Field(description="The query text the gate wrapped (a --db-table becomes "
                       "SELECT * FROM the quoted name).")
    query_sha256: str = Field(description="sha256 of the query text (UTF-8).")
    rows_reported: int = Field(ge=0, description="Row count the database reported.")
    statistics: Literal["streamed", "push-down"] = Field(
        description="Rows streamed to the gate, or sums computed inside the database.")
    exact_pass_streamed: bool = Field(description="True when push-down sums could not settle "
                                      "the rank and the rows were streamed for the exact pass.")


class TableSummary(_Open):
    source: str = Field(description="Path of the table (or <DataFrame> from the Python API).")
    sha256: str | None = Field(description="sha256 of the table file's bytes; null when the "
                               "table was not a file.")
    rows: int = Field(ge=0)
    rows_used: int = Field(ge=0)
    rows_dropped: int = Field(ge=0)
    missing: dict[str, int] = Field(description="Missing values per column (columns with any).")
    weight: str | None = Field(description="Weight column, if the policy names one.")
    database: DatabaseSource | None = Field(
        default=None, description="Present when the table was a database query (gate.sql).")


class PolicySummary(_Open):
    name: str
    source: str | None
    sha256: str = Field(description="sha256 of the policy file's bytes (of the effective "
                        "policy when it was built in code).")
    effective_sha256: str = Field(description="sha256 of the policy as checked: its canonical "
                                  "JSON (all keys with defaults, sorted, compact, UTF-8).")
    limits: Limits


class GroupSummary(_Closed):
    column: str
    reference: str
    reference_reason: str = Field(description="Why this level is the reference: the most "
                                  "frequent among the used rows, or set by columns.reference.")
    features: list[str]


class GroupInflation(_Closed):
    gvif: Number
    df: int = Field(ge=1)
    gvif_adjusted: Number = Field(description="GVIF^(1/(2 df)) (interface v1 name; the same "
                                  "value as se_inflation).")
    vif_equivalent: Number = Field(description="GVIF^(1/df): the value judged against "
                                   "limits.vif.max.")
    se_inflation: Number = Field(description="GVIF^(1/(2 df)): the factor on the standard "
                                 "errors, comparable to sqrt(VIF).")


class AuxiliaryRecord(_Closed):
    """feature = intercept + sum(coefficients[k] * k) + residual, fitted by least squares on the
    other features (weighted when the policy names a weight column)."""

    r2: Number = Field(description="R^2 of the regression = 1 - 1/VIF.")
    intercept: Number = Field(description="Constant of the listed equation: the fit's intercept "
                             "with each left-out regressor held at its mean.")
    coefficients: dict[str, Number] = Field(description="Slopes in the features' own units "
                                           "of the regressors whose |standardised coefficient| "
                                           "is at least 0.05, largest first (the fit uses every "
                                           "feature, one column per exact dependency removed).")
    terms_left_out: int = Field(ge=0, description="Regressors below 0.05 not listed (their "
                                "slopes follow from matrices.npz's inverse correlation).")
    residual_sd: Number = Field(description="sqrt(weighted residual sum of squares / "
                                "(n - regressors - 1)); null when no degrees of freedom are "
                                "left.")
    equation: str = Field(description="The relation as text; terms with |standardised "
                          "coefficient| < 0.05 are left out.")


class VarianceProportions(_Closed):
    index: Number
    proportions: dict[str, Number] = Field(
        description="Variance-decomposition proportions >= 0.01 on this condition index.")


class DependencyRecord(_Closed):
    terms: dict[str, float] = Field(description="sum(coef * feature) = constant; largest "
                                    "|coef| = 1.")
    constant: float
    kind: Literal["constant", "duplicate", "linear"]
    relation: str


class PairRecord(_Closed):
    a: str
    b: str
    r: float = Field(ge=-1.0000001, le=1.0000001)


class StructuralRecord(_Open):
    """A feature that is (nearly) a square or product of others."""

    feature: str
    kind: Literal["square", "product"]
    parents: list[str]
    r: float
    sample_rows: int = Field(ge=0)
    vif: Number
    vif_centred: Number
    parent_vif: list[Number]
    parent_vif_centred: list[Number]
    computed: bool = Field(description="The term equals the transform of its parents to rounding "
                           "over the sample (computed), not only approximately (measured).")
    max_residual: Number = Field(description="Largest |term - fit| over the sample.")


class Diagnostics(_Open):
    vif: dict[str, Number] = Field(description="VIF per feature; null = infinite.")
    gvif: dict[str, GroupInflation]
    auxiliary: dict[str, AuxiliaryRecord] = Field(
        description="Auxiliary regression of each feature whose VIF breaches the limit (every "
        "feature with --full-matrices); none for features inside an exact dependency.")
    condition_number: Number = Field(description="null when the design is rank deficient "
                                     "(the condition number is infinite).")
    condition_number_after_removing_dependencies: Number = Field(
        description="Largest condition index after removing one column per exact dependency: "
        "the value the condition_number limit judges (equal to condition_number when there is "
        "no exact dependency).")
    condition_scaling: Literal["unit_length", "standardized"]
    condition_indices: list[Number]
    variance_proportions: list[VarianceProportions]
    rank: int = Field(ge=0)
    columns: int = Field(ge=1)
    dependencies: list[DependencyRecord]
    pairs: list[PairRecord]
    rank_tolerance: float
    gram_resolution: float
    gram_vif_error_bound: Number = Field(
        default=None, description="Relative error bound of a VIF from the centred Gram; the "
        "exact (TSQR) route runs when it exceeds 1e-9 (null: not certified).")
    route: str
    effective_rows: dict[str, Number] | None = Field(
        default=None, description="n / VIF per feature (n / GVIF^(1/df) per group).")
    se_inflation: dict[str, Number] | None = Field(
        default=None, description="sqrt(VIF) per feature; null = infinite.")
    structural: list[StructuralRecord] | None = None


class FindingRecord(_Closed):
    rule: str
    level: Literal["fail", "warn", "info"]
    features: list[str] = Field(description="Canonical order: the design's column order.")
    subject: Literal["feature", "pair", "group", "dependency", "condition_index", "rows",
                     "waiver", "segment", "structural"] = Field(
        description="What the finding is about; with rule, features and segment its identity.")
    segment: str | None = Field(description="Segment label; null for the whole table.")
    value_kind: Literal["finite", "infinite", "undefined"] = Field(
        description="finite: value holds the number; infinite or undefined: value is null.")
    value: Number
    limit: Number
    waived: bool
    waiver: int | None = Field(description="Index into the policy's waivers.")
    message: str


class WaiverRecord(_Closed):
    rule: str
    features: list[str]
    owner: str
    reason: str
    expires: str
    state: Literal["active", "expired", "stale"]
    covered: int = Field(ge=0)


class SegmentDiagnostics(_Open):
    vif: dict[str, Number]
    gvif: dict[str, GroupInflation]
    condition_number: Number
    rank: int = Field(ge=0)
    dependencies: list[DependencyRecord]
    pairs: list[PairRecord]


class SegmentRecord(_Open):
    """One segment's outcome (policy key ``segments``)."""

    key: dict[str, str | None]
    label: str
    status: Literal["pass", "warn", "fail", "not_judged"]
    judged: bool
    reason: str | None
    rows: int = Field(ge=0)
    rows_used: int = Field(ge=0)
    features: list[str] | None = None
    findings: list[FindingRecord] | None = None
    diagnostics: SegmentDiagnostics | None = None


class VerdictDocument(_Open):
    """verdict.json, as written by `gate check`."""

    schema_version: Literal[1]
    status: Literal["pass", "warn", "fail"]
    label: str | None
    created_at: str = Field(description="UTC time, ISO 8601.")
    tool: ToolInfo
    table: TableSummary
    policy: PolicySummary
    target: list[str] = Field(description="Target column(s) named by the policy "
                              "(columns.target); never features.")
    features: list[str]
    groups: list[GroupSummary]
    design_notes: list[str]
    diagnostics: Diagnostics
    findings: list[FindingRecord]
    waivers: list[WaiverRecord]
    segments: list[SegmentRecord] | None = Field(
        default=None, description="Per-segment outcomes, when the policy sets segments.")


def policy_schema() -> dict[str, Any]:
    """JSON Schema of the policy file."""
    return _with_header(Policy.model_json_schema(), "collinearity-gate policy")


def verdict_schema() -> dict[str, Any]:
    """JSON Schema of verdict.json."""
    return _with_header(VerdictDocument.model_json_schema(), "collinearity-gate verdict")


def schema_text(schema: dict[str, Any]) -> str:
    return json.dumps(schema, indent=2, sort_keys=False) + "\n"


def _with_header(schema: dict[str, Any], title: str) -> dict[str, Any]:
    return {"$schema": JSON_SCHEMA_DIALECT, **schema, "title": title}
