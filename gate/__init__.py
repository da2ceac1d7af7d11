"""collinearity-gate: check feature tables for multicollinearity against a written policy."""

from gate.api import check
from gate.errors import DesignError, GateError, GateFailed, OutputError, PolicyError, TableError
from gate.judge import Finding
from gate.policy import Policy, load_policy, parse_policy
from gate.read.sql import sql
from gate.verdict import Verdict

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
