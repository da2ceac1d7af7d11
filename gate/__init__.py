"""collinearity-gate: check feature tables for multicollinearity against a written policy."""

from gate.api import check
from gate.errors import DesignError, GateError, GateFailed, OutputError, PolicyError, TableError
from gate.judge.findings import Finding
from gate.judge.verdict import Verdict
from gate.policy.models import Policy, load_policy, parse_policy
from gate.read.sql import sql

__all__ = [
    "DesignError",
    "Finding",
    "GateError",
    "GateFailed",
    "OutputError",
    "Policy",
    "PolicyError",
    "TableError",
    "Verdict",
    "check",
    "load_policy",
    "parse_policy",
    "sql",
]
