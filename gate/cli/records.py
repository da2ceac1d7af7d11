"""`gate audit` and `gate diff`: read the records earlier runs left."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from gate.cli.arguments import say


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
    repair = audit_commands.add_parser(
        "repair", help="cut a torn last entry off; never touches a whole entry",
        description="Cut a torn tail (a write cut off by a crash or a full disk) off an audit "
        "log under the append lock; the cut bytes are kept in a side file. Exit 0 when the "
        "chain is intact afterwards, 1 when it is broken elsewhere.")
    repair.add_argument("file", metavar="FILE", type=Path)
    repair.set_defaults(handler=_run_audit_repair)

    history = commands.add_parser(
        "history", help="write history.html and history.json from an audit log or verdicts",
        description="Summarise the runs recorded in an audit log (with its verdict store) or "
        "a folder of verdict.json files. Exit 1 when the chain is broken or a stored verdict "
        "is missing, 2 on bad input, else 0.")
    history.add_argument("source", metavar="LOG_OR_FOLDER", type=Path)
    history.add_argument("--out", metavar="DIR", default="gate-history", type=Path,
                         help="folder for history.html and history.json (default: gate-history)")
    history.add_argument("--horizon", metavar="DAYS", type=int, default=30,
                         help="list waivers expiring within DAYS first (default: 30)")
    history.add_argument("--since", metavar="DATE", help="only runs on or after DATE (ISO)")
    history.add_argument("--until", metavar="DATE", help="only runs on or before DATE (ISO)")
    history.add_argument("--label", metavar="GLOB", help="only runs whose label matches GLOB")
    history.set_defaults(handler=_run_history)

    diff = commands.add_parser(
        "diff", help="compare two verdicts; exit 1 when NEW is worse",
        description="Compare two verdict.json files: new and resolved findings, worsened VIF "
        "and |r|, status change. Exit 1 when NEW is worse, else 0.")
    diff.add_argument("old", metavar="OLD", type=Path)
    diff.add_argument("new", metavar="NEW", type=Path)
    diff.add_argument("--format", choices=("text", "json"), default="text")
    diff.set_defaults(handler=_run_diff)



def _run_audit_verify(args: argparse.Namespace) -> int:
    from gate.artefacts.audit import run_verify

    code, line = run_verify(args.file, args.head)
    say(line, err=code != 0)
    return code


def _run_audit_repair(args: argparse.Namespace) -> int:
    from gate.artefacts.audit import run_repair

    code, line = run_repair(args.file)
    say(line, err=code != 0)
    return code


def _run_history(args: argparse.Namespace) -> int:
    from gate.artefacts.history_html import run_history

    return run_history(args.source, args.out, horizon=args.horizon, since=args.since,
                       until=args.until, label=args.label)


def _run_diff(args: argparse.Namespace) -> int:
    import json

    from gate.judge.diff import diff_files

    result = diff_files(args.old, args.new)
    if args.format == "json":
        print(json.dumps(result.to_dict(), indent=2, allow_nan=False))
    else:
        for line in result.lines():
            say(line)
    return result.exit_code
