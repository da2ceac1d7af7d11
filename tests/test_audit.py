"""The hash-chained audit log and its verdict store: one visible chain, tamper detection, hostile
lines, torn tails and their repair, a full disk, the first log form, concurrent writers."""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as dt
import hashlib
import json
import multiprocessing
import os
import subprocess
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from conftest import make_clean_frame, make_docks_frame

from gate.api import check
from gate.artefacts.audit import (
    ENTRY_KEYS,
    GENESIS,
    append_entry,
    canonical,
    entry_hash,
    repair_log,
    store_path,
    summarise,
    summary_path,
    verify_chain,
)
from gate.artefacts.outputs import write_check_outputs
from gate.artefacts.verdict_json import verdict_json
from gate.errors import GateError, OutputError
from gate.judge.verdict import Verdict

TODAY = dt.date(2026, 12, 1)


@pytest.fixture(scope="module")
def verdict() -> Verdict:
    return check(make_clean_frame(), label="audit test", today=TODAY)


def _document(verdict: Verdict, k: int) -> bytes:
    return verdict_json(dataclasses.replace(verdict, label=f"run {k}")).encode()


def _log(folder: Path, verdict: Verdict, count: int) -> Path:
    log = folder / "audit.jsonl"
    for k in range(count):
        append_entry(log, _document(verdict, k))
    return log


def _lines(path: Path) -> list[bytes]:
    return path.read_bytes().split(b"\n")[:-1]


def _write_lines(path: Path, lines: list[bytes]) -> None:
    path.write_bytes(b"".join(line + b"\n" for line in lines))


def test_one_visible_chain_prev_is_the_previous_hash(tmp_path: Path, verdict: Verdict) -> None:
    log = _log(tmp_path, verdict, 3)
    entries = [json.loads(line) for line in _lines(log)]
    assert [e["seq"] for e in entries] == [1, 2, 3]
    assert entries[0]["prev"] == GENESIS
    assert entries[1]["prev"] == entries[0]["hash"]
    assert entries[2]["prev"] == entries[1]["hash"]
    for entry in entries:
        assert set(entry) == set(ENTRY_KEYS)
        # hashlib is the reference: hash = sha256 of the canonical body, prev included
        body = {k: v for k, v in entry.items() if k != "hash"}
        assert "prev" in body
        assert entry["hash"] == hashlib.sha256(json.dumps(
            body, sort_keys=True, separators=(",", ":")).encode()).hexdigest()
    report = verify_chain(log)
    assert report.ok and report.entries == 3
    assert report.head == entries[2]["hash"]
    assert report.describe().endswith(f"head {entries[2]['hash']}")


def test_entry_fields_are_named_as_in_the_verdict_and_the_verdict_is_stored(
        tmp_path: Path, verdict: Verdict) -> None:
    log = tmp_path / "logs" / "audit.jsonl"
    write_check_outputs(verdict, tmp_path / "out", html=False, audit_log=log)
    entry = json.loads(_lines(log)[0])
    written = (tmp_path / "out" / "verdict.json").read_bytes()
    document = json.loads(written)
    assert entry["verdict"]["sha256"] == hashlib.sha256(written).hexdigest()
    assert entry["created_at"] == document["created_at"]
    assert entry["table"]["sha256"] == document["table"]["sha256"] == verdict.table.sha256
    assert entry["policy"]["sha256"] == document["policy"]["sha256"]
    assert entry["policy"]["name"] == document["policy"]["name"]
    kept = tmp_path / "logs" / "verdicts" / f"{entry['verdict']['sha256']}.json"
    assert kept == store_path(log, entry["verdict"]["sha256"])
    assert kept.read_bytes() == written


def test_missing_or_altered_stored_verdict_is_named(tmp_path: Path, verdict: Verdict) -> None:
    log = _log(tmp_path, verdict, 3)
    entries = [json.loads(line) for line in _lines(log)]
    store_path(log, entries[1]["verdict"]["sha256"]).unlink()
    report = verify_chain(log)
    assert not report.ok and report.chain_ok
    assert report.missing == ((2, entries[1]["verdict"]["sha256"]),)
    assert "missing" in report.describe() and entries[1]["verdict"]["sha256"] in report.describe()
    kept = store_path(log, entries[2]["verdict"]["sha256"])
    kept.write_bytes(kept.read_bytes().replace(b'"pass"', b'"fail"'))
    report = verify_chain(log)
    assert report.altered == ((3, entries[2]["verdict"]["sha256"]),)


