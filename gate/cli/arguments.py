"""Arguments with the same meaning in every command that checks a table."""

from __future__ import annotations

import argparse
import sys


def add_table_arguments(command: argparse.ArgumentParser) -> None:
    """TABLE, --policy and --chunk-rows: the same meaning wherever a table is checked."""
    command.add_argument("table", metavar="TABLE",
                         help=".parquet (file or folder), .csv, .feather/.arrow, or a "
                         "database URL (gate check only)")
    command.add_argument("--policy", metavar="FILE",
                         help="policy YAML (default: the packaged default policy)")
    command.add_argument("--chunk-rows", metavar="N", type=int,
                         help="rows per chunk when streaming (default: sized from the width)")
    command.add_argument("--csv-delimiter", metavar="CHAR",
                         help="a CSV table's field delimiter: one character, or 'tab' "
                         "(default: ',')")


def note_default_policy(args: argparse.Namespace) -> None:
    """Without --policy, say which policy applies and what it makes a feature. Said once the
    verdict is written, so an unusable input stays a one-line error."""
    if getattr(args, "policy", None) is None and not getattr(args, "quiet", False):
        from gate.policy.models import packaged_policy_path

        print(f"gate: note: no --policy given; the packaged default policy applies "
              f"({packaged_policy_path()}): every numeric column is a feature (text columns "
              "become dummies), a target or id column too; name them in columns.target and "
              "columns.exclude of your own policy (`gate policy init`)", file=sys.stderr)
