"""The `gate` command: a thin layer over the Python API, one module per command group.

The one error boundary of the project: a GateError (unusable input) becomes one line on stderr
and exit 2; anything else is a bug and exits 3 with its traceback. Every command returns an
:class:`~gate.errors.ExitCode`.
"""

from __future__ import annotations

import argparse
import gc
import os
import sys
import traceback
from collections.abc import Callable, Sequence

from gate.errors import ExitCode, GateError, shown

#: Exit status when stdout is a pipe the reader closed (`gate diff ... | head -1`): 128 +
#: SIGPIPE, what a command killed by the signal reports, but quietly and without a traceback.
EXIT_BROKEN_PIPE = 141
#: OpenBLAS's idle-thread spin, as log2 of CPU cycles, that the command sets for itself unless the
#: user set one (see main); the benchmark gives its floors the same.
OPENBLAS_THREAD_TIMEOUT = "16"


def main(argv: Sequence[str] | None = None) -> int:
    if argv is None:  # this process is the `gate` command, not a caller of main([...])
        try:
            return _run(None)
        finally:
            _end_quickly()
    return _run(argv)


def _end_quickly() -> None:
    """The command's work is done (every artefact written and closed, output flushed) and the
    interpreter is about to exit. Its teardown collects the cycles of every loaded module
    (pydantic's models, polars, great-tables): 0.06-0.09 s after a small table's check, 0.19 s
    with the HTML summary and 0.2-0.25 s after a 2,000-feature check, measured on the benchmark
    machine. Frozen objects are left to the operating system instead; exit handlers still run
    (temporary folders, a Dask cluster's shutdown), only cyclic garbage is not collected."""
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):
            pass
    gc.disable()
    gc.freeze()


#: The collector's thresholds in the command's process (CPython's default: 700, 10, 10).
#: Importing pydantic, great-tables and polars allocates hundreds of thousands of container
#: objects and set off dozens of collections that free almost nothing; the numeric work is in
#: numpy buffers the collector does not track. A small table's whole check: 0.77-1.03 s ->
#: 0.67-0.97 s (8 alternating runs each). Still collects, for long runs (check-files, history).
GC_THRESHOLDS = (50_000, 20, 100)


def _run(argv: Sequence[str] | None) -> int:
    if argv is None:
        gc.set_threshold(*GC_THRESHOLDS)
        # pydantic looks for third-party plugins (an entry-point scan of every installed
        # package, ~30 ms) before building the first model; the policy models of a command
        # have no use for them. A value the user set is kept.
        os.environ.setdefault("PYDANTIC_DISABLE_PLUGINS", "__all__")
        # OpenBLAS's idle threads spin for 2**28 cycles (~0.1 s) after every BLAS call before
        # they sleep, taking the second core from the hash, pyarrow's decoding and the Python
        # between the calls. 2**16 cycles: 20,000 x 2,000 used 6.0-6.7 CPU seconds instead of
        # 7.7-8.4 (wall 4.3-4.9 s vs 4.6-5.0 s). Read when numpy loads, so set before that.
        os.environ.setdefault("OPENBLAS_THREAD_TIMEOUT", OPENBLAS_THREAD_TIMEOUT)
        # great-tables asks on every render whether it runs in an IPython terminal, importing
        # IPython to find out (0.45 s where Jupyter is installed); polars asks the same. This
        # process is the `gate` command, never an IPython shell, so a None entry makes that
        # import fail at once (both handle ImportError and take their plain-script defaults).
        # Here rather than in `check` alone: `check-files` and `demo` render too.
        sys.modules.setdefault("IPython", None)  # type: ignore[arg-type]
        # The command never forks after rendering, so summary.html may use polars frames.
        from gate.artefacts.frames import use_polars_frames

        use_polars_frames()
    parser = build_parser()
    args = parser.parse_args(argv)
    handler: Callable[[argparse.Namespace], int] | None = getattr(args, "handler", None)
    if handler is None:
        parser.print_help(sys.stderr)
        return ExitCode.BAD_INPUT
    try:
        code = int(handler(args))
        sys.stdout.flush()
        return code
    except BrokenPipeError:
        return _quiet_broken_pipe()
    except GateError as exc:
        print(f"gate: error: {shown(str(exc), None)}", file=sys.stderr)
        return ExitCode.BAD_INPUT
    except KeyboardInterrupt:
        print("gate: interrupted", file=sys.stderr)
        return ExitCode.INTERRUPTED
    except Exception:  # noqa: BLE001 - the bug boundary: report and exit 3
        traceback.print_exc()
        print("gate: internal error (a bug): please report it with the traceback above",
              file=sys.stderr)
        return ExitCode.INTERNAL


def _quiet_broken_pipe() -> int:
    """The reader of stdout went away: point stdout at /dev/null so the interpreter's final
    flush cannot raise again, and exit without a message (as `head`'s writers do)."""
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, sys.stdout.fileno())
    os.close(devnull)
    return EXIT_BROKEN_PIPE


class _VersionAction(argparse.Action):
    """``--version``: the installed distribution's version, looked up only when asked (the
    command groups below import nothing heavy, so --version and --help load neither numpy nor
    pandas; tests/test_startup.py)."""

    def __init__(self, option_strings: Sequence[str], dest: str = argparse.SUPPRESS,
                 default: str = argparse.SUPPRESS, help: str | None = None) -> None:
        super().__init__(option_strings, dest, nargs=0, default=default, help=help)

    def __call__(self, parser: argparse.ArgumentParser, namespace: argparse.Namespace,
                 values: object, option_string: str | None = None) -> None:
        from importlib.metadata import PackageNotFoundError, version

        try:
            number = version("collinearity-gate")
        except PackageNotFoundError:
            number = "0+unknown"  # the same fallback as the verdict's tool_version
        sys.stdout.write(f"{parser.prog} {number}\n")  # stdout, as argparse's own "version"
        parser.exit()


def build_parser() -> argparse.ArgumentParser:
    from gate.cli import check, demo, documents, records, remedies

    parser = argparse.ArgumentParser(
        prog="gate", description="Check a feature table for multicollinearity against a policy.")
    parser.add_argument("--version", action=_VersionAction,
                        help="show the installed version and exit")
    commands = parser.add_subparsers(title="commands", metavar="COMMAND")
    for group in (check, demo, documents, records, remedies):
        group.add_commands(commands)
    return parser
