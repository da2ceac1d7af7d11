"""The audit log (``--audit-log FILE``): append-only JSON Lines, one hash-chained entry per check,
plus a content-addressed store of the verdicts beside it.

Each line is one JSON object in canonical form (sorted keys, no spaces)::

    {"created_at": ..., "format": 2, "hash": ..., "label": ..., "policy": {"name": ...,
     "sha256": ...}, "prev": ..., "seq": 1, "status": "fail", "table": {"sha256": ...,
     "source": ...}, "tool": {"version": ...}, "verdict": {"sha256": ...}}

The field names are verdict.json's (``created_at``, ``table.sha256``, ``policy.sha256``); the
values are copied from the verdict the entry records.

* One chain: ``hash`` is the sha256 of the entry's canonical JSON without the ``hash`` key (so
  it covers ``prev``); ``prev`` is the previous entry's ``hash``; the first entry's ``prev`` is
  ``GENESIS`` (64 zeros). The head that :func:`verify_chain` reports is the last entry's
  ``hash``. Editing, removing, reordering or replaying any entry breaks a link or a hash.
* ``seq`` counts entries from 1, so a verifier can say which entry went missing.
* The store: the exact verdict.json bytes go to ``verdicts/<sha256>.json`` beside the log
  (written before the entry, atomically). The log plus the store is the whole record;
  :func:`verify_chain` re-hashes every stored verdict and names any that is missing.
* Beside each stored verdict, ``verdicts/<sha256>.summary`` keeps the few fields `gate
  history` reads (:func:`summarise`: a pruned copy of the verdict, a few KiB instead of tens),
  and the entry records its sha256 as ``verdict.summary_sha256``, so the chain covers it too.
  The summary is derived data, not part of the record: a reader re-hashes it and falls back
  to the full verdict when it is missing or altered. Entries written without it (and logs
  written before it existed) simply have no ``summary_sha256``.

Logs written before this form (entries without ``format``; their ``prev`` is the sha256 of the
previous *line*, and they have no stored verdict) are read as they are: such entries may only
precede the new ones, and a new entry chains onto an old one by the old one's ``hash``. No
migration is needed and none rewrites an existing line.

Concurrency and crashes: an exclusive ``fcntl.flock`` covers reading the last entry and
appending the new one, so two processes never interleave or chain to the same predecessor.
Each entry is one ``os.write`` of a whole line on an ``O_APPEND`` descriptor, then ``fsync``.
A short or failed write (a full disk) is cut back to the previous length under the lock, so the
log stays as it was. A crash inside the write can still leave a torn *last* line: verify names
it, appending refuses to chain onto it, and :func:`repair_log` cuts it off (keeping the cut
bytes in a side file) without touching any earlier entry.

A hash chain cannot notice entries cut off the *end* of the file; compare the head that
:func:`verify_chain` reports with one recorded elsewhere (``expected_head``) for that.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import fcntl
import hashlib
import json
import os
import re
import stat
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from gate.artefacts.files import write_atomic
from gate.errors import GateError, OutputError

GENESIS = "0" * 64
FORMAT = 2
ENTRY_KEYS = ("created_at", "format", "hash", "label", "policy", "prev", "seq", "status",
              "table", "tool", "verdict")
#: The first form (before format 2): prev = sha256 of the previous line's bytes.
LEGACY_KEYS = ("hash", "label", "policy_sha256", "prev", "seq", "status", "table",
               "table_sha256", "time", "tool_version", "verdict_sha256")
STORE_DIR = "verdicts"
SUMMARY_SUFFIX = ".summary"  # not .json: a folder of verdicts never mistakes one for a verdict
SUMMARY_VERSION = 1
#: Longer lines are not entries (an entry is well under 2 KiB); bounds what verify parses.
MAX_LINE_BYTES = 65_536
MAX_ECHO = 80  # characters of a foreign value echoed in a message
_SHA256 = re.compile(r"[0-9a-f]{64}")
_TAIL_BLOCK = 8192


def canonical(entry: dict[str, Any]) -> bytes:
    """Canonical JSON bytes of an entry: sorted keys, no whitespace, UTF-8."""
    return json.dumps(entry, sort_keys=True, separators=(",", ":"),
                      ensure_ascii=False, allow_nan=False).encode("utf-8")


def entry_hash(entry: dict[str, Any]) -> str:
    """sha256 of the entry's canonical JSON without its own ``hash`` key (``prev`` included)."""
    body = {k: v for k, v in entry.items() if k != "hash"}
    return hashlib.sha256(canonical(body)).hexdigest()


