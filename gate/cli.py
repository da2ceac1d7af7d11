"""The `gate` command: a thin layer over the Python API.

The one error boundary of the project: a GateError (unusable input) becomes one line on stderr
and exit 2; anything else is a bug and exits 3 with its traceback.
"""

from __future__ import annotations

import argparse
import sys
import traceback
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from gate.errors import GateError

EXIT_INPUT = 2
EXIT_BUG = 3


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    handler: Callable[[argparse.Namespace], int] | None = getattr(args, "handler", None)
    if handler is None:
        parser.print_help(sys.stderr)
        return EXIT_INPUT
    try:
        return handler(args)
    except GateError as exc:
        print(f"gate: error: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        print("gate: interrupted", file=sys.stderr)
        return 130
    except Exception:  # noqa: BLE001 - the bug boundary: report and exit 3
        traceback.print_exc()
        print("gate: internal error (a bug): please report it with the traceback above",
              file=sys.stderr)
        return EXIT_BUG


def _add_table_arguments(command: argparse.ArgumentParser) -> None:
    """TABLE, --policy and --chunk-rows: the same meaning wherever a table is checked."""
    command.add_argument("table", metavar="TABLE",
                         help=".parquet (file or folder), .csv, .feather/.arrow")
    command.add_argument("--policy", metavar="FILE",
                         help="policy YAML (default: the packaged default policy)")
    command.add_argument("--chunk-rows", metavar="N", type=int,
                         help="rows per chunk when streaming (default: sized from the width)")


def build_parser() -> argparse.ArgumentParser:
    from gate.verdict import tool_version

    parser = argparse.ArgumentParser(
        prog="gate", description="Check a feature table for multicollinearity against a policy.")
    parser.add_argument("--version", action="version", version=f"%(prog)s {tool_version()}")
    commands = parser.add_subparsers(title="commands", metavar="COMMAND")

    check = commands.add_parser("check", help="check a table; exit 0 pass/warn, 1 fail, 2 bad "
                                "input", description="Check a feature table against a policy.")
    _add_table_arguments(check)
    check.add_argument("--out", metavar="DIR", default="gate-out",
                       help="folder for verdict.json and summary.html (default: gate-out)")
    check.add_argument("--label", metavar="TEXT", help="free text carried into the verdict")
    check.add_argument("--junit", metavar="FILE", type=Path,
                       help="also write JUnit XML (one test case per rule and subject)")
    check.add_argument("--audit-log", metavar="FILE", type=Path,
                       help="append a hash-chained entry to this JSON Lines audit log")
    check.add_argument("--format", choices=("text", "json"), default="text",
                       help="stdout: a text summary (default) or the verdict.json document")
    check.add_argument("--quiet", action="store_true",
                       help="print nothing on stdout in text format (errors still go to stderr)")
    check.add_argument("--engine", choices=("local", "dask"), default="local",
                       help="where the passes run: this process (default) or a Dask cluster")
    check.add_argument("--scheduler", metavar="ADDRESS",
                       help="with --engine dask: scheduler address (default: a local cluster "
                       "of 2 workers)")
    check.add_argument("--full-matrices", action="store_true",
                       help="also write matrices.npz (correlation, inverse correlation, VIF, "
                       "condition indices, proportions, feature names) beside the verdict")
    check.set_defaults(handler=_run_check)

    demo = commands.add_parser("demo", help="run the gate on invented bike-share demo tables",
                               description="Write two invented demo tables (one failing, one "
                               "corrected) and check both.")
    demo.add_argument("--out", metavar="DIR", default="gate-demo",
                      help="folder for the demo tables and artefacts (default: gate-demo)")
    demo.set_defaults(handler=_run_demo)
    _add_artefact_commands(commands)
    _add_remedy_commands(commands)
    return parser


def _add_artefact_commands(commands: Any) -> None:
    """`gate audit`, `gate diff`, `gate policy`, `gate verdict` (artefacts and schemas)."""
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


def _run_check(args: argparse.Namespace) -> int:
    from gate.api import check
    from gate.artefacts.terminal import summary_lines
    from gate.outputs import write_check_outputs
    from gate.progress import terminal_progress

    if args.scheduler and args.engine != "dask":
        raise GateError("--scheduler needs --engine dask; add --engine dask")
    _preload_html_writer()
    verdict = check(args.table, args.policy, label=args.label, chunk_rows=args.chunk_rows,
                    engine=args.engine, scheduler=args.scheduler,
                    progress=None if args.quiet else terminal_progress)
    written = write_check_outputs(verdict, Path(args.out), junit=getattr(args, "junit", None),
                                  audit_log=getattr(args, "audit_log", None),
                                  full_matrices=args.full_matrices)
    if getattr(args, "format", "text") == "json":
        from gate.artefacts.verdict_json import verdict_json

        sys.stdout.write(verdict_json(verdict))
    elif not getattr(args, "quiet", False):
        for line in summary_lines(verdict):
            print(line)
        print(f"  wrote {', '.join(str(p) for p in written)}")
    return verdict.exit_code


def _preload_html_writer() -> None:
    """Import the HTML writer's heavy libraries (pandas, great-tables: ~0.9 s) on a thread
    while the check reads the table; the writer finds them loaded. Measured on 20,000 x 2,000:
    `gate check` 7.5 s -> 6.9 s (mean of 3 alternating runs each). Any failure here is ignored:
    the writer's own import reports it."""
    import threading

    # great-tables probes for IPython on every render to guess the notebook it runs in; in this
    # command-line process there is none, and importing IPython costs ~0.45 s. A None entry
    # makes that probe's import fail at once (it handles ImportError and renders plain HTML).
    sys.modules.setdefault("IPython", None)  # type: ignore[arg-type]

    def load() -> None:
        try:
            import great_tables  # noqa: F401
            import pandas  # noqa: F401

            import gate.artefacts.html_summary  # noqa: F401
        except Exception:  # noqa: BLE001, S110 - reported by the writer's own import
            pass

    threading.Thread(target=load, name="gate-preload-html", daemon=True).start()


def _run_audit_verify(args: argparse.Namespace) -> int:
    from gate.artefacts.audit import run_verify

    code, line = run_verify(args.file, args.head)
    print(line, file=sys.stdout if code == 0 else sys.stderr)
    return code


def _run_audit_repair(args: argparse.Namespace) -> int:
    from gate.artefacts.audit import run_repair

    code, line = run_repair(args.file)
    print(line, file=sys.stdout if code == 0 else sys.stderr)
    return code


def _run_history(args: argparse.Namespace) -> int:
    from gate.artefacts.history_html import run_history

    return run_history(args.source, args.out, horizon=args.horizon, since=args.since,
                       until=args.until, label=args.label)


def _run_diff(args: argparse.Namespace) -> int:
    import json

    from gate.diffing import diff_files

    result = diff_files(args.old, args.new)
    if args.format == "json":
        print(json.dumps(result.to_dict(), indent=2, allow_nan=False))
    else:
        for line in result.lines():
            print(line)
    return result.exit_code


def _run_policy_init(args: argparse.Namespace) -> int:
    from gate.policy_template import write_starter_policy

    file = write_starter_policy(args.file)
    print(f"wrote {file}: edit it, then check it with `gate policy validate {file}`")
    return 0


def _run_policy_validate(args: argparse.Namespace) -> int:
    from gate.policy import load_policy, today_utc

    policy = load_policy(args.file)
    limits = policy.limits
    print(f"{args.file}: valid policy '{policy.name}' (|r| >= {limits.pairwise_correlation.max:g} "
          f"{limits.pairwise_correlation.level}; VIF > {limits.vif.max:g} {limits.vif.level}; "
          f"condition index > {limits.condition_number.max:g} {limits.condition_number.level}; "
          f"rank deficiency {limits.rank_deficiency.level}; {len(policy.waivers)} waiver"
          f"{'' if len(policy.waivers) == 1 else 's'})")
    today = today_utc()
    for number, waiver in enumerate(policy.waivers, start=1):
        if waiver.expires < today:
            print(f"  note: waiver {number} ({waiver.rule}: {', '.join(waiver.features)}) expired "
                  f"on {waiver.expires.isoformat()}; checks will report it as a warning")
    return 0


def _run_policy_schema(args: argparse.Namespace) -> int:
    from gate.schemas import policy_schema, schema_text

    sys.stdout.write(schema_text(policy_schema()))
    return 0


def _run_verdict_schema(args: argparse.Namespace) -> int:
    from gate.schemas import schema_text, verdict_schema

    sys.stdout.write(schema_text(verdict_schema()))
    return 0


def _run_demo(args: argparse.Namespace) -> int:
    from gate.demo import run_demo

    return run_demo(Path(args.out))


def _add_remedy_commands(commands: Any) -> None:
    """`gate suggest` (what to drop) and `gate check-files` (several tables, for commit hooks)."""
    suggest = commands.add_parser(
        "suggest", help="the smallest set of features to drop so every fail-level limit passes",
        description="Check TABLE, then search the smallest set of features to drop (categorical "
        "columns as a whole) so that every fail-level limit passes. Exact dependencies are "
        "resolved first; an exact branch and bound runs when at most 20 features are flagged, "
        "a greedy search with a stated lower bound otherwise. Exit 0 when a set is found, 1 "
        "when no set passes (e.g. --keep forbids it), 2 on bad input.")
    _add_table_arguments(suggest)
    suggest.add_argument("--keep", metavar="A,B", default="",
                         help="comma-separated features (or categorical columns) never dropped")
    suggest.add_argument("--prefer", metavar="FILE",
                         help="features from most to least important, one per line; breaks "
                         "ties (default: lowest loss of explained variance)")
    suggest.add_argument("--write-policy", metavar="OUT",
                         help="write a copy of the policy with the drops added to "
                         "columns.exclude (atomically)")
    suggest.add_argument("--method", choices=("auto", "exact", "greedy"), default="auto",
                         help="search: auto (exact up to 20 candidates), exact, greedy")
    suggest.add_argument("--format", choices=("text", "json"), default="text",
                         help="stdout: the steps as text (default) or as JSON")
    suggest.set_defaults(handler=_run_suggest)

    files = commands.add_parser(
        "check-files", help="check several tables (the commit-hook entry); exit = the worst",
        description="Check each FILE against one policy, writing DIR/<file>/verdict.json and "
        "summary.html. Exit 0 if all pass or warn, 1 if any fails, 2 if any is unusable.")
    files.add_argument("files", metavar="FILE", nargs="*",
                       help="tables (.parquet, .csv, .feather/.arrow)")
    files.add_argument("--policy", metavar="FILE", help="policy YAML (default: packaged)")
    files.add_argument("--out", metavar="DIR", default="gate-out",
                       help="folder for one sub-folder of artefacts per table (default: gate-out)")
    files.add_argument("--label", metavar="TEXT", help="free text carried into each verdict")
    files.set_defaults(handler=_run_check_files)


def _run_suggest(args: argparse.Namespace) -> int:
    import json

    from gate.api import check
    from gate.artefacts.files import write_atomic
    from gate.policy import load_policy, packaged_policy_path
    from gate.suggest import (
        policy_with_exclusions,
        read_preference,
        suggest,
        suggestion_comment,
    )

    policy = load_policy(args.policy)
    keep = [k.strip() for k in args.keep.split(",") if k.strip()]
    prefer = read_preference(args.prefer) if args.prefer else None
    verdict = check(args.table, policy, chunk_rows=args.chunk_rows)
    result = suggest(verdict, keep=keep, prefer=prefer, method=args.method)
    if args.format == "json":
        sys.stdout.write(json.dumps(result.to_dict(), indent=2, allow_nan=False) + "\n")
    else:
        print(f"{verdict.status.upper()}  {verdict.table.source}  policy '{policy.name}'")
        for line in result.lines():
            print(line)
    if args.write_policy and result.drops:
        source = Path(args.policy) if args.policy else packaged_policy_path()
        text = policy_with_exclusions(source.read_text(encoding="utf-8"), result.drops,
                                      suggestion_comment(result, policy))
        try:
            written = write_atomic(args.write_policy, text)
        except OSError as exc:
            raise GateError(f"{args.write_policy}: cannot write the policy "
                            f"({exc.strerror or exc}); choose a writable path") from None
        if args.format != "json":
            print(f"  wrote {written} (columns.exclude += {', '.join(result.drops)})")
    elif args.write_policy and args.format != "json":
        print("  nothing to exclude: --write-policy wrote no file")
    return 0 if result.solved else 1


def _run_check_files(args: argparse.Namespace) -> int:
    from gate.api import check
    from gate.outputs import write_check_outputs
    from gate.policy import load_policy

    policy = load_policy(args.policy)  # a bad policy is one error for every file: exit 2 now
    worst = 0
    used: set[str] = set()
    for name in args.files:
        path = Path(name).resolve()
        shown = path.relative_to(Path.cwd()) if path.is_relative_to(Path.cwd()) else path.name
        folder = "".join(ch if ch.isalnum() or ch in "._-" else "_" for ch in str(shown))
        while folder in used:
            folder += "_"
        used.add(folder)
        try:
            verdict = check(name, policy, label=args.label)
            written = write_check_outputs(verdict, Path(args.out) / folder)
        except GateError as exc:  # this file is unusable; report it and check the others
            print(f"gate: error: {exc}", file=sys.stderr)
            worst = max(worst, EXIT_INPUT)
            continue
        fails = sum(1 for f in verdict.findings if f.level == "fail" and not f.waived)
        print(f"{verdict.status.upper():4}  {name}  ({fails} fail finding"
              f"{'s' if fails != 1 else ''}; {written[0].parent})")
        if verdict.status == "fail":
            for finding in [f for f in verdict.findings if f.level == "fail"
                            and not f.waived][:3]:
                print(f"      {finding.message}")
        worst = max(worst, verdict.exit_code)
    return worst
