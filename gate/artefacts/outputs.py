"""Which artefacts `gate check` writes, and where (the CLI's one call after the check)."""

from __future__ import annotations

import hashlib
from pathlib import Path

from gate.artefacts.files import write_atomic
from gate.artefacts.verdict_json import verdict_json
from gate.errors import OutputError
from gate.judge.verdict import Verdict


def write_check_outputs(verdict: Verdict, out_dir: Path, *, html: bool = True,
                        junit: Path | None = None, audit_log: Path | None = None,
                        full_matrices: bool = False) -> list[Path]:
    """Write DIR/verdict.json and DIR/summary.html (atomically), and the JUnit XML file and
    audit-log entry when asked; return the paths written.

    The audit entry hashes the exact verdict.json bytes written here. great-tables and pandas
    are imported only inside the HTML writer.
    """
    if full_matrices:
        verdict = verdict.with_full_matrices()  # every feature's auxiliary regression
    try:
        data = verdict_json(verdict).encode("utf-8")
        written = [write_atomic(out_dir / "verdict.json", data)]
        if html:
            from gate.artefacts.html_summary import write_summary_html

            written.append(write_summary_html(verdict, out_dir / "summary.html"))
        if full_matrices:
            from gate.artefacts.matrices import write_matrices_npz

            written.append(write_matrices_npz(verdict, out_dir / "matrices.npz"))
    except OutputError:
        raise
    except OSError as exc:
        raise OutputError(f"{out_dir}: cannot write the artefacts ({exc.strerror or exc}); "
                          "choose a writable --out folder") from None
    if junit is not None:
        from gate.artefacts.junit import write_junit

        try:
            written.append(write_junit(verdict, junit))
        except OSError as exc:
            if isinstance(exc, OutputError):
                raise
            raise OutputError(f"{junit}: cannot write the JUnit XML ({exc.strerror or exc}); "
                              "choose a writable --junit path") from None
    if audit_log is not None:
        from gate.artefacts.audit import append_entry

        append_entry(audit_log, verdict, hashlib.sha256(data).hexdigest())
        written.append(audit_log)
    return written