def store_path(log: str | Path, verdict_sha256: str) -> Path:
    """Where the verdict with this sha256 is kept: ``verdicts/<sha256>.json`` beside the log."""
    return Path(log).parent / STORE_DIR / f"{verdict_sha256}.json"


def summary_path(log: str | Path, verdict_sha256: str) -> Path:
    """Where the summary of the verdict with this sha256 is kept (see :func:`summarise`)."""
    return Path(log).parent / STORE_DIR / f"{verdict_sha256}{SUMMARY_SUFFIX}"


_FINDING_FIELDS = ("features", "level", "rule", "segment", "subject", "waived")
_WAIVER_FIELDS = ("expires", "features", "owner", "reason", "rule", "state")


def _pick(value: Any, names: tuple[str, ...]) -> dict[str, Any]:
    return {k: value[k] for k in names if k in value}


def summarise(verdict: dict[str, Any], verdict_sha256: str) -> bytes:
    """The summary of a parsed verdict.json: canonical JSON of ``{"summary_version",
    "verdict_sha256", "verdict"}``, where ``verdict`` is a pruned copy holding exactly the
    fields `gate history` reads (:func:`gate.artefacts.history.reduce_verdict` and the
    waivers), each value copied as it is, so reading the summary gives the same run as
    reading the verdict (the VIF map, whose order canonical JSON would lose, is kept as
    ``diagnostics.vif_in_order``: [[feature, value], ...]; :func:`summary_document` turns it
    back). Deterministic: the same verdict always gives the same bytes.
    Raises ValueError when a value is not JSON (a NaN), in which case no summary is kept."""
    pruned: dict[str, Any] = _pick(verdict, ("created_at", "label", "status"))
    table, policy = verdict.get("table"), verdict.get("policy")
    if isinstance(table, dict):
        pruned["table"] = _pick(table, ("sha256", "source"))
    if isinstance(policy, dict):
        pruned["policy"] = _pick(policy, ("name", "sha256"))
        limits = policy.get("limits")
        if isinstance(limits, dict) and isinstance(limits.get("vif"), dict):
            pruned["policy"]["limits"] = {"vif": _pick(limits["vif"], ("max",))}
    diagnostics = verdict.get("diagnostics")
    if isinstance(diagnostics, dict):
        pruned["diagnostics"] = _pick(diagnostics, ("condition_number", "vif"))
        vif = diagnostics.get("vif")
        if isinstance(vif, dict):  # canonical JSON sorts keys; the features' order matters
            del pruned["diagnostics"]["vif"]
            pruned["diagnostics"]["vif_in_order"] = [[k, v] for k, v in vif.items()]
    for key, names in (("findings", _FINDING_FIELDS), ("waivers", _WAIVER_FIELDS)):
        items = verdict.get(key)
        if isinstance(items, list):
            pruned[key] = [_pick(item, names) for item in items if isinstance(item, dict)]
    return canonical({"summary_version": SUMMARY_VERSION, "verdict": pruned,
                      "verdict_sha256": verdict_sha256})


