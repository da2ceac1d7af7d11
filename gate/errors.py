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

import reprlib
import unicodedata
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


#: Longest echo of a user-supplied value in a message (longer ones end in "…").
SHOWN_LIMIT = 200
_NAMED_ESCAPES = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}
_REPR = reprlib.Repr()
_REPR.maxlevel, _REPR.maxlist, _REPR.maxtuple, _REPR.maxdict = 3, 12, 12, 12
_REPR.maxstring = _REPR.maxother = SHOWN_LIMIT


def shown(value: object, limit: int | None = SHOWN_LIMIT, *, quote: bool = False) -> str:
    """A user-supplied value made safe to echo in a one-line message.

    Text is used as it is; anything else as a bounded ``repr`` (nested containers abbreviated).
    Control and format characters (newline, ESC, bidi overrides, line separators) are written as
    escapes such as ``\\n``, ``\\x1b`` or ``\\u202e``, so a value can neither break the line nor
    drive the terminal. The result is cut to ``limit`` characters, the last being "…" (``None``:
    no cut). ``quote=True`` wraps text in single quotes, outside the limit.
    """
    text = value if isinstance(value, str) else _REPR.repr(value)
    pieces: list[str] = []
    size = 0
    cut = False
    for ch in text:
        if unicodedata.category(ch) in ("Cc", "Cf", "Zl", "Zp"):
            code = ord(ch)
            piece = _NAMED_ESCAPES.get(ch) or (f"\\x{code:02x}" if code < 0x100 else
                                              f"\\u{code:04x}" if code < 0x10000 else
                                              f"\\U{code:08x}")
        else:
            piece = ch
        if limit is not None and size + len(piece) > limit:
            cut = True
            break
        pieces.append(piece)
        size += len(piece)
    if cut and limit is not None:
        while pieces and size + 1 > limit:
            size -= len(pieces.pop())
        pieces.append("…")
    result = "".join(pieces)
    return f"'{result}'" if quote and isinstance(value, str) else result


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

