"""Faults and hostile output paths: special files are never replaced, artefact sets are whole.

Every run writes the same label into verdict.json, summary.html, the JUnit file and the
audit entry; a set is "whole" when gate.artefacts.outputs.verify_set finds every file with the sha256 its
manifest lists AND every file carries the manifest's label (an independent check that does not
trust the manifest), and matrices.npz holds the verdict's VIFs.

Device nodes, tmpfs mounts and read-only mounts need root (euid 0): those tests skip otherwise,
saying so. Nothing here touches a system file: device nodes are made in a temp folder.
"""

from __future__ import annotations

import json
import os
import random
import select
import signal
import stat
import subprocess
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from gate.api import check
from gate.artefacts.audit import verify_chain
from gate.artefacts.files import STAGE_MARK, swap_folder
from gate.artefacts.outputs import MANIFEST, plan_outputs, verify_set, write_check_outputs
from gate.artefacts.verdict_json import verdict_json
from gate.judge.verdict import Verdict

CliRunner = Callable[[list[Any]], Any]
Writer = Callable[..., Path]
ROOT = os.geteuid() == 0
needs_root = pytest.mark.skipif(not ROOT, reason="mknod and mount need root (euid 0); "
                                "run the suite as root, as CI containers do, to cover these")


def assert_whole(out: Path, *, junit_outside: Path | None = None,
                 leftovers_ok: bool = False) -> str:
    """The folder holds one run's set; return that run's label."""
    assert verify_set(out) == [], verify_set(out)
    manifest = json.loads((out / MANIFEST).read_text(encoding="utf-8"))
    label = manifest["label"]
    verdict = json.loads((out / "verdict.json").read_text(encoding="utf-8"))
    assert verdict["label"] == label
    if (out / "summary.html").exists():
        assert label in (out / "summary.html").read_text(encoding="utf-8")
    for name in manifest["files"]:
        if name.endswith(".xml"):
            assert f'value="{label}"' in (out / name).read_text(encoding="utf-8")
    if (out / "matrices.npz").exists():
        with np.load(out / "matrices.npz") as arrays:
            vif = dict(zip(arrays["features"].tolist(), arrays["vif"].tolist(), strict=True))
        finite = {k: v for k, v in verdict["diagnostics"]["vif"].items() if v is not None}
        assert finite and all(vif[k] == pytest.approx(v, rel=1e-12) for k, v in finite.items())
    if junit_outside is not None:
        assert f'value="{label}"' in junit_outside.read_text(encoding="utf-8")
    if not leftovers_ok:
        assert not [p for p in out.parent.iterdir() if STAGE_MARK in p.name], \
            "a temp folder was left beside --out"
    return str(label)


def device_node(path: Path) -> Path:
    """A /dev/null-like character device (major 1, minor 3) in a temp folder."""
    os.mknod(path, 0o666 | stat.S_IFCHR, os.makedev(1, 3))
    return path


@pytest.fixture
def table(docks_frame: pd.DataFrame, write_table: Writer) -> Path:
    return write_table(docks_frame, "docks.parquet")


@pytest.fixture
def verdict(table: Path) -> Verdict:
    return check(table)


# --- 1. special files and paths that collide: exit 2 before any computation ---------------

@needs_root
@pytest.mark.parametrize("option", ["--junit", "--audit-log"])
def test_device_node_is_never_replaced(option: str, table: Path, run_cli: CliRunner,
                                       tmp_path: Path) -> None:
    node = device_node(tmp_path / "null-like")
    result = run_cli(["check", table, "--out", tmp_path / "out", option, node])
    assert result.code == 2 and len(result.err_lines) == 1, result.err
    assert "character device" in result.err and str(node) in result.err
    assert stat.S_ISCHR(os.lstat(node).st_mode)  # still the device, not a regular file
    assert not (tmp_path / "out").exists()  # refused before the check wrote anything


def test_fifo_is_refused_without_waiting_for_a_reader(table: Path, run_cli: CliRunner,
                                                      tmp_path: Path) -> None:
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    started = time.monotonic()
    result = run_cli(["check", table, "--out", tmp_path / "out", "--junit", fifo])
    assert result.code == 2 and "FIFO" in result.err and len(result.err_lines) == 1
    assert stat.S_ISFIFO(os.lstat(fifo).st_mode)
    assert time.monotonic() - started < 60  # an open() for writing would have blocked forever