def summary_document(summary: dict[str, Any]) -> dict[str, Any] | None:
    """The pruned verdict inside a parsed summary, the VIF map restored in its order; None
    when it is not of this form."""
    document = summary.get("verdict")
    if summary.get("summary_version") != SUMMARY_VERSION or not isinstance(document, dict):
        return None
    diagnostics = document.get("diagnostics")
    if isinstance(diagnostics, dict) and "vif_in_order" in diagnostics:
        pairs = diagnostics.pop("vif_in_order")
        try:
            diagnostics["vif"] = {str(k): v for k, v in pairs}
        except (TypeError, ValueError):
            return None
    return document


def check_head(head: str) -> str:
    """A ``--head`` value: 64 lowercase hex digits (the ``hash`` of an entry), else exit 2."""
    if not _SHA256.fullmatch(head):
        raise GateError(f"--head {_echo(head)}: not a head; give the 64 hex digits that "
                        "`gate audit verify` printed after 'head'")
    return head


def append_entry(path: str | Path, document: bytes) -> dict[str, Any]:
    """Keep ``document`` (the exact verdict.json bytes written) in the store and append one
    entry recording it; return the entry."""
    file = Path(path)
    try:
        verdict = json.loads(document)
        fields: dict[str, Any] = {
            "created_at": str(verdict["created_at"]),
            "format": FORMAT,
            "label": verdict.get("label"),
            "policy": {"name": verdict["policy"].get("name"),
                       "sha256": verdict["policy"]["sha256"]},
            "status": verdict["status"],
            "table": {"source": verdict["table"].get("source"),
                      "sha256": verdict["table"]["sha256"]},
            "tool": {"version": (verdict.get("tool") or {}).get("version")},
        }
    except (ValueError, KeyError, TypeError, AttributeError):
        raise OutputError(f"{file}: the document to record is not a verdict.json; record the "
                          "bytes `gate check` wrote") from None
    digest = hashlib.sha256(document).hexdigest()
    fields["verdict"] = keep_verdict(file, document, verdict, digest)
    return _append(file, fields)


def keep_verdict(file: Path, document: bytes, verdict: dict[str, Any],
                 digest: str) -> dict[str, Any]:
    """Write the verdict bytes (and its summary) into the store; return the entry's
    ``verdict`` field: ``{"sha256"}`` plus ``"summary_sha256"`` when a summary was kept."""
    kept = store_path(file, digest)
    field: dict[str, Any] = {"sha256": digest}
    try:
        summary = summarise(verdict, digest)
    except ValueError:  # a value that is not JSON: the history reads the verdict itself
        summary = None
    try:
        if not kept.exists():  # content-addressed: an existing copy is the same bytes
            write_atomic(kept, document)
    except OSError as exc:
        raise OutputError(f"{kept}: cannot keep the verdict beside the audit log "
                          f"({exc.strerror or exc}); choose a writable --audit-log folder"
                          ) from None
    if summary is not None:
        place = summary_path(file, digest)
        try:
            same = place.read_bytes() == summary
        except OSError:
            same = False
        # Recorded even when the copy cannot be written (a full disk): the summary is a
        # function of the verdict, so its hash still says what it must be; a reader finds it
        # missing and reads the verdict. The entry's length never depends on the disk.
        field["summary_sha256"] = hashlib.sha256(summary).hexdigest()
        with contextlib.suppress(OSError):
            if not same:  # deterministic: a damaged copy is put right, a good one kept
                write_atomic(place, summary)
    return field


@contextmanager
def _locked_log(file: Path, flags: int, action: str) -> Iterator[int]:
    """The audit log opened for ``action`` under its exclusive lock (released when the file
    closes, also if we crash). A link or anything but a regular file is refused, even one
    planted after the early output check (O_NOFOLLOW, then fstat); an OSError becomes one
    OutputError line naming the log."""
    try:
        fd = os.open(file, flags | os.O_NOFOLLOW, 0o644)
    except FileNotFoundError:
        raise OutputError(f"{file}: audit log not found; check the path") from None
    except OSError as exc:
        raise OutputError(f"{file}: cannot open the audit log ({exc.strerror or exc}); "
                          "choose a regular, writable --audit-log file (links are refused)"
                          ) from None
    try:
        if not stat.S_ISREG(os.fstat(fd).st_mode):
            raise OutputError(f"{file}: the audit log is not a regular file; give another path")
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield fd
    except OSError as exc:
        if isinstance(exc, OutputError):
            raise
        raise OutputError(f"{file}: cannot {action} the audit log ({exc.strerror or exc})"
                          ) from None
    finally:
        os.close(fd)


