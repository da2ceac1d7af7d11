"""Which artefacts `gate check` writes, and where (the CLI's one call after the check).

The folder ``--out DIR`` is one atomic set: its files (verdict.json, summary.html, matrices.npz,
a JUnit file placed inside it, and manifest.json) are written into a fresh sibling folder, which
then replaces DIR in one rename (``renameat2(RENAME_EXCHANGE)`` on Linux). At every instant DIR
is the whole old set or the whole new one, whatever kills the run. manifest.json names the run
and the sha256 of every file, including a JUnit file outside DIR.

Order of a commit, under an exclusive lock on the folders that receive files (concurrent runs
commit one after the other; the last to commit wins whole):

1. remove what killed runs left behind (``.DIR.gate-stage-*`` beside DIR and the JUnit file);
2. write the new folder's files and the outside JUnit file as temp files, fsynced; any failure
   (full disk, permissions) removes them and leaves every output as it was;
3. append the audit-log entry (a write-ahead record: every verdict ever published has an entry;
   if the run dies right after it, the entry's verdict_sha256 matches no published verdict);
4. write manifest.json, swap the folder in, rename the JUnit file into place.

:func:`plan_outputs` checks every path before the long pass (the CLI calls it first), and
:func:`write_check_outputs` checks again before writing.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
import uuid
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from gate.artefacts.files import (
    STAGE_MARK,
    folder_locks,
    fsync_folder,
    new_stage_file,
    new_stage_folder,
    refuse_special,
    swap_folder,
    sweep_stale,
    write_atomic,
)
from gate.artefacts.verdict_json import verdict_json
from gate.errors import OutputError
from gate.judge.verdict import Verdict

MANIFEST = "manifest.json"
#: Files gate may write into DIR; anything else found there means DIR is not gate's to replace.
SET_FILES = ("verdict.json", "summary.html", "matrices.npz", MANIFEST)
#: Folders `gate check-files` writes per table end with this, so they never look like a table
#: (a folder named ``raw.parquet`` would be read as a Parquet dataset).
PER_FILE_SUFFIX = ".gate"


@dataclass(frozen=True)
class OutputPlan:
    """Checked, absolute output paths. ``junit_name`` is set when the JUnit file is inside
    ``folder`` (then it is part of the atomic set); ``junit`` when it is outside."""

    folder: Path
    files: tuple[str, ...]
    junit: Path | None
    junit_name: str | None
    audit_log: Path | None


def plan_outputs(out_dir: str | Path, *, html: bool = True, junit: str | Path | None = None,
                 audit_log: str | Path | None = None, full_matrices: bool = False,
                 inputs: tuple[str | Path | None, ...] = ()) -> OutputPlan:
    """Check every output path before any computation; raise OutputError (exit 2) naming the
    path and the fix. ``inputs`` (the table and policy paths) may not be overwritten."""
    folder = _absolute(out_dir)
    files = ("verdict.json",) + (("summary.html",) if html else ()) + (
        ("matrices.npz",) if full_matrices else ())
    junit_path = _absolute(junit) if junit is not None else None
    audit_path = _absolute(audit_log) if audit_log is not None else None
    junit_name = None
    if junit_path is not None and junit_path.parent == folder:
        junit_name = junit_path.name
    roles: list[tuple[str, Path]] = [(f"--out {name}", folder / name) for name in files]
    if junit_path is not None:
        roles.append(("--junit", junit_path))
    if audit_path is not None:
        roles.append(("--audit-log", audit_path))
    _refuse_collisions(folder, roles, junit_path, audit_path, inputs)
    _refuse_folder(folder, junit_name)
    if junit_path is not None:
        refuse_special(junit_path, "--junit")
    if audit_path is not None:
        refuse_special(audit_path, "--audit-log")
    _probe_writable(folder.parent, "--out")
    if junit_path is not None and junit_name is None:
        _probe_writable(junit_path.parent, "--junit")
    if audit_path is not None:
        _probe_audit_log(audit_path)
    return OutputPlan(folder, files, None if junit_name else junit_path, junit_name, audit_path)


def write_check_outputs(verdict: Verdict, out_dir: Path, *, html: bool = True,
                        junit: Path | None = None, audit_log: Path | None = None,
                        full_matrices: bool = False,
                        inputs: tuple[str | Path | None, ...] = ()) -> list[Path]:
    """Write DIR/verdict.json and DIR/summary.html, and the JUnit XML file and audit-log entry
    when asked, as one atomic set (see the module docstring); return the paths written.

    The audit entry hashes the exact verdict.json bytes written here. great-tables and polars
    are imported only inside the HTML writer.
    """
    if full_matrices:
        verdict = verdict.with_full_matrices()  # every feature's auxiliary regression
    plan = plan_outputs(out_dir, html=html, junit=junit, audit_log=audit_log,
                        full_matrices=full_matrices, inputs=inputs)
    data = verdict_json(verdict).encode("utf-8")
    junit_text = None
    if junit is not None:
        from gate.artefacts.junit import junit_xml

        junit_text = junit_xml(verdict)
    folder = plan.folder
    lock_on = [folder.parent] + ([plan.junit.parent] if plan.junit is not None else [])
    try:
        for place in lock_on:
            place.mkdir(parents=True, exist_ok=True)
        with folder_locks(lock_on):
            _commit(verdict, plan, data, junit_text)
    except OutputError:
        raise
    except OSError as exc:
        raise OutputError(f"{folder}: cannot write the artefacts ({exc.strerror or exc}); "
                          "free some space or choose a writable --out folder") from None
    written = [folder / name for name in plan.files]
    if plan.junit_name is not None:
        written.append(folder / plan.junit_name)
    if plan.junit is not None:
        written.append(plan.junit)
    if plan.audit_log is not None:
        written.append(plan.audit_log)
    return written


def _commit(verdict: Verdict, plan: OutputPlan, data: bytes, junit_text: str | None) -> None:
    """Steps 1-4 of the module docstring; the caller holds the folder locks."""
    folder = plan.folder
    sweep_stale(folder.parent, folder.name)
    if plan.junit is not None:
        sweep_stale(plan.junit.parent, plan.junit.name)
    stage = new_stage_folder(folder)
    junit_temp: Path | None = None
    old: Path | None = None
    try:
        write_atomic(stage / "verdict.json", data)
        if "summary.html" in plan.files:
            from gate.artefacts.html_summary import write_summary_html

            write_summary_html(verdict, stage / "summary.html")
        if "matrices.npz" in plan.files:
            from gate.artefacts.matrices import write_matrices_npz

            write_matrices_npz(verdict, stage / "matrices.npz")
        if junit_text is not None and plan.junit_name is not None:
            write_atomic(stage / plan.junit_name, junit_text)
        if junit_text is not None and plan.junit is not None:
            junit_temp = new_stage_file(plan.junit, junit_text)
        # Checked again under the lock: a link or device planted during the run is refused.
        refuse_special(folder, "--out", folder=True)
        if plan.junit is not None:
            refuse_special(plan.junit, "--junit")
        entry: dict[str, Any] | None = None
        if plan.audit_log is not None:
            from gate.artefacts.audit import append_entry

            entry = append_entry(plan.audit_log, data)  # also keeps the verdict beside the log
        write_atomic(stage / MANIFEST, _manifest(verdict, plan, stage, junit_text, entry))
        fsync_folder(stage)
        old = swap_folder(stage, folder)
        if junit_temp is not None and plan.junit is not None:
            os.rename(junit_temp, plan.junit)
            junit_temp = None
            fsync_folder(plan.junit.parent)
        fsync_folder(folder.parent)
    except BaseException:
        shutil.rmtree(stage if old is None else old, ignore_errors=True)
        if junit_temp is not None:
            junit_temp.unlink(missing_ok=True)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def _manifest(verdict: Verdict, plan: OutputPlan, stage: Path, junit_text: str | None,
              entry: dict[str, Any] | None) -> str:
    names = sorted(p.name for p in stage.iterdir() if p.name != MANIFEST)
    document: dict[str, Any] = {
        "run": uuid.uuid4().hex,
        "created_at": verdict.created_at,
        "label": verdict.label,
        "status": verdict.status,
        "files": {name: _sha256_file(stage / name) for name in names},
        "junit": None,
        "audit_entry": None,
    }
    if plan.junit is not None and junit_text is not None:
        document["junit"] = {"path": str(plan.junit),
                             "sha256": hashlib.sha256(junit_text.encode("utf-8")).hexdigest()}
    if entry is not None and plan.audit_log is not None:
        document["audit_entry"] = {"path": str(plan.audit_log), "seq": entry["seq"],
                                   "hash": entry["hash"]}
    return json.dumps(document, indent=2, ensure_ascii=False) + "\n"


def verify_set(out_dir: str | Path, *, lock: bool = True, attempts: int = 5) -> list[str]:
    """Problems with the artefact set in ``out_dir`` (empty when whole): every file listed in
    manifest.json is present with its sha256, no other file is, and a JUnit file outside the
    folder is the one this run wrote. For readers that must not act on a mixed set.

    It reads the way a reader should: open the folder once and read every file relative to that
    handle, so a run that swaps in a new set meanwhile cannot mix two sets into one reading;
    if the old set was removed while being read, it reads the new one (up to ``attempts``).
    With ``lock`` it first waits for a commit in progress (a shared lock on the parent folder),
    so a JUnit file outside the folder is not caught between its rename and the folder's.
    """
    folder = Path(out_dir)
    if lock:
        with folder_locks([Path(os.path.realpath(folder.parent))], shared=True):
            return verify_set(folder, lock=False, attempts=attempts)
    problems: list[str] = []
    for _ in range(attempts):
        try:
            fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
        except OSError as exc:
            return [f"{folder}: cannot open the folder ({exc.strerror or exc})"]
        try:
            problems = _check_set(folder, fd)
            if not problems or _same_folder(folder, fd):
                return problems
        finally:
            os.close(fd)
    return problems


def _same_folder(folder: Path, fd: int) -> bool:
    """True when ``folder`` still names the folder open as ``fd`` (no swap meanwhile)."""
    try:
        now, held = os.stat(folder), os.fstat(fd)
    except OSError:
        return False
    return (now.st_dev, now.st_ino) == (held.st_dev, held.st_ino)


def _check_set(folder: Path, fd: int) -> list[str]:
    try:
        with open(MANIFEST, "rb", opener=_opener(fd)) as handle:
            manifest = json.loads(handle.read())
        listed: dict[str, str] = dict(manifest["files"])
    except (OSError, ValueError, KeyError, TypeError) as exc:
        return [f"{folder / MANIFEST}: missing or unreadable ({exc})"]
    problems = []
    present = set(os.listdir(fd)) - {MANIFEST}
    for name in sorted(present ^ set(listed)):
        problems.append(f"{name}: {'not in the manifest' if name in present else 'missing'}")
    for name in sorted(present & set(listed)):
        try:
            digest = _sha256_file(Path(name), opener=_opener(fd))
        except OSError:
            digest = None
        if digest != listed[name]:
            problems.append(f"{name}: sha256 differs from the manifest")
    outside = manifest.get("junit")
    if isinstance(outside, dict):
        path = Path(str(outside.get("path")))
        try:
            same = _sha256_file(path) == outside.get("sha256")
        except OSError:
            same = False
        if not same:
            problems.append(f"{path}: the JUnit file is not the one of run {manifest.get('run')}")
    return problems


def _opener(fd: int) -> Callable[[str, int], int]:
    """An ``open(..., opener=)`` that opens names relative to the folder ``fd``."""
    return lambda name, flags: os.open(name, flags, dir_fd=fd)


def per_file_folder(shown: str) -> str:
    """The sub-folder name `gate check-files` uses for a table shown as ``shown``."""
    safe = "".join(ch if ch.isalnum() or ch in "._-" else "_" for ch in shown)
    return safe + PER_FILE_SUFFIX


def _sha256_file(path: Path, opener: Callable[[str, int], int] | None = None) -> str:
    digest = hashlib.sha256()
    with open(path, "rb", opener=opener) as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _absolute(path: str | Path) -> Path:
    """Absolute path with its folders resolved but its last part kept (links there are refused,
    not followed)."""
    lexical = Path(os.path.abspath(path))
    if lexical.parent == lexical:
        return lexical
    return Path(os.path.realpath(lexical.parent)) / lexical.name


def _refuse_collisions(folder: Path, roles: list[tuple[str, Path]], junit: Path | None,
                       audit: Path | None, inputs: tuple[str | Path | None, ...]) -> None:
    seen: dict[Path, str] = {}
    for role, path in roles:
        if path in seen:
            raise OutputError(f"{path}: {seen[path]} and {role} would both write this file; "
                              f"give {role} a path of its own")
        seen[path] = role
    identities: dict[tuple[int, int], str] = {}
    for role, path in roles:  # hard links: two names, one file
        try:
            info = os.stat(path, follow_symlinks=False)
        except OSError:
            continue
        key = (info.st_dev, info.st_ino)
        if key in identities:
            raise OutputError(f"{path}: {identities[key]} and {role} are the same file (hard "
                              f"links); give {role} a path of its own")
        identities[key] = role
    for role, path in roles:
        if folder.is_relative_to(path):
            raise OutputError(f"{path}: {role} is a folder that holds --out {folder}; give "
                              f"{role} a file path")
    if junit is not None and junit.is_relative_to(folder) and junit.parent != folder:
        raise OutputError(f"{junit}: --junit is in a sub-folder of --out {folder}; put it "
                          "directly in --out (it joins the atomic set) or outside it")
    if audit is not None and audit.is_relative_to(folder):
        raise OutputError(f"{audit}: --audit-log is inside --out {folder}, which is replaced "
                          "as a whole on every run; keep the audit log outside --out")
    cwd = Path(os.path.realpath(Path.cwd()))
    if folder.parent == folder or cwd.is_relative_to(folder):
        raise OutputError(f"{folder}: --out is the current folder or one above it; gate "
                          "replaces --out as a whole, so give it a folder of its own, e.g. "
                          "gate-out")
    for given in inputs:
        if given is None or not os.path.exists(given):
            continue
        source = Path(os.path.realpath(given))
        for role, path in roles:
            if path == source or (os.path.exists(path) and os.path.samefile(path, source)):
                raise OutputError(f"{path}: {role} would overwrite an input of this run; give "
                                  f"{role} another path")
        if source.is_relative_to(folder):
            raise OutputError(f"{folder}: --out holds the input {given}, and gate replaces "
                              "--out as a whole; give --out a folder of its own")


def _refuse_folder(folder: Path, junit_name: str | None) -> None:
    """DIR must be missing, or a real folder holding only what gate writes."""
    refuse_special(folder, "--out", folder=True)
    if not folder.exists():
        return
    allowed = set(SET_FILES) | ({junit_name} if junit_name else set())
    try:
        manifest = json.loads((folder / MANIFEST).read_text(encoding="utf-8"))
        allowed |= set(manifest.get("files", {}))
    except (OSError, ValueError, TypeError, AttributeError):
        pass
    try:
        foreign = sorted(name for name in os.listdir(folder) if name not in allowed)
    except OSError as exc:
        raise OutputError(f"{folder}: cannot list --out ({exc.strerror or exc}); choose a "
                          "readable, writable folder") from None
    if foreign:
        shown = ", ".join(foreign[:3]) + (f" and {len(foreign) - 3} more"
                                          if len(foreign) > 3 else "")
        raise OutputError(f"{folder}: --out holds files gate did not write ({shown}); gate "
                          "replaces --out as a whole on every run, so give it an empty or new "
                          "folder")


def _existing_ancestor(place: Path, role: str) -> Path:
    while not os.path.lexists(place):
        place = place.parent
    if not place.is_dir():
        raise OutputError(f"{place}: is not a folder, so {role} cannot be created below it; "
                          f"give {role} another path")
    return place


def _probe_writable(place: Path, role: str) -> None:
    """Create and remove a temp file where the output's temp files will go."""
    where = _existing_ancestor(place, role)
    try:
        fd, probe = tempfile.mkstemp(prefix=f".probe{STAGE_MARK}", dir=where)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise OutputError(f"{where}: cannot write there ({exc.strerror or exc}); choose a "
                          f"writable {role} path") from None


def _probe_audit_log(path: Path) -> None:
    """The audit log is appended in place: open an existing one for appending, else probe its
    folder."""
    if not path.exists():
        _probe_writable(path.parent, "--audit-log")
        return
    try:
        fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_NOFOLLOW | os.O_NONBLOCK)
        os.close(fd)
    except OSError as exc:
        raise OutputError(f"{path}: cannot append to the audit log ({exc.strerror or exc}); "
                          "choose a writable --audit-log path") from None