@pytest.mark.parametrize("option", ["--junit", "--audit-log", "--out"])
def test_symlink_is_refused_not_followed(option: str, table: Path, run_cli: CliRunner,
                                         tmp_path: Path) -> None:
    target = tmp_path / "precious"
    if option == "--out":
        target.mkdir()
        (target / "verdict.json").write_text("{}")
    else:
        target.write_text("keep me\n")
    link = tmp_path / "link"
    link.symlink_to(target)
    argv = ["check", table, "--out", link if option == "--out" else tmp_path / "out"]
    if option != "--out":
        argv += [option, link]
    result = run_cli(argv)
    assert result.code == 2 and "symbolic link" in result.err and len(result.err_lines) == 1
    assert link.is_symlink()
    if option == "--out":
        assert (target / "verdict.json").read_text() == "{}"
    else:
        assert target.read_text() == "keep me\n"


@pytest.mark.parametrize(("extra", "words"), [
    (["--junit", "{out}/verdict.json"], "would both write"),
    (["--junit", "{tmp}/same.xml", "--audit-log", "{tmp}/same.xml"], "would both write"),
    (["--audit-log", "{out}/audit.jsonl"], "keep the audit log outside --out"),
    (["--junit", "{out}/sub/gate.xml"], "sub-folder of --out"),
    (["--junit", "{out}"], "holds --out"),
])
def test_colliding_paths_exit_2_before_reading_the_table(extra: list[str], words: str,
                                                         run_cli: CliRunner,
                                                         tmp_path: Path) -> None:
    # The table does not exist: an error about the outputs proves they were checked first.
    out = tmp_path / "out"
    argv = ["check", tmp_path / "absent.parquet", "--out", out]
    argv += [a.format(out=out, tmp=tmp_path) for a in extra]
    result = run_cli(argv)
    assert result.code == 2 and len(result.err_lines) == 1 and words in result.err, result.err
    assert "absent.parquet" not in result.err and not out.exists()


def test_hard_link_to_the_same_file_is_a_collision(table: Path, run_cli: CliRunner,
                                                   tmp_path: Path) -> None:
    (tmp_path / "log.jsonl").write_text("")
    os.link(tmp_path / "log.jsonl", tmp_path / "gate.xml")
    result = run_cli(["check", table, "--out", tmp_path / "out", "--junit",
                      tmp_path / "gate.xml", "--audit-log", tmp_path / "log.jsonl"])
    assert result.code == 2 and "hard links" in result.err


def test_inputs_are_never_overwritten(table: Path, run_cli: CliRunner, tmp_path: Path) -> None:
    before = table.read_bytes()
    result = run_cli(["check", table, "--out", tmp_path / "out", "--junit", table])
    assert result.code == 2 and "input" in result.err
    result = run_cli(["check", table, "--out", tmp_path])  # the folder holding the table
    assert result.code == 2 and len(result.err_lines) == 1
    assert table.read_bytes() == before


def test_out_with_foreign_files_or_the_current_folder_is_refused(
        table: Path, run_cli: CliRunner, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    shared = tmp_path / "shared"
    shared.mkdir()
    (shared / "notes.txt").write_text("mine")
    result = run_cli(["check", table, "--out", shared])
    assert result.code == 2 and "notes.txt" in result.err and "gate did not write" in result.err
    assert (shared / "notes.txt").read_text() == "mine"
    work = tmp_path / "work"
    work.mkdir()
    monkeypatch.chdir(work)
    for out in (".", ".."):
        result = run_cli(["check", table, "--out", out])
        assert result.code == 2 and "current folder" in result.err, (out, result.err)


@needs_root
def test_unwritable_junit_is_found_before_the_pass_and_changes_nothing(
        table: Path, run_cli: CliRunner, tmp_path: Path) -> None:
    out, readonly = tmp_path / "out", tmp_path / "ro"
    assert run_cli(["check", table, "--out", out, "--label", "first"]).code == 1
    readonly.mkdir()
    # Root ignores permission bits, so a read-only mount is what stops root from writing.
    with mounted(readonly, "ro,size=64k"):
        started = time.monotonic()
        result = run_cli(["check", tmp_path / "absent.parquet", "--out", out, "--junit",
                          readonly / "gate.xml", "--label", "second"])
        assert time.monotonic() - started < 30
    assert result.code == 2 and len(result.err_lines) == 1, result.err
    assert "Read-only file system" in result.err and "--junit" in result.err
    assert assert_whole(out) == "first"


# --- 2. atomic sets: full disk, kill -9, concurrent runs -------------------------------------

@contextmanager
def mounted(where: Path, options: str) -> Iterator[Path]:
    """A tmpfs mounted at ``where`` (a temp folder) for the test, unmounted after."""
    made = subprocess.run(["mount", "-t", "tmpfs", "-o", options, "tmpfs", str(where)],
                          capture_output=True, text=True, check=False)
    if made.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here ({made.stderr.strip()}); e.g. a container "
                    "without CAP_SYS_ADMIN")
    try:
        yield where
    finally:
        subprocess.run(["umount", str(where)], check=True)


