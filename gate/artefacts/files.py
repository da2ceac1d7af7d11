"""Atomic writing: a file (temp file in the same folder, then rename) and a folder of
artefacts (a fresh sibling folder swapped in with one rename), never over anything that is not
a regular file or a real folder."""

from __future__ import annotations

import ctypes
import errno
import fcntl
import os
import shutil
import stat
import tempfile
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager, suppress
from pathlib import Path
from typing import BinaryIO

from gate.errors import OutputError


def write_atomic(path: str | Path, data: str | bytes | Callable[[BinaryIO], object]) -> Path:
    """Write ``data`` to ``path`` so readers see the old file or the new one, never a part.

    ``data`` is text (UTF-8), bytes, or a callable that writes into the open binary file (for
    large payloads that should not be copied into one bytes object first).
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    refuse_special(target, "the output")
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


# --- output paths that are not plain files, and folder swaps (atomic artefact sets) ---------

#: What an output path may not be, by the file-type bits of ``lstat``.
_KINDS = ((stat.S_ISLNK, "a symbolic link"), (stat.S_ISCHR, "a character device"),
          (stat.S_ISBLK, "a block device"), (stat.S_ISFIFO, "a FIFO (named pipe)"),
          (stat.S_ISSOCK, "a socket"), (stat.S_ISDIR, "a folder"))

#: Temp folders and files beside an output are named ``.<name>.gate-stage-<random>``.
STAGE_MARK = ".gate-stage-"


def special_kind(path: Path, *, folder: bool = False) -> str | None:
    """What ``path`` is when it may not be written as an output, else None.

    A missing path is fine. For a file output (``folder=False``) only a regular file is fine;
    for a folder output only a real folder. A symbolic link is never fine (it is not followed:
    a planted link could redirect a write made as root), nor is a device, FIFO or socket.
    """
    try:
        mode = os.lstat(path).st_mode
    except FileNotFoundError:
        return None
    except NotADirectoryError:
        return "below a file, not a folder"
    except PermissionError:
        return "not reachable (permission denied on a folder of its path)"
    if folder and stat.S_ISDIR(mode):
        return None
    if not folder and stat.S_ISREG(mode):
        return None
    if folder and stat.S_ISREG(mode):
        return "a regular file, not a folder"
    for test, kind in _KINDS:
        if test(mode):
            return kind
    return "not a regular file"


def refuse_special(path: Path, what: str, *, folder: bool = False) -> None:
    """Raise OutputError when ``path`` is not something gate may replace (see special_kind)."""
    kind = special_kind(path, folder=folder)
    if kind is not None:
        target = "a folder" if folder else "a regular file"
        raise OutputError(f"{path}: {what} is {kind}; gate writes only to {target} it can "
                          f"replace (links, devices and pipes are refused); give another path")


def fsync_folder(folder: Path) -> None:
    """Make renames inside ``folder`` durable (best effort on filesystems that refuse it)."""
    try:
        fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


@contextmanager
def folder_locks(folders: Iterable[Path], *, shared: bool = False) -> Iterator[None]:
    """Hold an exclusive ``flock`` on each folder (in a fixed order, so two runs never deadlock).

    The lock is on the folder itself, so no lock file is left behind; the kernel releases it
    when the process ends, also on kill -9. ``shared`` takes a reader's lock, which waits for
    writers' commits to finish. Where a filesystem cannot lock a folder (e.g. some
    network filesystems) the run proceeds unlocked.
    """
    opened: dict[tuple[int, int], int] = {}
    try:
        for folder in folders:
            fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
            key = os.fstat(fd)[stat.ST_DEV], os.fstat(fd)[stat.ST_INO]
            if key in opened:
                os.close(fd)
            else:
                opened[key] = fd
        for key in sorted(opened):
            try:
                fcntl.flock(opened[key], fcntl.LOCK_SH if shared else fcntl.LOCK_EX)
            except OSError as exc:
                if exc.errno not in (errno.EBADF, errno.ENOLCK, errno.EOPNOTSUPP, errno.EINVAL):
                    raise
        yield
    finally:
        for fd in opened.values():
            os.close(fd)


def sweep_stale(parent: Path, name: str) -> None:
    """Remove temp folders and files a killed run left beside ``parent/name``.

    Call only while holding :func:`folder_locks` on ``parent``: every writer creates its temp
    entries under that lock and removes or renames them before releasing it, so any entry found
    under the lock belongs to a run that died.
    """
    prefix = f".{name}{STAGE_MARK}"
    try:
        entries = [entry for entry in os.scandir(parent) if entry.name.startswith(prefix)]
    except OSError:
        return
    for entry in entries:
        if entry.is_dir(follow_symlinks=False):
            shutil.rmtree(entry.path, ignore_errors=True)
        else:
            with suppress(OSError):
                os.unlink(entry.path)


def new_stage_folder(target: Path) -> Path:
    """A fresh, empty temp folder beside ``target`` (same filesystem, so it can be renamed
    over it), with the mode a plain mkdir would give."""
    stage = Path(tempfile.mkdtemp(prefix=f".{target.name}{STAGE_MARK}", dir=target.parent))
    os.chmod(stage, 0o777 & ~_current_umask())
    return stage


def new_stage_file(target: Path, data: str | bytes) -> Path:
    """Write ``data`` to a fresh temp file beside ``target`` (fsynced), to be renamed later."""
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}{STAGE_MARK}", dir=target.parent)
    try:
        os.chmod(tmp, 0o666 & ~_current_umask())
        with os.fdopen(fd, "wb") as handle:
            handle.write(data.encode("utf-8") if isinstance(data, str) else data)
            handle.flush()
            os.fsync(handle.fileno())
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return Path(tmp)


def swap_folder(stage: Path, target: Path, *, exchange: bool = True) -> Path | None:
    """Put the folder ``stage`` at ``target`` in one step; return where the old folder went.

    With an existing target, ``renameat2(RENAME_EXCHANGE)`` swaps the two names atomically: at
    every instant ``target`` is the whole old folder or the whole new one, and the old folder
    ends up at ``stage`` (returned, for the caller to remove). Where the kernel or filesystem
    cannot exchange (not Linux, or e.g. some network filesystems), or with ``exchange=False``,
    the old folder is renamed aside first: ``target`` is then briefly absent, never mixed.
    """
    if not os.path.lexists(target):
        os.rename(stage, target)
        return None
    if exchange and _rename_exchange(stage, target):
        return stage
    aside = Path(tempfile.mkdtemp(prefix=f".{target.name}{STAGE_MARK}", dir=target.parent))
    os.rename(target, aside / "old")
    os.rename(stage, target)
    return aside


def _rename_exchange(a: Path, b: Path) -> bool:
    """Exchange two paths atomically; False when this system cannot (the caller falls back)."""
    function = getattr(_libc(), "renameat2", None)
    if function is None:
        return False
    at_fdcwd, rename_exchange = -100, 2
    if function(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange) == 0:
        return True
    code = ctypes.get_errno()
    if code in (errno.ENOSYS, errno.EINVAL, errno.EOPNOTSUPP):
        return False
    raise OSError(code, os.strerror(code), str(b))


def _libc() -> ctypes.CDLL:
    return ctypes.CDLL(None, use_errno=True)
