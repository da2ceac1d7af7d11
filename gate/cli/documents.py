"""`gate policy` and `gate verdict`: starter policy, validation, JSON Schemas."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from gate.cli.arguments import say


def add_commands(commands: Any) -> None:
    """Register `policy` and `verdict`."""
    policy = commands.add_parser("policy", help="create, validate or describe policy files",
                                 description="Create, validate or describe policy files.")
    policy_commands = policy.add_subparsers(title="policy commands", metavar="COMMAND")
    init = policy_commands.add_parser("init", help="write a commented starter policy",
                                      description="Write a commented starter policy (never "
                                      "overwrites an existing file).")
    init.add_argument("file", metavar="FILE", nargs="?", type=Path,
                      help="where to write it (default: gate-policy.yaml)")
    init.set_defaults(handler=_run_policy_init)
    validate = policy_commands.add_parser("validate", help="check a policy file; exit 2 if invalid",
                                          description="Check a policy file; exit 0 when valid, "
                                          "2 with the first problem when not.")
    validate.add_argument("file", metavar="FILE", type=Path)
    validate.set_defaults(handler=_run_policy_validate)
    policy_schema = policy_commands.add_parser("schema", help="print the policy JSON Schema")
    policy_schema.set_defaults(handler=_run_policy_schema)

    verdict = commands.add_parser("verdict", help="describe verdict.json",
                                  description="Describe the verdict.json document.")
    verdict_commands = verdict.add_subparsers(title="verdict commands", metavar="COMMAND")
    verdict_schema = verdict_commands.add_parser("schema",
                                                 help="print the verdict.json JSON Schema")
    verdict_schema.set_defaults(handler=_run_verdict_schema)


def _run_policy_init(args: argparse.Namespace) -> int:
    from gate.policy.template import write_starter_policy

    file = write_starter_policy(args.file)
    print(f"wrote {file}: edit it, then check it with `gate policy validate {file}`")
    return 0


def _run_policy_validate(args: argparse.Namespace) -> int:
    from gate.policy.models import load_policy, today_utc

    policy = load_policy(args.file)
    limits = policy.limits
    say(f"{args.file}: valid policy '{policy.name}' (|r| >= {limits.pairwise_correlation.max:g} "
          f"{limits.pairwise_correlation.level}; VIF > {limits.vif.max:g} {limits.vif.level}; "
          f"condition index > {limits.condition_number.max:g} {limits.condition_number.level}; "
          f"rank deficiency {limits.rank_deficiency.level}; {len(policy.waivers)} waiver"
          f"{'' if len(policy.waivers) == 1 else 's'})")
    today = today_utc()
    for number, waiver in enumerate(policy.waivers, start=1):
        if waiver.expires < today:
            say(f"  note: waiver {number} ({waiver.rule}: {', '.join(waiver.features)}) expired "
                  f"on {waiver.expires.isoformat()}; checks will report it as a warning")
    return 0


def _run_policy_schema(args: argparse.Namespace) -> int:
    from gate.judge.document import policy_schema, schema_text

    sys.stdout.write(schema_text(policy_schema()))
    return 0


def _run_verdict_schema(args: argparse.Namespace) -> int:
    from gate.judge.document import schema_text, verdict_schema

    sys.stdout.write(schema_text(verdict_schema()))
    return 0
