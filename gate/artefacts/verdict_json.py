"""verdict.json: the machine-readable verdict."""

from __future__ import annotations

import json
from pathlib import Path

from gate.artefacts.files import write_atomic
from gate.judge.verdict import Verdict


def verdict_json(verdict: Verdict) -> str:
    return json.dumps(verdict.to_dict(), indent=2, allow_nan=False) + "\n"


def write_verdict_json(verdict: Verdict, path: str | Path) -> Path:
    return write_atomic(path, verdict_json(verdict))