def _append(file: Path, fields: dict[str, Any]) -> dict[str, Any]:
    if file.parent != Path():
        try:
            file.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OutputError(f"{file}: cannot create the audit log's folder "
                              f"({exc.strerror or exc}); choose a writable --audit-log path"
                              ) from None
    with _locked_log(file, os.O_RDWR | os.O_CREAT | os.O_APPEND, "append to") as fd:
        size = os.fstat(fd).st_size
        last = _last_line(fd, file, size)
        if last is None:
            prev, seq = GENESIS, 1
        else:
            previous = parse_line(last)
            if isinstance(previous, str) or entry_problem(previous) is not None:
                raise OutputError(f"{file}: the last line is not an audit entry; run "
                                  f"`gate audit verify {file}` and repair the log before "
                                  "appending")
            prev, seq = previous["hash"], previous["seq"] + 1
        entry = dict(fields, prev=prev, seq=seq)
        entry["hash"] = entry_hash(entry)
        line = canonical(entry) + b"\n"
        try:
            written = os.write(fd, line)
            if written != len(line):
                raise OutputError(f"{file}: short write to the audit log ({written} of "
                                  f"{len(line)} bytes); the log was cut back to its previous "
                                  "end; free disk space and run again")
            os.fsync(fd)
        except OSError as exc:
            os.ftruncate(fd, size)  # still under the lock: nobody appended after us
            os.fsync(fd)
            if isinstance(exc, OutputError):
                raise
            raise OutputError(f"{file}: cannot append to the audit log ({exc.strerror or exc})"
                              "; the log was cut back to its previous end; free disk space "
                              "and run again") from None
        return entry


def _last_line(fd: int, file: Path, size: int) -> bytes | None:
    """The last complete line (without newline), or None for an empty log."""
    if size == 0:
        return None
    tail = b""
    position = size
    while position > 0:
        start = max(0, position - _TAIL_BLOCK)
        tail = os.pread(fd, position - start, start) + tail
        position = start
        if tail.count(b"\n") >= 2 or position == 0 or len(tail) > MAX_LINE_BYTES:
            break
    if not tail.endswith(b"\n"):
        raise OutputError(f"{file}: the log ends in a torn entry (a write was cut off); run "
                          f"`gate audit repair {file}`, then append again")
    return tail[:-1].rsplit(b"\n", 1)[-1]


def _echo(value: object) -> str:
    """A foreign value for a message: repr, control characters escaped, capped."""
    text = repr(value)
    return text if len(text) <= MAX_ECHO else text[:MAX_ECHO] + "…"


def _reject_constant(name: str) -> Any:
    raise ValueError(f"{name} is not JSON")


def parse_line(line: bytes) -> dict[str, Any] | str:
    """The entry on a line, or why it is none (never raises)."""
    if len(line) > MAX_LINE_BYTES:
        return f"not an audit entry (a line of {len(line):,} bytes)"
    try:
        value = json.loads(line, parse_constant=_reject_constant)
    except RecursionError:
        return "not an audit entry (nested too deeply)"
    except ValueError:
        return "not valid JSON"
    if not isinstance(value, dict):
        return "not an audit entry (not a JSON object)"
    return value


def _is_sha(value: object) -> bool:
    return isinstance(value, str) and _SHA256.fullmatch(value) is not None


