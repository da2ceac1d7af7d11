"""An orchestration-style task: check the feature table before the model trains on it.

Most orchestrators (cron jobs, workflow engines, notebook schedulers) mark a task failed when
its function raises. ``gate.check(...).raise_for_status()`` raises :class:`gate.GateFailed`,
which carries the verdict, so the task can write the artefacts, log the worst findings and fail
with a message people can act on. Invented bike-share data (seeded, not real).

Run ``python examples/pipeline_task.py [OUT_DIR]``: the raw table fails (the task reports why),
the corrected one passes.
"""

from __future__ import annotations

import logging
import sys
import tempfile
from pathlib import Path
from typing import Any

from gate.examples.bike_share_demand import write_tables

from gate.api import check
from gate.errors import GateFailed
from gate.artefacts.outputs import write_check_outputs

log = logging.getLogger("station_demand.features")
POLICY = Path(__file__).with_name("bike_share_policy.yaml")


class FeatureTableRejected(RuntimeError):
    """The task's failure: the orchestrator shows this message and keeps the artefacts."""


def validate_station_features(table: str | Path, policy: str | Path | None,
                              out_dir: str | Path, *, run_id: str) -> dict[str, Any]:
    """Check one feature table; return a small summary for the next task, or raise.

    ``policy`` None uses the packaged default policy.
    """
    verdict = check(table, policy, label=f"station-demand run {run_id}")
    written = write_check_outputs(verdict, Path(out_dir))
    try:
        verdict.raise_for_status()
    except GateFailed as failure:
        worst = [f.message for f in failure.verdict.findings
                 if f.level == "fail" and not f.waived]
        for message in worst[:5]:
            log.error("collinearity gate: %s", message)
        raise FeatureTableRejected(
            f"{table}: feature table rejected by policy '{verdict.policy.name}' "
            f"({len(worst)} failing finding(s)); see {written[0]}") from failure
    return {"status": verdict.status, "features": list(verdict.features),
            "verdict": str(written[0]), "rows_used": verdict.table.rows_used}


def main(argv: list[str]) -> int:
    logging.basicConfig(level=logging.INFO, format="%(levelname)s %(message)s")
    out = Path(argv[0]) if argv else Path(tempfile.mkdtemp(prefix="gate-task-"))
    raw, fixed = write_tables(out)
    outcomes = []
    for run_id, table in (("raw", raw), ("fixed", fixed)):
        try:
            summary = validate_station_features(table, POLICY, out / run_id, run_id=run_id)
        except FeatureTableRejected as rejected:
            log.info("task failed as it should for a bad table: %s", rejected)
            outcomes.append("rejected")
        else:
            log.info("task passed: %s (%d features)", summary["status"],
                     len(summary["features"]))
            outcomes.append("accepted")
    return 0 if outcomes == ["rejected", "accepted"] else 1


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