@needs_root
def test_full_disk_leaves_every_output_as_it_was(verdict: Verdict, table: Path,
                                                 run_cli: CliRunner, tmp_path: Path) -> None:
    disk = tmp_path / "disk"
    disk.mkdir()
    with mounted(disk, "size=1m"):
        out, junit, log = disk / "out", disk / "gate.xml", disk / "audit.jsonl"
        write_check_outputs(replace(verdict, label="first"), out, junit=junit, audit_log=log)
        assert assert_whole(out, junit_outside=junit) == "first"
        free = os.statvfs(disk)
        (disk / "filler").write_bytes(b"\0" * (free.f_bavail * free.f_frsize - 40_000))
        result = run_cli(["check", table, "--out", out, "--junit", junit, "--audit-log", log,
                          "--label", "second"])
        assert result.code == 2 and len(result.err_lines) == 1, result.err
        assert "No space left on device" in result.err and "Traceback" not in result.err
        assert assert_whole(out, junit_outside=junit) == "first"
        chain = verify_chain(log)
        assert chain.ok and chain.entries == 1  # the failed run logged nothing
        (disk / "filler").unlink()
        assert run_cli(["check", table, "--out", out, "--junit", junit, "--audit-log", log,
                        "--label", "third"]).code == 1
        assert assert_whole(out, junit_outside=junit) == "third"
        assert verify_chain(log).entries == 2


def _published_entry_is_logged(out: Path, log: Path) -> None:
    """Write-ahead: the audit log holds an entry for the verdict the folder publishes."""
    manifest = json.loads((out / MANIFEST).read_text(encoding="utf-8"))
    hashes = {json.loads(line)["hash"] for line in log.read_text(encoding="utf-8").splitlines()}
    assert manifest["audit_entry"]["hash"] in hashes


def test_kill_9_at_random_points_never_leaves_a_mixed_set(verdict: Verdict,
                                                           tmp_path: Path) -> None:
    # Children forked from this process write set after set (verdict, summary, matrices, JUnit
    # inside --out, audit entry) and are killed with SIGKILL after a seeded random delay.
    import gate.artefacts.html_summary
    import gate.artefacts.junit
    import gate.artefacts.matrices  # noqa: F401

    out, log = tmp_path / "out", tmp_path / "audit.jsonl"
    options: dict[str, Any] = {"junit": out / "gate.xml", "audit_log": log,
                               "full_matrices": True}
    write_check_outputs(replace(verdict, label="run-0"), out, **options)
    rng = random.Random(1009)
    # A child reports each finished set on a pipe; the parent waits for a seeded random number
    # of them (0 or 1, so the loop surely progresses however loaded the machine is), then kills
    # it after a further seeded random delay (one set takes ~0.45 s on a loaded 2-core machine,
    # so kills land before, inside and after commits). Seven kills: about 5 s.
    kills, interrupted, labels = 0, 0, set()
    while kills < 7:
        done, report = os.pipe()
        pid = os.fork()
        if pid == 0:  # the child: write until killed
            try:
                os.close(done)
                for i in range(10_000):
                    write_check_outputs(replace(verdict, label=f"kill-{kills}-{i}"), out,
                                        **options)
                    os.write(report, b".")
            finally:
                os._exit(0)
        os.close(report)
        for _ in range(rng.choice([0, 1])):
            assert select.select([done], [], [], 120)[0], "the child wrote no set in 120 s"
            os.read(done, 1)
        time.sleep(rng.uniform(0.0, 0.6))
        os.kill(pid, signal.SIGKILL)
        os.waitpid(pid, 0)
        os.close(done)
        kills += 1
        interrupted += any(STAGE_MARK in p.name for p in tmp_path.iterdir())
        labels.add(assert_whole(out, leftovers_ok=True))
        assert verify_chain(log).ok
        _published_entry_is_logged(out, log)
    write_check_outputs(replace(verdict, label="after"), out, **options)
    assert assert_whole(out) == "after"  # the next run swept what the killed ones left
    print(f"kill -9 loop: {kills} kills, {interrupted} mid-write, {len(labels)} distinct sets")
    assert kills >= 5 and len(labels) >= 2