def entry_problem(entry: dict[str, Any]) -> str | None:
    """Why ``entry`` is not an entry of either form, or None."""
    legacy = "format" not in entry
    keys = LEGACY_KEYS if legacy else ENTRY_KEYS
    if set(entry) != set(keys):
        return "not an audit entry (its keys differ)"
    if not legacy and entry["format"] != FORMAT:
        return f"written by a newer gate (format {_echo(entry['format'])}); upgrade to verify it"
    seq = entry["seq"]
    if not isinstance(seq, int) or isinstance(seq, bool) or seq < 1:
        return f"not an audit entry (seq {_echo(seq)} is not a positive integer)"
    for key in ("hash", "prev"):
        if not _is_sha(entry[key]):
            return f"not an audit entry ({key} {_echo(entry[key])} is not a sha256)"
    if not legacy:
        verdict = entry["verdict"]
        if not isinstance(verdict, dict) or not _is_sha(verdict.get("sha256")):
            return "not an audit entry (verdict.sha256 is not a sha256)"
    try:
        canonical(entry)
    except ValueError:
        return "not an audit entry (a number is out of range)"
    return None


def read_lines(path: str | Path) -> Iterator[tuple[int, bytes, bool]]:
    """(line number, bytes without newline, complete) for every line of a log, streamed."""
    file = Path(path)
    try:
        handle = open(file, "rb")  # noqa: SIM115 - closed by the with below
    except FileNotFoundError:
        raise OutputError(f"{file}: audit log not found; check the path") from None
    except OSError as exc:
        raise OutputError(f"{file}: cannot read the audit log ({exc.strerror or exc})"
                          ) from None
    with handle:
        for number, raw in enumerate(handle, start=1):
            complete = raw.endswith(b"\n")
            yield number, raw[:-1] if complete else raw, complete


@dataclass(frozen=True)
class ChainReport:
    """Outcome of :func:`verify_chain`. ``bad_line`` is 1-based; None when the chain is intact.

    ``missing`` and ``altered`` name stored verdicts (``verdicts/<sha256>.json``) that are
    absent or whose bytes no longer hash to their name, with the line of their entry.
    """

    path: str
    entries: int
    head: str | None  # the last intact entry's hash
    bad_line: int | None = None
    problem: str | None = None
    missing: tuple[tuple[int, str], ...] = ()
    altered: tuple[tuple[int, str], ...] = ()
    torn: bool = False
    legacy: int = 0  # entries of the first form (no stored verdict expected)

    @property
    def ok(self) -> bool:
        return self.bad_line is None and not self.missing and not self.altered

    @property
    def chain_ok(self) -> bool:
        return self.bad_line is None

    def describe(self) -> str:
        """One line: intact with the head, or the first problem."""
        plural = "y" if self.entries == 1 else "ies"
        if self.bad_line is not None:
            return f"{self.path}: line {self.bad_line}: {self.problem}"
        if self.missing or self.altered:
            parts = []
            for what, items in (("missing", self.missing), ("altered", self.altered)):
                if items:
                    shown = ", ".join(f"{STORE_DIR}/{sha}.json (line {line})"
                                      for line, sha in items[:3])
                    more = f" and {len(items) - 3} more" if len(items) > 3 else ""
                    parts.append(f"{len(items)} stored verdict{'s' if len(items) > 1 else ''} "
                                 f"{what}: {shown}{more}")
            return (f"{self.path}: chain intact ({self.entries} entr{plural}) but the record "
                    f"is incomplete: {'; '.join(parts)}")
        head = self.head or GENESIS
        return f"{self.path}: intact, {self.entries} entr{plural}; head {head}"


