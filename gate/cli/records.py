"""`gate audit` and `gate diff`: read the records earlier runs left."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any


def add_commands(commands: Any) -> None:
    """Register `audit` and `diff`."""
    audit = commands.add_parser("audit", help="work with an audit log",
                                description="Work with a hash-chained audit log.")
    audit_commands = audit.add_subparsers(title="audit commands", metavar="COMMAND")
    verify = audit_commands.add_parser(
        "verify", help="check the hash chain; exit 1 at the first bad entry",
        description="Check every entry of an audit log; report the first edited, removed, "
        "reordered or truncated entry (exit 1), else exit 0.")
    verify.add_argument("file", metavar="FILE", type=Path)
    verify.add_argument("--head", metavar="SHA256",
                        help="the head hash recorded earlier: also detect entries cut off the end")
    verify.set_defaults(handler=_run_audit_verify)

    diff = commands.add_parser(
        "diff", help="compare two verdicts; exit 1 when NEW is worse",
        description="Compare two verdict.json files: new and resolved findings, worsened VIF "
        "and |r|, status change. Exit 1 when NEW is worse, else 0.")
    diff.add_argument("old", metavar="OLD", type=Path)
    diff.add_argument("new", metavar="NEW", type=Path)
    diff.add_argument("--format", choices=("text", "json"), default="text")
    diff.set_defaults(handler=_run_diff)



def _run_audit_verify(args: argparse.Namespace) -> int:
    from gate.artefacts.audit import verify_chain

    report = verify_chain(args.file, expected_head=args.head)
    print(report.describe(), file=sys.stdout if report.ok else sys.stderr)
    return 0 if report.ok else 1


def _run_diff(args: argparse.Namespace) -> int:
    import json

    from gate.judge.diff import diff_files

    result = diff_files(args.old, args.new)
    if args.format == "json":
        print(json.dumps(result.to_dict(), indent=2, allow_nan=False))
    else:
        for line in result.lines():
            print(line)
    return result.exit_code