def test_concurrent_runs_commit_one_after_another(verdict: Verdict, tmp_path: Path) -> None:
    # Three writers into one --out at once, while a reader (no lock) checks the folder.
    import gate.artefacts.html_summary
    import gate.artefacts.junit  # noqa: F401

    out, log = tmp_path / "out", tmp_path / "audit.jsonl"
    options: dict[str, Any] = {"junit": out / "gate.xml", "audit_log": log}
    write_check_outputs(replace(verdict, label="start"), out, **options)
    children = []
    for writer in range(3):
        pid = os.fork()
        if pid == 0:
            code = 1
            try:
                for i in range(4):
                    write_check_outputs(replace(verdict, label=f"w{writer}-{i}"), out,
                                        **options)
                code = 0
            finally:
                os._exit(code)
        children.append(pid)
    seen: list[list[str]] = []
    running, codes = set(children), []
    while running:
        for pid in sorted(running):
            done, status = os.waitpid(pid, os.WNOHANG)
            if done:
                running.discard(pid)
                codes.append(os.waitstatus_to_exitcode(status))
        seen.append(verify_set(out, lock=False))
    assert codes == [0, 0, 0]
    assert all(not problems for problems in seen), [p for p in seen if p][:3]
    assert assert_whole(out).startswith("w")
    chain = verify_chain(log)
    assert chain.ok and chain.entries == 13  # every run logged, none lost or interleaved
    # And with the JUnit file outside --out: the last run to commit wins both.
    junit = tmp_path / "gate.xml"
    threads = [threading.Thread(target=write_check_outputs,
                                args=(replace(verdict, label=f"t{k}"), out),
                                kwargs={"junit": junit}) for k in range(3)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert assert_whole(out, junit_outside=junit).startswith("t")


def test_swap_without_rename_exchange_is_never_mixed(tmp_path: Path) -> None:
    # The fallback for systems without renameat2(RENAME_EXCHANGE): old folder aside, new in.
    target, stage = tmp_path / "out", tmp_path / ".out.gate-stage-x"
    for folder, text in ((target, "old"), (stage, "new")):
        folder.mkdir()
        (folder / "verdict.json").write_text(text)
    aside = swap_folder(stage, target, exchange=False)
    assert (target / "verdict.json").read_text() == "new"
    assert aside is not None and (aside / "old" / "verdict.json").read_text() == "old"


# --- check-files folders -----------------------------------------------------------------

def test_check_files_folders_end_in_gate_and_are_not_tables(
        docks_frame: pd.DataFrame, write_table: Writer, run_cli: CliRunner,
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    write_table(docks_frame, "raw.parquet")
    result = run_cli(["check-files", "raw.parquet", "--out", ".gate-out", "--label", "hook"])
    assert result.code == 1, result.err
    folder = tmp_path / ".gate-out" / "raw.parquet.gate"
    assert_whole(folder)
    again = run_cli(["check", folder, "--out", tmp_path / "x"])
    assert again.code == 2 and "not a table" in again.err and len(again.err_lines) == 1


def test_plan_outputs_accepts_a_folder_gate_wrote(verdict: Verdict, tmp_path: Path) -> None:
    out = tmp_path / "out"
    write_check_outputs(verdict, out, junit=out / "gate.xml", full_matrices=True)
    plan = plan_outputs(out)  # a later run without --junit may still replace the folder
    assert plan.folder == out and plan.junit is None


def test_an_audit_log_link_planted_after_the_check_is_refused(tmp_path: Path) -> None:
    # The early output check refuses links; the append itself refuses one planted later
    # (O_NOFOLLOW), so a write made as root cannot be redirected.
    from gate.artefacts.audit import append_entry
    from gate.errors import OutputError

    target = tmp_path / "elsewhere.txt"
    target.write_text("keep me\n")
    log = tmp_path / "audit.jsonl"
    log.symlink_to(target)
    verdict = check(pd.DataFrame({"a": [1.0, 2.0, 4.0, 3.0], "b": [2.0, 1.0, 3.0, 5.0]}))
    with pytest.raises(OutputError, match="links are refused"):
        append_entry(log, verdict_json(verdict).encode())
    assert target.read_text() == "keep me\n"
