"""collinearity-gate: check feature tables for multicollinearity against a written policy.

The public names load on first use (module ``__getattr__``, PEP 562), so ``import gate`` and
the ``gate --version`` / ``gate --help`` commands import neither numpy nor pandas; ``from gate
import check`` and ``gate.check`` work as usual and import the pipeline then.
"""

from __future__ import annotations

import importlib as _importlib
import typing as _typing

from gate.errors import DesignError, GateError, GateFailed, OutputError, PolicyError, TableError

if _typing.TYPE_CHECKING:
    from gate.api import check
    from gate.judge.findings import Finding
    from gate.judge.verdict import Verdict
    from gate.policy.models import Policy, load_policy, parse_policy
    from gate.read.sql import sql

#: Public name -> the module that defines it (imported on first access).
_LAZY = {
    "Finding": "gate.judge.findings",
    "Policy": "gate.policy.models",
    "Verdict": "gate.judge.verdict",
    "check": "gate.api",
    "load_policy": "gate.policy.models",
    "parse_policy": "gate.policy.models",
    "sql": "gate.read.sql",
}

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


def __getattr__(name: str) -> object:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'gate' has no attribute {name!r}")
    value = getattr(_importlib.import_module(module), name)
    globals()[name] = value  # later lookups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
