"""`gate suggest`: the smallest set of features to drop so every fail-level limit passes."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from gate.cli.arguments import add_table_arguments, say
from gate.errors import GateError


def add_commands(commands: Any) -> None:
    """Register `suggest`."""
    suggest = commands.add_parser(
        "suggest", help="the smallest set of features to drop so every fail-level limit passes",
        description="Check TABLE, then search the smallest set of features to drop (categorical "
        "columns as a whole) so that every fail-level limit passes. Exact dependencies are "
        "resolved first; an exact branch and bound runs when at most 20 features are flagged, "
        "a greedy search with a stated lower bound otherwise. Exit 0 when a set is found, 1 "
        "when no set passes (e.g. --keep forbids it), 2 on bad input.")
    add_table_arguments(suggest)
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
    suggest.add_argument("--hierarchy", action="store_true",
                         help="never drop a main effect while keeping a square or product "
                         "containing it: computed squares/products the gate detects, and "
                         "features named a*b, a:b, a^2 or a**2 whose factors are features")
    suggest.add_argument("--verbose", action="store_true",
                         help="also print the search's node and evaluation counts and time")
    suggest.set_defaults(handler=_run_suggest)



def _run_suggest(args: argparse.Namespace) -> int:
    import json

    from gate.api import check
    from gate.artefacts.files import write_atomic
    from gate.policy.models import load_policy, packaged_policy_path
    from gate.remedies.policy_edit import (
        policy_with_exclusions,
        read_preference,
        suggestion_comment,
        suggestion_tag,
    )
    from gate.remedies.search import suggest

    policy = load_policy(args.policy)
    keep = [k.strip() for k in args.keep.split(",") if k.strip()]
    prefer = read_preference(args.prefer) if args.prefer else None
    verdict = check(args.table, policy, chunk_rows=args.chunk_rows,
                    csv_delimiter=args.csv_delimiter)
    result = suggest(verdict, keep=keep, prefer=prefer, method=args.method,
                     hierarchy=args.hierarchy)
    if args.format == "json":
        sys.stdout.write(json.dumps(result.to_dict(), indent=2, allow_nan=False) + "\n")
    else:
        say(f"{verdict.status.upper()}  {verdict.table.source}  policy '{policy.name}'")
        for line in result.lines(verbose=args.verbose):
            say(line)
    if args.write_policy and result.drops:
        source = Path(args.policy) if args.policy else packaged_policy_path()
        text = policy_with_exclusions(source.read_text(encoding="utf-8"), result.drops,
                                      suggestion_comment(result, policy),
                                      tag=suggestion_tag())
        try:
            written = write_atomic(args.write_policy, text)
        except OSError as exc:
            raise GateError(f"{args.write_policy}: cannot write the policy "
                            f"({exc.strerror or exc}); choose a writable path") from None
        if args.format != "json":
            say(f"  wrote {written} (columns.exclude += {', '.join(result.drops)})")
    elif args.write_policy and args.format != "json":
        print("  nothing to exclude: --write-policy wrote no file")
    if args.policy is None:  # after the output: errors stay one line
        from gate.artefacts.terminal import default_policy_note

        print(default_policy_note(verdict), file=sys.stderr)
    return 0 if result.solved else 1
