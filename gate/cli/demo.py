"""`gate demo`: invented bike-share tables, checked before and after the fix."""

from __future__ import annotations

import argparse
import shutil
from importlib import resources
from pathlib import Path
from typing import Any

POLICY_FILE = "bike_share_policy.yaml"


def run_demo(out_dir: Path) -> int:
    """Write the demo tables and policy into ``out_dir``, check both tables, report."""
    from gate.api import check
    from gate.artefacts.outputs import write_check_outputs
    from gate.artefacts.terminal import summary_lines
    from gate.examples.bike_share_demand import DROPPED_IN_FIX, write_tables
    from gate.policy.models import load_policy

    out_dir.mkdir(parents=True, exist_ok=True)
    raw_path, fixed_path = write_tables(out_dir)
    policy_path = out_dir / POLICY_FILE
    shutil.copyfile(Path(str(resources.files("gate.examples").joinpath(POLICY_FILE))),
                    policy_path)
    policy = load_policy(policy_path)
    print("Invented demo data: hourly rentals at bike-share docking stations.\n")
    outcomes = []
    for title, table, sub in (
        ("1. Raw feature table", raw_path, "raw"),
        (f"2. Corrected table (dropped {', '.join(DROPPED_IN_FIX)})", fixed_path, "fixed"),
    ):
        verdict = check(table, policy, label=f"demo {sub}")
        written = write_check_outputs(verdict, out_dir / sub)
        outcomes.append(verdict.status)
        print(title)
        for line in summary_lines(verdict):
            print(f"  {line}")
        print(f"  artefacts: {', '.join(str(p) for p in written)}")
        print(f"  exit code of `gate check`: {verdict.exit_code}\n")
    print(f"Re-run either check yourself:\n  gate check {raw_path} --policy {policy_path} "
          f"--out {out_dir / 'raw'}")
    expected = outcomes[0] == "fail" and outcomes[1] != "fail"
    return 0 if expected else 1


def add_commands(commands: Any) -> None:
    """Register `demo`."""
    demo = commands.add_parser("demo", help="run the gate on invented bike-share demo tables",
                               description="Write two invented demo tables (one failing, one "
                               "corrected) and check both.")
    demo.add_argument("--out", metavar="DIR", default="gate-demo",
                      help="folder for the demo tables and artefacts (default: gate-demo)")
    demo.set_defaults(handler=_run_demo)


def _run_demo(args: argparse.Namespace) -> int:
    return run_demo(Path(args.out))
