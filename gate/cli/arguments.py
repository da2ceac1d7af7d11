"""Arguments with the same meaning in every command that checks a table."""

from __future__ import annotations

import argparse
import sys

from gate.errors import shown


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



def say(line: str, *, err: bool = False) -> None:
    """Print one line of text output with control characters escaped (a column name holding a
    newline or an escape sequence cannot forge lines or drive the terminal)."""
    print(shown(line, None), file=sys.stderr if err else sys.stdout)
