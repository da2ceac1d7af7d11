"""Exceptions raised by collinearity-gate.

    GateError                 every error the CLI reports as "unusable input" (exit 2)
    ├── PolicyError           the policy file is unreadable or invalid
    ├── TableError            the table is unreadable, or a column cannot be used
    ├── DesignError           the design matrix cannot be built (missing values, weights, ...)
    └── OutputError           an artefact cannot be written (folder not writable, disk full)
    GateFailed                raised by Verdict.raise_for_status(); carries the verdict

ExitCode is the one set of exit codes every command returns.

PolicyError, TableError and DesignError are also ValueErrors, so callers that
already catch ValueError keep working. Messages are one line: what, where, and the fix.
"""

from __future__ import annotations

from enum import IntEnum
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from gate.judge.verdict import Verdict


class ExitCode(IntEnum):
    """Exit codes of every `gate` command."""

    OK = 0  # pass or warn; or the command did what it was asked
    FAILED = 1  # the gate failed (or: NEW is worse, the chain is broken, no drop set passes)
    BAD_INPUT = 2  # unusable input: one line on stderr, no traceback
    INTERNAL = 3  # a bug: the traceback is printed
    INTERRUPTED = 130  # Ctrl-C (128 + SIGINT, the shell's convention)


class GateError(Exception):
    """Base class of every error caused by unusable input."""


class PolicyError(GateError, ValueError):
    """The policy file is missing, not YAML, or breaks the policy schema."""


class TableError(GateError, ValueError):
    """The table cannot be read, or a selected column cannot be used."""


class DesignError(GateError, ValueError):
    """The design matrix cannot be built from the table under the policy."""


class OutputError(GateError, OSError):
    """An artefact could not be written; nothing half-written is left behind."""


class GateFailed(Exception):
    """The gate judged the table as failing; ``verdict`` holds the details."""

    def __init__(self, verdict: Verdict, message: str) -> None:
        self.verdict = verdict
        super().__init__(message)


_ESCAPES = {"\n": "\\n", "\t": "\\t", "\r": "\\r"}


def shown(value: object, limit: int = 200) -> str:
    """A user-supplied value (column name, cell, key) made safe to echo in a one-line message.

    Characters below 0x20, 0x7f and 0x80-0x9f are escaped (``\\n``, ``\\t``, ``\\r``, else
    ``\\xNN``) so a value cannot forge lines or send terminal escape sequences; the text is cut
    at ``limit`` characters with "…" appended. No quotes are added (callers quote as they like).
    """
    text = value if isinstance(value, str) else str(value)
    cut = len(text) > limit
    if cut:
        text = text[:limit]
    out = []
    for char in text:
        code = ord(char)
        if code < 0x20 or code == 0x7F or 0x80 <= code <= 0x9F:
            out.append(_ESCAPES.get(char, f"\\x{code:02x}"))
        else:
            out.append(char)
    return "".join(out) + ("…" if cut else "")
