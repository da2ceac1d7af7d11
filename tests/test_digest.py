"""The table's sha256, started before the heavy imports (gate.read.digest).

Reference: hashlib.sha256 over the file's bytes, and coreutils' sha256sum where present. Real
files and a real FIFO in a temporary folder; nothing is patched.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import sys
import threading
from pathlib import Path

import pytest

from gate.read import digest


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_started_hash_is_the_files_hash(tmp_path: Path) -> None:
    table = tmp_path / "fleet.parquet"
    table.write_bytes(os.urandom(3 * digest.BLOCK + 17))  # several blocks and a tail
    digest.start_file_sha256(table)
    assert digest.file_sha256(table) == _sha256(table)
    if shutil.which("sha256sum"):
        out = subprocess.run(["sha256sum", str(table)], capture_output=True, text=True,
                             check=True).stdout
        assert out.split()[0] == _sha256(table)
    assert str(table.absolute()) not in digest._started  # taken once: nothing is kept


def test_a_file_changed_after_the_hash_began_is_hashed_again(tmp_path: Path) -> None:
    table = tmp_path / "fleet.csv"
    table.write_bytes(b"odometer_km,engine_hours\n1,2\n")
    digest.start_file_sha256(table)
    worker, _ = digest._started[str(table.absolute())]
    worker.join()
    table.write_bytes(b"odometer_km,engine_hours\n1,2\n3,4\n")  # new size (and mtime)
    assert digest.file_sha256(table) == _sha256(table)


def test_a_replaced_file_of_the_same_size_is_hashed_again(tmp_path: Path) -> None:
    table = tmp_path / "fleet.csv"
    table.write_bytes(b"a\n1\n")
    digest.start_file_sha256(table)
    digest._started[str(table.absolute())][0].join()
    other = tmp_path / "other.csv"
    other.write_bytes(b"a\n2\n")
    os.replace(other, table)  # same size, new inode
    assert digest.file_sha256(table) == _sha256(table)


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs FIFOs")
def test_a_fifo_is_never_opened(tmp_path: Path) -> None:
    fifo = tmp_path / "pipe.parquet"
    os.mkfifo(fifo)
    done = threading.Event()

    def start() -> None:
        digest.start_file_sha256(fifo)
        done.set()

    threading.Thread(target=start, daemon=True).start()
    assert done.wait(5), "starting a hash on a FIFO blocked"
    assert str(fifo.absolute()) not in digest._started
    # A path swapped for a FIFO after that check: hashing refuses it instead of waiting for
    # a writer.
    failed: list[BaseException] = []

    def hash_it() -> None:
        try:
            digest.file_sha256(fifo)
        except OSError as exc:
            failed.append(exc)

    worker = threading.Thread(target=hash_it, daemon=True)
    worker.start()
    worker.join(5)
    assert not worker.is_alive(), "hashing a FIFO blocked"
    assert failed and "not a regular file" in str(failed[0])


def test_missing_paths_and_urls_start_nothing(tmp_path: Path) -> None:
    before = dict(digest._started)
    for name in (tmp_path / "absent.parquet", "postgresql://fleet@db/telemetry", "\0bad"):
        digest.start_file_sha256(name)
    assert digest._started == before


def test_a_check_that_stops_early_leaves_no_started_hash(tmp_path: Path) -> None:
    from gate.cli.main import main

    table = tmp_path / "fleet.csv"
    table.write_text("odometer_km\n1\n2\n3\n")
    assert main(["check", str(table), "--out", str(tmp_path / "out"), "--quiet",
                 "--policy", str(tmp_path / "absent.yaml")]) == 2  # the policy is missing
    assert str(table.absolute()) not in digest._started


def test_command_records_the_files_hash(tmp_path: Path) -> None:
    # The `gate` command starts the hash before its imports; the verdict must carry the
    # file's sha256 all the same.
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(20261202)
    table = tmp_path / "fleet.parquet"
    pq.write_table(pa.table({"load_t": rng.normal(size=200), "speed_kmh": rng.normal(size=200)}),
                   table)
    out = tmp_path / "out"
    done = subprocess.run([sys.executable, "-m", "gate", "check", str(table), "--out", str(out),
                           "--quiet", "--no-html"], capture_output=True, text=True, check=False)
    assert done.returncode in (0, 1), done.stderr
    verdict = json.loads((out / "verdict.json").read_text())
    assert verdict["table"]["sha256"] == _sha256(table)


def test_the_pass_uses_one_blas_thread_only_while_a_hash_runs(tmp_path: Path) -> None:
    """While a table is hashed beside the main pass, each chunk's BLAS call gets one thread
    (the hash holds the other core); once no hash runs, every thread again. A sparse 512 MiB
    file (no disk space) keeps a real hash busy long enough to look."""
    import time

    from threadpoolctl import threadpool_info

    from gate.stats.local import _blas_beside_hash

    def blas_threads() -> int:
        return max(i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas")

    before = blas_threads()
    big = tmp_path / "sparse.bin"
    with big.open("wb") as handle:
        handle.truncate(512 << 20)
    assert not digest.hashing()
    digest.start_file_sha256(big)
    deadline = time.monotonic() + 10.0
    while not digest.hashing() and time.monotonic() < deadline:
        time.sleep(0.001)
    assert digest.hashing()
    with _blas_beside_hash():
        inside = blas_threads()
    assert digest.file_sha256(big) == hashlib.sha256(bytes(512 << 20)).hexdigest()
    assert not digest.hashing()
    with _blas_beside_hash():
        after = blas_threads()
    assert (inside, after, blas_threads()) == (1, before, before)