def verify_chain(path: str | Path, *, expected_head: str | None = None,
                 check_store: bool = True) -> ChainReport:
    """Check every entry of an audit log and every stored verdict; report the first edited,
    removed, reordered, duplicated, truncated or torn entry.

    ``head`` is the last entry's ``hash``: record it elsewhere and pass it back as
    ``expected_head`` to notice entries removed from the end of the file.
    """
    file = Path(path)
    name = str(file)
    if expected_head is not None:
        check_head(expected_head)
    # Pass 1: where each entry hash (and, for the first form, each line hash) sits, and where
    # each exact line first appeared, to tell reordering and replay from removal.
    where: dict[str, int] = {}
    for number, line, _complete in read_lines(file):
        entry = parse_line(line)
        if isinstance(entry, dict) and _is_sha(entry.get("hash")):
            where.setdefault(entry["hash"], number)
        if isinstance(entry, dict) and "format" not in entry:
            where.setdefault(hashlib.sha256(line).hexdigest(), number)
    seen: dict[bytes, int] = {}  # sha256 of a line's bytes -> its first line number
    prev, legacy_prev = GENESIS, GENESIS
    count = legacy = 0
    stored: list[tuple[int, str]] = []
    new_form_seen = False
    previous_prev = GENESIS

    def bad(number: int, problem: str, *, torn: bool = False) -> ChainReport:
        return ChainReport(name, count, prev if count else None, number, problem,
                           torn=torn, legacy=legacy)

    for number, line, complete in read_lines(file):
        if not complete:
            return bad(number, f"torn tail: the last entry is incomplete ({len(line):,} bytes, "
                       "no line end), as a write cut off by a crash or a full disk leaves it; "
                       f"`gate audit repair {file}` cuts it off and keeps every earlier entry",
                       torn=True)
        digest = hashlib.sha256(line).digest()
        if digest in seen:
            return bad(number, f"duplicated: an exact copy of line {seen[digest]} (a replayed "
                       "entry)")
        seen[digest] = number
        entry = parse_line(line)
        if isinstance(entry, str):
            return bad(number, f"edited: {entry}")
        shape = entry_problem(entry)
        if shape is not None:
            return bad(number, f"edited: {shape}")
        if canonical(entry) != line:
            return bad(number, "edited: the entry is not in the canonical form it was written in")
        if entry["hash"] != entry_hash(entry):
            return bad(number, "edited: its content no longer matches its hash")
        is_legacy = "format" not in entry
        if is_legacy and new_form_seen:
            return bad(number, "edited: an entry of the first form after entries of the "
                       "current form")
        expected = legacy_prev if is_legacy else prev
        if entry["prev"] != expected:
            before = where.get(entry["prev"])
            if entry["prev"] == GENESIS:
                return bad(number, "reordered: it claims to be the first entry")
            if before is not None and before > number:
                return bad(number, f"reordered: it should follow line {before}, which comes "
                           "after it")
            if before == number - 1:
                return bad(number, "edited: its prev names the line before it in the wrong form")
            if before is not None and before < number - 1:
                return bad(number, f"removed: it should follow line {before}; the entries "
                           "between are missing")
            if entry["seq"] == number and number > 1:
                # Nothing is missing, so the line before was rewritten with a fresh hash.
                count -= 1
                prev = previous_prev
                return bad(number - 1, "edited: its hash no longer matches the one the entry "
                           "after it chains to (the entry was rewritten)")
            return bad(number, f"removed: the entry before it (seq {entry['seq'] - 1}) is "
                       "missing")
        if entry["seq"] != number:
            return bad(number, f"removed or reordered: seq {entry['seq']} at entry {number}")
        previous_prev = prev
        prev = entry["hash"]
        legacy_prev = hashlib.sha256(line).hexdigest()
        count += 1
        if is_legacy:
            legacy += 1
        else:
            new_form_seen = True
            stored.append((number, entry["verdict"]["sha256"]))
    head = prev if count else None
    if expected_head is not None and expected_head != head and expected_head not in where:
        # Entries appended after the recorded head are fine; a head that vanished is not.
        return ChainReport(name, count, head, max(count, 1),
                           f"the recorded head is not in the log: entries after line {count} "
                           f"were cut off, or line {count} itself was rewritten",
                           legacy=legacy)
    missing: list[tuple[int, str]] = []
    altered: list[tuple[int, str]] = []
    if check_store:
        for number, sha in stored:
            problem = _stored_problem(store_path(file, sha), sha)
            if problem == "missing":
                missing.append((number, sha))
            elif problem is not None:
                altered.append((number, sha))
    return ChainReport(name, count, head, missing=tuple(missing), altered=tuple(altered),
                       legacy=legacy)


