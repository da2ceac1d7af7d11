"""The audit log (``--audit-log FILE``): append-only JSON Lines, one hash-chained entry per check.

Each line is one JSON object in canonical form (sorted keys, no spaces)::

    {"hash": ..., "label": ..., "policy_sha256": ..., "prev": ..., "seq": 1,
     "status": "fail", "table": ..., "table_sha256": ..., "time": ...,
     "tool_version": ..., "verdict_sha256": ...}

* ``prev`` is the sha256 of the previous line's bytes (without its newline); the first entry
  uses ``GENESIS`` (64 zeros). Editing, removing or reordering any entry breaks the link of the
  entry after it.
* ``hash`` is the sha256 of the entry's canonical JSON without the ``hash`` key, so editing an
  entry breaks its own hash even when it is the last one.
* ``seq`` counts entries from 1, so a verifier can say which entry went missing.

Concurrency and crashes: an exclusive ``fcntl.flock`` covers reading the last entry and
appending the new one, so two processes never interleave or chain to the same predecessor.
Each entry is one ``os.write`` of a whole line on an ``O_APPEND`` descriptor, followed by
``fsync``; a crash can at worst leave a torn *last* line, which earlier entries never depend
on. :func:`verify_chain` reports such a line, and appending refuses to chain onto it.

A hash chain cannot notice entries cut off the *end* of the file; compare the head hash
reported by :func:`verify_chain` with one recorded elsewhere (``expected_head``) for that.
"""

from __future__ import annotations

import datetime as dt
import fcntl
import hashlib
import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from gate.errors import OutputError
from gate.judge.verdict import Verdict

GENESIS = "0" * 64
ENTRY_KEYS = ("hash", "label", "policy_sha256", "prev", "seq", "status", "table",
              "table_sha256", "time", "tool_version", "verdict_sha256")
_TAIL_BLOCK = 8192


def canonical(entry: dict[str, Any]) -> bytes:
    """Canonical JSON bytes of an entry: sorted keys, no whitespace, UTF-8."""
    return json.dumps(entry, sort_keys=True, separators=(",", ":"),
                      ensure_ascii=False, allow_nan=False).encode("utf-8")


def entry_hash(entry: dict[str, Any]) -> str:
    """sha256 of the entry's canonical JSON without its own ``hash`` key."""
    body = {k: v for k, v in entry.items() if k != "hash"}
    return hashlib.sha256(canonical(body)).hexdigest()


def append_entry(path: str | Path, verdict: Verdict, verdict_sha256: str,
                 *, now: dt.datetime | None = None) -> dict[str, Any]:
    """Append one entry for ``verdict`` (whose verdict.json bytes hash to ``verdict_sha256``)."""
    file = Path(path)
    moment = now or dt.datetime.now(dt.UTC)
    try:
        if file.parent != Path():
            file.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(file, os.O_RDWR | os.O_CREAT | os.O_APPEND, 0o644)
    except OSError as exc:
        raise OutputError(f"{file}: cannot open the audit log ({exc.strerror or exc}); "
                          "choose a writable --audit-log path") from None
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)  # released when fd closes, also if we crash
        last = _last_line(fd, file)
        if last is None:
            prev, seq = GENESIS, 1
        else:
            try:
                previous = json.loads(last)
                seq = int(previous["seq"]) + 1
            except (ValueError, KeyError, TypeError):
                raise OutputError(f"{file}: the last line is not an audit entry; run "
                                  f"`gate audit verify {file}` and repair the log before "
                                  "appending") from None
            prev = hashlib.sha256(last).hexdigest()
        entry: dict[str, Any] = {
            "label": verdict.label,
            "policy_sha256": verdict.policy.sha256,
            "prev": prev,
            "seq": seq,
            "status": verdict.status,
            "table": verdict.table.source,
            "table_sha256": verdict.table.sha256,
            "time": moment.astimezone(dt.UTC).isoformat(timespec="seconds"),
            "tool_version": verdict.tool_version,
            "verdict_sha256": verdict_sha256,
        }
        entry["hash"] = entry_hash(entry)
        line = canonical(entry) + b"\n"
        written = os.write(fd, line)
        if written != len(line):
            raise OutputError(f"{file}: short write to the audit log ({written} of "
                              f"{len(line)} bytes); check free disk space")
        os.fsync(fd)
        return entry
    except OSError as exc:
        if isinstance(exc, OutputError):
            raise
        raise OutputError(f"{file}: cannot append to the audit log ({exc.strerror or exc})"
                          ) from None
    finally:
        os.close(fd)


