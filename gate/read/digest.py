"""sha256 of a table file's bytes (the verdict's ``table.sha256``): the one hashing routine,
and a way to start it before the heavy imports.

Hashing is not free: about 1 GB/s here (OpenSSL's sha256 with SHA-NI; `openssl speed` 1.26
GB/s), so a 1 GB table costs a second of CPU. The check hashes on a thread beside the main
pass, where it takes a core from the read and the Gram. The `gate` command knows the table's
path before it imports numpy, pyarrow and pydantic (about 0.4 s, spent holding the GIL on one
core), so it starts the hash first (:func:`start_file_sha256`); hashlib releases the GIL, so the
hash runs on the idle core. :func:`file_sha256` then takes that result, but only if the file is
still the one hashed: same device, inode, size and modification time when the hash began and
ended and when the result is taken; otherwise it hashes again.

This module imports only the standard library (the command imports it before anything heavy).
"""

from __future__ import annotations

import hashlib
import os
import stat
import threading
from pathlib import Path

#: Bytes per read while hashing.
BLOCK = 1 << 22

_Identity = tuple[int, int, int, int]
_lock = threading.Lock()
#: Hashes being computed right now (any thread), for :func:`hashing`.
_running = [0]
#: Started hashes by absolute path: (thread, result holder).
_started: dict[str, tuple[threading.Thread, list[tuple[_Identity | None, str] | None]]] = {}


def _identity(st: os.stat_result) -> _Identity:
    return (st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns)


def _digest(path: Path) -> tuple[_Identity | None, str]:
    """sha256 of the file's bytes, and the file's identity if it did not change while it was
    read (else None)."""
    with _lock:
        _running[0] += 1
    try:
        return _digest_file(path)
    finally:
        with _lock:
            _running[0] -= 1


def hashing() -> bool:
    """Whether a table's sha256 is being computed at this moment (on some thread): a pass
    that shares the machine's cores with it may want fewer threads of its own."""
    return _running[0] > 0


def _digest_file(path: Path) -> tuple[_Identity | None, str]:
    digest = hashlib.sha256()
    # O_NONBLOCK: a path swapped for a FIFO after the caller's check must not hang the open.
    fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    with os.fdopen(fd, "rb") as handle:
        info = os.fstat(handle.fileno())
        if not stat.S_ISREG(info.st_mode):
            raise OSError(f"{path} is not a regular file")
        before = _identity(info)
        while block := handle.read(BLOCK):
            digest.update(block)
        after = _identity(os.fstat(handle.fileno()))
    return (before if before == after else None), digest.hexdigest()


def start_file_sha256(path: str | Path) -> None:
    """Begin hashing a regular file on a daemon thread (anything else, or any error, is left to
    :func:`file_sha256`, whose caller reports it)."""
    try:
        file = Path(path).absolute()
        if not stat.S_ISREG(os.stat(file).st_mode):
            return  # a FIFO or a device is refused by the reader, never opened here
    except (OSError, ValueError):
        return
    holder: list[tuple[_Identity | None, str] | None] = [None]

    def run() -> None:
        try:
            holder[0] = _digest(file)
        except (OSError, ValueError):
            holder[0] = None

    worker = threading.Thread(target=run, name="gate-early-sha256", daemon=True)
    with _lock:
        if str(file) in _started:
            return
        _started[str(file)] = (worker, holder)
    worker.start()


def file_sha256(path: Path) -> str:
    """sha256 (hex) of the file's bytes: the started hash if the file has not changed since,
    else hashed now."""
    with _lock:
        started = _started.pop(str(path.absolute()), None)
    if started is not None:
        worker, holder = started
        worker.join()
        done = holder[0]
        if done is not None and done[0] is not None:
            try:
                if _identity(os.stat(path)) == done[0]:
                    return done[1]
            except OSError:
                pass
    return _digest(path)[1]


def forget_file_sha256(path: str | Path) -> None:
    """Drop a started hash nobody took (the check stopped early); its thread finishes alone."""
    try:
        key = str(Path(path).absolute())
    except (OSError, ValueError):
        return
    with _lock:
        _started.pop(key, None)