def test_edited_entry_is_reported(tmp_path: Path, verdict: Verdict) -> None:
    log = _log(tmp_path, verdict, 4)
    lines = _lines(log)
    lines[1] = lines[1].replace(b'"status":"pass"', b'"status":"fail"')
    _write_lines(log, lines)
    report = verify_chain(log)
    assert report.bad_line == 2 and "edited" in (report.problem or "")


@pytest.mark.parametrize("line", [1, 2, 3])
def test_rehashed_entry_is_reported_at_its_own_line(tmp_path: Path, verdict: Verdict,
                                                    line: int) -> None:
    log = _log(tmp_path, verdict, 4)
    lines = _lines(log)
    entry = json.loads(lines[line - 1])
    entry["status"] = "fail"
    entry["hash"] = entry_hash(entry)  # a careful forger fixes the entry's own hash
    lines[line - 1] = canonical(entry)
    _write_lines(log, lines)
    report = verify_chain(log)
    assert report.bad_line == line and "edited" in (report.problem or "")
    assert report.entries == line - 1


def test_rehashed_last_entry_is_reported_at_the_last_line_with_the_head(
        tmp_path: Path, verdict: Verdict) -> None:
    log = _log(tmp_path, verdict, 4)
    head = verify_chain(log).head
    lines = _lines(log)
    entry = json.loads(lines[3])
    entry["status"] = "fail"
    entry["hash"] = entry_hash(entry)
    lines[3] = canonical(entry)
    _write_lines(log, lines)
    assert verify_chain(log).chain_ok  # without the recorded head nobody can tell
    report = verify_chain(log, expected_head=head)
    assert report.bad_line == 4 and "line 4 itself was rewritten" in (report.problem or "")


def test_whitespace_edit_is_reported(tmp_path: Path, verdict: Verdict) -> None:
    log = _log(tmp_path, verdict, 2)
    lines = _lines(log)
    lines[0] = lines[0].replace(b",", b", ", 1)
    _write_lines(log, lines)
    assert verify_chain(log).bad_line == 1


@pytest.mark.parametrize("removed", [0, 2, 3])
def test_removed_entry_is_reported(tmp_path: Path, verdict: Verdict, removed: int) -> None:
    log = _log(tmp_path, verdict, 5)
    lines = _lines(log)
    del lines[removed]
    _write_lines(log, lines)
    report = verify_chain(log)
    assert report.bad_line == removed + 1
    assert "removed" in (report.problem or "")


def test_reordered_entries_are_reported(tmp_path: Path, verdict: Verdict) -> None:
    log = _log(tmp_path, verdict, 5)
    lines = _lines(log)
    lines[2], lines[3] = lines[3], lines[2]
    _write_lines(log, lines)
    report = verify_chain(log)
    assert report.bad_line == 3 and "reordered" in (report.problem or "")


@pytest.mark.parametrize(("copied", "at"), [(1, 2), (2, 5), (0, 5)])
def test_replayed_line_is_reported_as_duplicated(tmp_path: Path, verdict: Verdict,
                                                 copied: int, at: int) -> None:
    log = _log(tmp_path, verdict, 5)
    lines = _lines(log)
    lines.insert(at, lines[copied])
    _write_lines(log, lines)
    report = verify_chain(log)
    assert report.bad_line == at + 1
    assert (report.problem or "").startswith(f"duplicated: an exact copy of line {copied + 1}")
    assert "removed" not in (report.problem or "")


def test_entries_cut_off_the_end_need_the_recorded_head(tmp_path: Path,
                                                        verdict: Verdict) -> None:
    log = _log(tmp_path, verdict, 4)
    head = verify_chain(log).head
    _write_lines(log, _lines(log)[:2])
    assert verify_chain(log).ok  # a bare hash chain cannot see this (documented)
    report = verify_chain(log, expected_head=head)
    assert not report.ok and "cut off" in (report.problem or "")
    # entries appended after a recorded head are fine
    log2 = _log(tmp_path / "b", verdict, 2)
    head2 = verify_chain(log2).head
    append_entry(log2, _document(verdict, 99))
    assert verify_chain(log2, expected_head=head2).ok


