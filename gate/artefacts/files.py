"""Atomic file writing: a temp file in the same folder, then rename."""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import BinaryIO


def write_atomic(path: str | Path, data: str | bytes | Callable[[BinaryIO], object]) -> Path:
    """Write ``data`` to ``path`` so readers see the old file or the new one, never a part.

    ``data`` is text (UTF-8), bytes, or a callable that writes into the open binary file (for
    large payloads that should not be copied into one bytes object first).
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        # mkstemp creates the file 0600; give it the mode open() would (0666 minus the umask),
        # so CI jobs and web servers running as other users can read the artefacts.
        os.chmod(tmp, 0o666 & ~_current_umask())
        with os.fdopen(fd, "wb") as handle:
            if callable(data):
                data(handle)
            else:
                handle.write(data.encode("utf-8") if isinstance(data, str) else data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return target


def _current_umask() -> int:
    """The process umask (reading it means setting it; it is restored at once)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask
