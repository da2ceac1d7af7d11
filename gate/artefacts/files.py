"""Atomic file writing: a temp file in the same folder, then rename."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path


def write_atomic(path: str | Path, data: str | bytes) -> Path:
    """Write ``data`` to ``path`` so readers see the old file or the new one, never a part."""
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    payload = data.encode("utf-8") if isinstance(data, str) else data
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        # mkstemp creates the file 0600; give it the mode open() would (0666 minus the umask),
        # so CI jobs and web servers running as other users can read the artefacts.
        os.chmod(tmp, 0o666 & ~_current_umask())
        with os.fdopen(fd, "wb") as handle:
            handle.write(payload)
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