def test_first_form_logs_are_read_and_extended(tmp_path: Path, verdict: Verdict) -> None:
    """A log of the first form (prev = sha256 of the previous line) verifies as it is, and new
    entries chain onto its last entry's hash."""
    log = tmp_path / "audit.jsonl"
    prev, lines = GENESIS, []
    for seq in (1, 2):
        entry: dict[str, Any] = {
            "label": "old", "policy_sha256": "a" * 64, "prev": prev, "seq": seq,
            "status": "pass", "table": "t.parquet", "table_sha256": "b" * 64,
            "time": "2026-01-01T00:00:00+00:00", "tool_version": "0.1.0",
            "verdict_sha256": "c" * 64}
        entry["hash"] = entry_hash(entry)
        lines.append(canonical(entry))
        prev = hashlib.sha256(lines[-1]).hexdigest()
    _write_lines(log, lines)
    report = verify_chain(log)
    assert report.ok and report.legacy == 2
    appended = append_entry(log, _document(verdict, 0))
    assert appended["prev"] == json.loads(lines[1])["hash"] and appended["seq"] == 3
    report = verify_chain(log)
    assert report.ok and report.entries == 3 and report.head == appended["hash"]
    # an old-form line may not follow new ones
    _write_lines(log, [*_lines(log), lines[0].replace(b'"old"', b'"odd"')])
    assert verify_chain(log).bad_line == 4


HOSTILE_LINES = [
    ("nan seq", lambda e: canonical(e).replace(b'"seq":2', b'"seq":NaN')),
    ("1e400", lambda e: canonical(e).replace(b'"seq":2', b'"seq":1e400')),
    ("seq string", lambda e: canonical(dict(e, seq="2"))),
    ("prev list", lambda e: canonical(dict(e, prev=[e["prev"]]))),
    ("deep nesting", lambda e: b"[" * 200_000 + b"]" * 200_000),
    ("deep object", lambda e: b'{"a":' * 50_000 + b"1" + b"}" * 50_000),
    ("bool seq", lambda e: canonical(dict(e, seq=True))),
    ("binary", lambda e: b"\xff\xfe\x00garbage"),
]


@pytest.mark.parametrize(("name", "make"), HOSTILE_LINES, ids=[h[0] for h in HOSTILE_LINES])
def test_hostile_lines_give_one_line_never_a_traceback(tmp_path: Path, verdict: Verdict,
                                                       run_cli: Any, name: str,
                                                       make: Any) -> None:
    log = _log(tmp_path, verdict, 3)
    lines = _lines(log)
    lines[1] = make(json.loads(lines[1]))
    _write_lines(log, lines)
    result = run_cli(["audit", "verify", log])
    assert result.code == 1, result.err
    assert len(result.err_lines) == 1 and "line 2: edited" in result.err
    assert "Traceback" not in result.err and len(result.err) < 400


@pytest.mark.parametrize("head", ["abc", "Z" * 64, "0" * 63, "A" * 64, "\x1b[31m"])
def test_malformed_head_is_exit_2(tmp_path: Path, verdict: Verdict, run_cli: Any,
                                  head: str) -> None:
    log = _log(tmp_path, verdict, 1)
    result = run_cli(["audit", "verify", log, "--head", head])
    assert result.code == 2 and len(result.err_lines) == 1 and "--head" in result.err
    assert "\x1b" not in result.err
    with pytest.raises(GateError):
        verify_chain(log, expected_head=head)


