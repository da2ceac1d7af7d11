"""The hash-chained audit log: appends, tamper detection, crashes and concurrent writers."""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import multiprocessing
import os
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
    verify_chain,
)
from gate.artefacts.outputs import write_check_outputs
from gate.errors import OutputError
from gate.judge.verdict import Verdict

TODAY = dt.date(2026, 12, 1)


@pytest.fixture(scope="module")
def verdict() -> Verdict:
    return check(make_clean_frame(), label="audit test", today=TODAY)


def _log(tmp_path: Path, verdict: Verdict, count: int) -> Path:
    log = tmp_path / "audit.jsonl"
    for k in range(count):
        append_entry(log, verdict, hashlib.sha256(str(k).encode()).hexdigest())
    return log


def _lines(path: Path) -> list[bytes]:
    return path.read_bytes().split(b"\n")[:-1]


def _write_lines(path: Path, lines: list[bytes]) -> None:
    path.write_bytes(b"".join(line + b"\n" for line in lines))


def test_entries_chain_by_sha256_of_the_previous_line(tmp_path: Path, verdict: Verdict) -> None:
    log = _log(tmp_path, verdict, 3)
    lines = _lines(log)
    entries = [json.loads(line) for line in lines]
    assert [e["seq"] for e in entries] == [1, 2, 3]
    assert entries[0]["prev"] == GENESIS
    # hashlib is the reference for the chain: prev = sha256(previous line bytes)
    assert entries[1]["prev"] == hashlib.sha256(lines[0]).hexdigest()
    assert entries[2]["prev"] == hashlib.sha256(lines[1]).hexdigest()
    for entry in entries:
        assert set(entry) == set(ENTRY_KEYS)
        assert entry["status"] == "pass" and entry["label"] == "audit test"
        assert entry["policy_sha256"] == verdict.policy.sha256
        body = {k: v for k, v in entry.items() if k != "hash"}
        assert entry["hash"] == hashlib.sha256(
            json.dumps(body, sort_keys=True, separators=(",", ":")).encode()).hexdigest()
    report = verify_chain(log)
    assert report.ok and report.entries == 3
    assert report.head == hashlib.sha256(lines[2]).hexdigest()


def test_audit_entry_hashes_the_exact_verdict_json_bytes(tmp_path: Path,
                                                         verdict: Verdict) -> None:
    log = tmp_path / "logs" / "audit.jsonl"
    write_check_outputs(verdict, tmp_path / "out", html=False, audit_log=log)
    entry = json.loads(_lines(log)[0])
    written = (tmp_path / "out" / "verdict.json").read_bytes()
    assert entry["verdict_sha256"] == hashlib.sha256(written).hexdigest()
    assert entry["table_sha256"] == verdict.table.sha256


def test_edited_entry_is_reported(tmp_path: Path, verdict: Verdict) -> None:
    log = _log(tmp_path, verdict, 4)
    lines = _lines(log)
    lines[1] = lines[1].replace(b'"status":"pass"', b'"status":"fail"')
    _write_lines(log, lines)
    report = verify_chain(log)
    assert (report.bad_line, report.problem is not None) == (2, True)
    assert "edited" in (report.problem or "")


def test_edited_entry_with_recomputed_hash_is_still_caught(tmp_path: Path,
                                                           verdict: Verdict) -> None:
    log = _log(tmp_path, verdict, 4)
    lines = _lines(log)
    entry = json.loads(lines[1])
    entry["status"] = "fail"
    entry["hash"] = entry_hash(entry)  # a careful forger fixes the entry's own hash
    lines[1] = canonical(entry)
    _write_lines(log, lines)
    report = verify_chain(log)
    assert report.bad_line == 2 and "edited" in (report.problem or "")


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


def test_torn_last_line_is_reported_and_earlier_entries_stay_valid(
        tmp_path: Path, verdict: Verdict) -> None:
    log = _log(tmp_path, verdict, 3)
    data = log.read_bytes()
    log.write_bytes(data[:-25])  # a write cut off mid-line (crash or truncation)
    report = verify_chain(log)
    assert report.bad_line == 3 and "truncated" in (report.problem or "")
    assert report.entries == 2
    with pytest.raises(OutputError, match="incomplete"):
        append_entry(log, verdict, "0" * 64)  # never chain onto a torn line
    assert log.read_bytes() == data[:-25]


def test_crash_mid_append_leaves_earlier_entries_verifiable(tmp_path: Path,
                                                            verdict: Verdict) -> None:
    log = _log(tmp_path, verdict, 3)
    intact = log.read_bytes()
    with open(log, "ab") as handle:  # what a process killed inside os.write could leave
        handle.write(b'{"hash":"ab12')
    assert log.read_bytes().startswith(intact)
    report = verify_chain(log)
    assert report.bad_line == 4 and report.entries == 3


def test_entries_cut_off_the_end_need_the_recorded_head(tmp_path: Path,
                                                        verdict: Verdict) -> None:
    log = _log(tmp_path, verdict, 4)
    head = verify_chain(log).head
    _write_lines(log, _lines(log)[:2])
    assert verify_chain(log).ok  # a bare hash chain cannot see this (documented)
    report = verify_chain(log, expected_head=head)
    assert not report.ok and "truncated" in (report.problem or "")
    # entries appended after a recorded head are fine
    log2 = _log(tmp_path / "b", verdict, 2)
    head2 = verify_chain(log2).head
    append_entry(log2, verdict, "1" * 64)
    assert verify_chain(log2, expected_head=head2).ok


def _append_many(path: str, verdict: Verdict, count: int) -> None:
    for k in range(count):
        append_entry(path, verdict, hashlib.sha256(f"{os.getpid()}-{k}".encode()).hexdigest())


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
    assert len({json.loads(line)["verdict_sha256"] for line in lines}) == workers * each
    assert len({json.loads(line)["prev"] for line in lines}) == workers * each  # no forks
    assert verify_chain(log).ok


def test_cli_audit_verify_exit_codes(tmp_path: Path, run_cli: Any, write_table: Any) -> None:
    table = write_table(make_docks_frame(), "docks.parquet")
    log = tmp_path / "audit.jsonl"
    for label in ("first", "second"):
        result = run_cli(["check", table, "--out", tmp_path / label, "--audit-log", log,
                          "--label", label, "--quiet"])
        assert result.code == 1 and result.out == ""
    ok = run_cli(["audit", "verify", log])
    assert ok.code == 0 and "intact, 2 entries" in ok.out
    lines = _lines(log)
    _write_lines(log, [lines[1], lines[0]])
    bad = run_cli(["audit", "verify", log])
    assert bad.code == 1 and "line 1" in bad.err
    missing = run_cli(["audit", "verify", tmp_path / "nope.jsonl"])
    assert missing.code == 2 and "not found" in missing.err
