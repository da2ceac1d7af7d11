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


def build_parser() -> argparse.ArgumentParser:
    from gate.verdict import tool_version

    parser = argparse.ArgumentParser(
        prog="gate", description="Check a feature table for multicollinearity against a policy.")
    parser.add_argument("--version", action="version", version=f"%(prog)s {tool_version()}")
    commands = parser.add_subparsers(title="commands", metavar="COMMAND")

    check = commands.add_parser("check", help="check a table; exit 0 pass/warn, 1 fail, 2 bad "
                                "input", description="Check a feature table against a policy.")
    check.add_argument("table", metavar="TABLE",
                       help=".parquet (file or folder), .csv, .feather/.arrow")
    check.add_argument("--policy", metavar="FILE", help="policy YAML (default: packaged default)")
    check.add_argument("--out", metavar="DIR", default="gate-out",
                       help="folder for verdict.json and summary.html (default: gate-out)")
    check.add_argument("--label", metavar="TEXT", help="free text carried into the verdict")
    check.add_argument("--chunk-rows", metavar="N", type=int,
                       help="rows per chunk when streaming (default: sized from the width)")
    check.set_defaults(handler=_run_check)

    demo = commands.add_parser("demo", help="run the gate on invented bike-share demo tables",
                               description="Write two invented demo tables (one failing, one "
                               "corrected) and check both.")
    demo.add_argument("--out", metavar="DIR", default="gate-demo",
                      help="folder for the demo tables and artefacts (default: gate-demo)")
    demo.set_defaults(handler=_run_demo)
    return parser


def _run_check(args: argparse.Namespace) -> int:
    from gate.api import check
    from gate.artefacts.terminal import summary_lines
    from gate.outputs import write_check_outputs

    verdict = check(args.table, args.policy, label=args.label, chunk_rows=args.chunk_rows)
    written = write_check_outputs(verdict, Path(args.out))
    for line in summary_lines(verdict):
        print(line)
    print(f"  wrote {', '.join(str(p) for p in written)}")
    return verdict.exit_code


def _run_demo(args: argparse.Namespace) -> int:
    from gate.demo import run_demo

    return run_demo(Path(args.out))