def test_torn_tail_is_named_refused_and_repaired_without_losing_an_entry(
        tmp_path: Path, verdict: Verdict, run_cli: Any) -> None:
    log = _log(tmp_path, verdict, 3)
    data = log.read_bytes()
    torn = data[:-25]  # a write cut off mid-line (crash or full disk)
    log.write_bytes(torn)
    report = verify_chain(log)
    assert report.bad_line == 3 and report.torn and "torn tail" in (report.problem or "")
    assert report.entries == 2
    with pytest.raises(OutputError, match="gate audit repair"):
        append_entry(log, _document(verdict, 7))  # never chain onto a torn line
    assert log.read_bytes() == torn
    result = run_cli(["audit", "repair", log])
    assert result.code == 0 and "cut off a torn tail" in result.out
    whole = data[: data.rfind(b"\n", 0, len(data) - 1) + 1]  # the first two entries
    assert log.read_bytes() == whole
    side = next(tmp_path.glob("audit.jsonl.torn-*"))
    assert side.read_bytes() == torn[len(whole):]  # the cut bytes are kept
    assert verify_chain(log).ok
    append_entry(log, _document(verdict, 8))
    assert verify_chain(log).ok and verify_chain(log).entries == 3
    again = run_cli(["audit", "repair", log])
    assert again.code == 0 and "nothing to repair" in again.out


def test_repair_adds_a_missing_line_end_to_a_whole_entry(tmp_path: Path,
                                                         verdict: Verdict) -> None:
    log = _log(tmp_path, verdict, 3)
    data = log.read_bytes()
    log.write_bytes(data[:-1])
    assert verify_chain(log).torn
    assert repair_log(log).action == "completed"
    assert log.read_bytes() == data and verify_chain(log).ok


def test_repair_leaves_a_log_broken_elsewhere_alone(tmp_path: Path, verdict: Verdict,
                                                    run_cli: Any) -> None:
    log = _log(tmp_path, verdict, 3)
    lines = _lines(log)
    lines[0] = lines[0].replace(b'"pass"', b'"fail"')
    _write_lines(log, lines)
    before = log.read_bytes()
    result = run_cli(["audit", "repair", log])
    assert result.code == 1 and "still broken at line 1" in result.err
    assert log.read_bytes() == before


@contextlib.contextmanager
def _tiny_tmpfs(size: str = "128k") -> Iterator[Path]:
    folder = Path(tempfile.mkdtemp(prefix="gate-full-disk-"))
    subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(folder)],
                   check=True, capture_output=True)
    try:
        yield folder
    finally:
        subprocess.run(["umount", str(folder)], check=True, capture_output=True)
        folder.rmdir()


def _fill(path: Path, block: int) -> None:
    """Write ``block``-byte pieces until the filesystem is full."""
    fd = os.open(path, os.O_WRONLY | os.O_CREAT, 0o644)
    try:
        with contextlib.suppress(OSError):
            while os.write(fd, b"x" * block) == block:
                pass
    finally:
        os.close(fd)


@pytest.fixture
def full_disk_folder() -> Iterator[Path]:
    """A tiny tmpfs of our own, mounted in a temp folder and unmounted afterwards (root only)."""
    if os.geteuid() != 0:
        pytest.skip("mounting a tiny tmpfs to fill needs root; not running as root")
    try:
        mount = _tiny_tmpfs()
        folder = mount.__enter__()
    except (subprocess.CalledProcessError, FileNotFoundError) as exc:
        pytest.skip(f"cannot mount a tmpfs here ({exc}); a container without CAP_SYS_ADMIN")
    try:
        yield folder
    finally:
        mount.__exit__(None, None, None)


def test_full_disk_cuts_a_short_write_back(verdict: Verdict, full_disk_folder: Path) -> None:
    folder = full_disk_folder
    log = folder / "audit.jsonl"
    for k in range(2):
        append_entry(log, _document(verdict, k))
    intact = log.read_bytes()
    # Fill the disk, leaving fewer bytes than one entry; the store copy goes elsewhere
    # first, so make that fail too by filling everything.
    filler = folder / "filler"
    _fill(filler, 512)
    failures = 0
    for k in range(2, 6):
        with contextlib.suppress(OutputError):
            append_entry(log, _document(verdict, k))
            continue
        failures += 1
        assert log.read_bytes() == intact  # cut back: no torn line stays
    assert failures >= 1
    assert verify_chain(log, check_store=False).ok
    # Free some space: the next append works and chains onto the intact head.
    filler.unlink()
    append_entry(log, _document(verdict, 9))
    report = verify_chain(log)
    assert report.chain_ok and report.entries == 3


