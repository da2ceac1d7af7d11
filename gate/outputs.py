"""Which artefacts `gate check` writes, and where (the CLI's one call after the check)."""

from __future__ import annotations

from pathlib import Path

from gate.artefacts.verdict_json import write_verdict_json
from gate.errors import OutputError
from gate.verdict import Verdict


def write_check_outputs(verdict: Verdict, out_dir: Path) -> list[Path]:
    """Write DIR/verdict.json (atomically); return the paths written."""
    try:
        return [write_verdict_json(verdict, out_dir / "verdict.json")]
    except OSError as exc:
        raise OutputError(f"{out_dir}: cannot write the artefacts ({exc.strerror or exc}); "
                          "choose a writable --out folder") from None