def _stored_problem(kept: Path, sha: str) -> str | None:
    digest = hashlib.sha256()
    try:
        with open(kept, "rb") as handle:
            for block in iter(lambda: handle.read(1 << 20), b""):
                digest.update(block)
    except FileNotFoundError:
        return "missing"
    except OSError:
        return "unreadable"
    return None if digest.hexdigest() == sha else "altered"


@dataclass(frozen=True)
class RepairReport:
    path: str
    action: str  # "none", "completed" or "cut"
    cut_bytes: int
    side_file: str | None

    def describe(self) -> str:
        if self.action == "none":
            return f"{self.path}: no torn tail; nothing to repair"
        if self.action == "completed":
            return (f"{self.path}: the last entry was whole but lacked its line end; added it "
                    "(no byte removed)")
        return (f"{self.path}: cut off a torn tail of {self.cut_bytes:,} bytes after the last "
                f"whole entry; the cut bytes are kept in {self.side_file}")


def repair_log(path: str | Path, *, now: dt.datetime | None = None) -> RepairReport:
    """Cut a torn tail off an audit log, under the append lock, never touching a whole entry.

    The bytes after the last line end are moved to ``<log>.torn-<UTC time>`` (so nothing is
    lost); when they are a whole, valid entry that only lacks its line end, the line end is
    added instead. Anything else wrong with the log is left alone for a person to judge.
    """
    file = Path(path)
    name = str(file)
    with _locked_log(file, os.O_RDWR, "repair") as fd:
        size = os.fstat(fd).st_size
        end = size
        tail = b""
        while end > 0:  # find the last line end
            start = max(0, end - _TAIL_BLOCK)
            block = os.pread(fd, end - start, start)
            cut = block.rfind(b"\n")
            if cut >= 0:
                end = start + cut + 1
                break
            end = start
        tail = os.pread(fd, size - end, end) if size > end else b""
        if not tail:
            return RepairReport(name, "none", 0, None)
        entry = parse_line(tail)
        if isinstance(entry, dict) and entry_problem(entry) is None \
                and canonical(entry) == tail and entry["hash"] == entry_hash(entry):
            os.pwrite(fd, b"\n", size)
            os.fsync(fd)
            report = verify_chain(file, check_store=False)
            if report.chain_ok:
                return RepairReport(name, "completed", 0, None)
            os.ftruncate(fd, size)  # it does not chain: undo, and cut it off as torn below
            os.fsync(fd)
        moment = (now or dt.datetime.now(dt.UTC)).astimezone(dt.UTC)
        side = file.with_name(f"{file.name}.torn-{moment.strftime('%Y%m%dT%H%M%S%fZ')}")
        write_atomic(side, tail)
        os.ftruncate(fd, end)
        os.fsync(fd)
        return RepairReport(name, "cut", len(tail), str(side))


def run_verify(path: str | Path, head: str | None) -> tuple[int, str]:
    """`gate audit verify`: (exit code, the one line to print)."""
    report = verify_chain(path, expected_head=None if head is None else check_head(head))
    return (0 if report.ok else 1), report.describe()


def run_repair(path: str | Path) -> tuple[int, str]:
    """`gate audit repair`: cut a torn tail; exit 0 when the chain is intact afterwards."""
    repaired = repair_log(path)
    after = verify_chain(path, check_store=False)
    if after.chain_ok:
        return 0, repaired.describe()
    return 1, (f"{repaired.describe()}; still broken at line {after.bad_line}: {after.problem} "
               "(repair only cuts a torn tail; restore the log from a copy)")