def test_short_write_of_the_line_itself_is_cut_back(verdict: Verdict,
                                                    full_disk_folder: Path) -> None:
    """The store copy fits but the log line does not: the log ends near the end of a page,
    the disk is full, so the write stops at the page end (a short write, as on the reported
    "505 of 513 bytes") or fails; either way the log is cut back to its previous end."""
    folder = full_disk_folder
    log = folder / "audit.jsonl"
    page = os.statvfs(folder).f_bsize
    append_entry(log, _document(verdict, 0))
    k = 1
    # End the log closer to a page end than one line: lines only grow (seq, label), so the
    # next one cannot fit in what is left of the page.
    while page - log.stat().st_size % page >= len(_lines(log)[-1]) + 1:
        append_entry(log, _document(verdict, k))
        k += 1
    intact = log.read_bytes()
    document = _document(verdict, 99)
    kept = store_path(log, hashlib.sha256(document).hexdigest())
    kept.write_bytes(document)  # already stored, so only the log line needs space
    _fill(folder / "filler", 64)
    with pytest.raises(OutputError, match="cut back"):
        append_entry(log, document)
    assert log.read_bytes() == intact
    assert verify_chain(log).ok


def _append_many(path: str, verdict: Verdict, count: int) -> None:
    for k in range(count):
        append_entry(path, _document(verdict, os.getpid() * 1000 + k))


@pytest.mark.slow
def test_concurrent_appends_neither_interleave_nor_lose_entries(tmp_path: Path,
                                                                verdict: Verdict) -> None:
    log = tmp_path / "audit.jsonl"
    # spawn: fresh interpreters, no state shared through fork, and no fork-with-threads issue
    context = multiprocessing.get_context("spawn")
    workers, each = 4, 30
    processes = [context.Process(target=_append_many, args=(str(log), verdict, each))
                 for _ in range(workers)]
    for process in processes:
        process.start()
    for process in processes:
        process.join(timeout=120)
        assert process.exitcode == 0
    lines = _lines(log)
    assert len(lines) == workers * each
    assert all(json.loads(line)["seq"] == k for k, line in enumerate(lines, start=1))
    assert len({json.loads(line)["verdict"]["sha256"] for line in lines}) == workers * each
    assert len({json.loads(line)["prev"] for line in lines}) == workers * each  # no forks
    assert verify_chain(log).ok


def test_cli_audit_verify_exit_codes_and_head(tmp_path: Path, run_cli: Any,
                                              write_table: Any) -> None:
    table = write_table(make_docks_frame(), "docks.parquet")
    log = tmp_path / "audit.jsonl"
    for label in ("first", "second"):
        result = run_cli(["check", table, "--out", tmp_path / label, "--audit-log", log,
                          "--label", label, "--quiet"])
        assert result.code == 1 and result.out == ""
    ok = run_cli(["audit", "verify", log])
    assert ok.code == 0 and "intact, 2 entries" in ok.out
    head = ok.out.strip().rsplit("head ", 1)[1]
    assert head == json.loads(_lines(log)[-1])["hash"]
    assert run_cli(["audit", "verify", log, "--head", head]).code == 0
    lines = _lines(log)
    _write_lines(log, [lines[1], lines[0]])
    bad = run_cli(["audit", "verify", log])
    assert bad.code == 1 and "line 1" in bad.err
    missing = run_cli(["audit", "verify", tmp_path / "nope.jsonl"])
    assert missing.code == 2 and "not found" in missing.err


def test_run_summary_is_kept_and_its_hash_chained(tmp_path: Path, verdict: Verdict) -> None:
    log = tmp_path / "audit.jsonl"
    document = _document(verdict, 0)
    entry = append_entry(log, document)
    kept = summary_path(log, entry["verdict"]["sha256"])
    data = kept.read_bytes()
    assert entry["verdict"]["summary_sha256"] == hashlib.sha256(data).hexdigest()
    assert data == summarise(json.loads(document), entry["verdict"]["sha256"])  # deterministic
    assert len(data) < len(document)
    kept.write_bytes(b"{}")  # a damaged summary is derived data: the record stays complete
    assert verify_chain(log).ok
    append_entry(log, document)  # the same verdict again puts its summary right
    assert kept.read_bytes() == data