def _last_line(fd: int, file: Path) -> bytes | None:
    """The last complete line (without newline), or None for an empty log."""
    size = os.fstat(fd).st_size
    if size == 0:
        return None
    tail = b""
    position = size
    while position > 0:
        start = max(0, position - _TAIL_BLOCK)
        tail = os.pread(fd, position - start, start) + tail
        position = start
        if tail.count(b"\n") >= 2 or position == 0:
            break
    if not tail.endswith(b"\n"):
        raise OutputError(f"{file}: the last entry is incomplete (a write was cut off); run "
                          f"`gate audit verify {file}`, move the damaged log aside, and start "
                          "a new one or restore it from a copy")
    return tail[:-1].rsplit(b"\n", 1)[-1]


@dataclass(frozen=True)
class ChainReport:
    """Outcome of :func:`verify_chain`. ``bad_line`` is 1-based; None when the log is intact."""

    path: str
    entries: int
    head: str | None  # hash of the last intact entry's line
    bad_line: int | None = None
    problem: str | None = None

    @property
    def ok(self) -> bool:
        return self.bad_line is None

    def describe(self) -> str:
        if self.ok:
            head = self.head or GENESIS
            return (f"{self.path}: intact, {self.entries} entr{'y' if self.entries == 1 else 'ies'}"
                    f"; head {head}")
        return f"{self.path}: line {self.bad_line}: {self.problem}"


def verify_chain(path: str | Path, *, expected_head: str | None = None) -> ChainReport:
    """Check every entry of an audit log; report the first edited, removed, reordered or
    truncated one.

    ``head`` is the sha256 of the last line: record it elsewhere and pass it back as
    ``expected_head`` to notice entries removed from the end of the file.
    """
    file = Path(path)
    try:
        data = file.read_bytes()
    except FileNotFoundError:
        raise OutputError(f"{file}: audit log not found; check the path") from None
    except OSError as exc:
        raise OutputError(f"{file}: cannot read the audit log ({exc.strerror or exc})"
                          ) from None
    name = str(file)
    lines = data.split(b"\n")
    torn = lines[-1] != b""  # the file must end with a newline
    if not torn:
        lines = lines[:-1]
    prev = GENESIS
    # line hash -> line number over the whole file, to tell reordering from removal
    everywhere = {hashlib.sha256(line).hexdigest(): k for k, line in enumerate(lines, start=1)}
    hashes: dict[str, int] = {}  # the same, for the lines verified so far
    for number, line in enumerate(lines, start=1):
        def bad(problem: str, number: int = number, prev: str = prev) -> ChainReport:
            return ChainReport(name, number - 1, prev if number > 1 else None, number, problem)

        if torn and number == len(lines):
            return bad("truncated: the last entry is incomplete (no line end), as a write "
                       "cut off by a crash or a truncation leaves it")
        try:
            entry = json.loads(line)
        except ValueError:
            return bad("edited: not valid JSON")
        if not isinstance(entry, dict) or set(entry) != set(ENTRY_KEYS):
            return bad("edited: not an audit entry (its keys differ)")
        if canonical(entry) != line:
            return bad("edited: the entry is not in the canonical form it was written in")
        if entry["hash"] != entry_hash(entry):
            return bad("edited: its content no longer matches its hash")
        if entry["prev"] != prev:
            before = everywhere.get(entry["prev"])
            if entry["prev"] == GENESIS:
                return bad("reordered: it claims to be the first entry")
            if before is not None and before > number:
                return bad(f"reordered: it should follow line {before}, which comes after it")
            if before is not None:
                return bad(f"removed: it should follow line {before}; the entries between are "
                           "missing")
            if entry["seq"] == number and number > 1:
                # Nothing is missing, so the line before was rewritten (hash recomputed).
                return ChainReport(name, number - 2, None, number - 1,
                                   "edited: its bytes no longer match the hash recorded by the "
                                   "entry after it")
            return bad(f"removed: the entry before it (seq {entry['seq'] - 1}) is missing")
        if entry["seq"] != number:
            return bad(f"removed or reordered: seq {entry['seq']} at entry {number}")
        prev = hashlib.sha256(line).hexdigest()
        hashes[prev] = number
    head = prev if lines else None
    if expected_head is not None and expected_head != head and expected_head not in hashes:
        # Entries appended after the recorded head are fine; a head that vanished is not.
        return ChainReport(name, len(lines), head, len(lines) + 1,
                           "truncated or replaced: the expected head entry is not in the log "
                           f"(it ends after {len(lines)} intact entries)")
    return ChainReport(name, len(lines), head)
