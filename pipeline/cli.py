"""The `wavebook` command: a thin layer over the importable stage functions.

Each subcommand lives in `pipeline/commands/<name>.py` and exposes:
  HELP: str                      one line for the command list
  EXAMPLE: str                   an example shown at the end of its --help
  add_arguments(parser) -> None  declare its options (argparse only: no heavy imports here)
  run(args) -> int               do the work (import polars/duckdb/scipy inside, lazily)

`main` is the one place errors become exit codes (EXIT_CODES, shown by `wavebook --help`); no
Python traceback reaches the user unless they ask with --debug.
"""

from __future__ import annotations

import argparse
import importlib
import sys
import traceback
from collections.abc import Sequence

from pipeline import __version__

EXIT_OK = 0
EXIT_DATA = 1  # a problem with the data or the spec (every problem is listed)
EXIT_USAGE = 2  # a usage error: unknown command or option, an option out of range
EXIT_BUG = 3  # an internal error of wavebook: a bug to report
EXIT_INTERRUPTED = 130  # Ctrl-C (128 + SIGINT, the shell's convention)

EXIT_CODES = f"""exit codes:
  {EXIT_OK}    done
  {EXIT_DATA}    a problem with the data or the spec; every problem is listed
  {EXIT_USAGE}    a usage error (unknown command or option, an option out of range)
  {EXIT_BUG}    an internal error (a bug): a one-line apology; --debug shows the traceback
  {EXIT_INTERRUPTED}  interrupted (Ctrl-C)"""

# command name -> module under pipeline.commands (order = order in --help)
COMMANDS: dict[str, str] = {
    "init": "init",
    "check": "check",
    "stage": "stage",
    "weigh": "weigh",
    "run": "run",
    "book": "book",
    "demo": "demo",
    "rake": "rake",
    "estimate": "estimate",
}


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every available subcommand."""
    parser = argparse.ArgumentParser(
        prog="wavebook",
        description="Stage, weight and estimate tracking-survey waves; publish an HTML result book.",
        epilog=EXIT_CODES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"wavebook {__version__}")
    parser.add_argument("--quiet", action="store_true", help="no progress display")
    parser.add_argument("--debug", action="store_true", help="show the Python traceback of an internal error")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name, module_name in COMMANDS.items():
        module = importlib.import_module(f"pipeline.commands.{module_name}")
        cmd = sub.add_parser(
            name,
            help=module.HELP,
            description=module.HELP,
            epilog=f"example:\n  {module.EXAMPLE}\n\n{EXIT_CODES}",
            formatter_class=argparse.RawDescriptionHelpFormatter,
        )
        cmd.add_argument("--quiet", action="store_true", default=argparse.SUPPRESS, help="no progress display")
        cmd.add_argument(
            "--debug", action="store_true", default=argparse.SUPPRESS, help="show the traceback of an internal error"
        )
        module.add_arguments(cmd)
        cmd.set_defaults(_run=module.run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the `wavebook` command; returns the exit code (see EXIT_CODES).

    A WavebookError prints its summary and every problem (exit 1, or 2 for a UsageError); an
    OSError (permission denied, a folder where a file was expected, a full disk) prints the file
    and the system's reason (exit 1); Ctrl-C prints one line (exit 130); anything else is a bug:
    one line naming the exception type, the traceback only with --debug (exit 3). Usage errors
    found by argparse exit 2 through SystemExit.
    """
    try:
        return _run(argv)
    except KeyboardInterrupt:
        print(
            "interrupted; nothing was half-written (every wave and every file is written all-or-nothing; "
            "steps finished before the interruption are kept)",
            file=sys.stderr,
        )
        return EXIT_INTERRUPTED


def _run(argv: Sequence[str] | None) -> int:
    """Parse the arguments and run the command; every error but Ctrl-C becomes its exit code here."""
    parser = build_parser()
    args = parser.parse_args(argv)
    from pipeline.errors import WavebookError

    try:
        return int(args._run(args) or 0)
    except WavebookError as exc:
        print(exc.render(), file=sys.stderr)
        return exc.exit_code
    except OSError as exc:
        where = f" {exc.filename}" if exc.filename else ""
        print(f"error: cannot use{where}: {exc.strerror or exc}", file=sys.stderr)
        return EXIT_DATA
    except Exception as exc:
        if _is_storage_error(exc):
            print(f"error: the study database could not be read or written: {_first_line(exc)}; "
                  "nothing was half-written (each write is one transaction)", file=sys.stderr)
            return EXIT_DATA
        print(
            f"internal error: wavebook failed with {type(exc).__name__}: {_first_line(exc)}. "
            "Sorry, this is a bug; please report it with the output of the same command run with --debug.",
            file=sys.stderr,
        )
        if getattr(args, "debug", False):
            traceback.print_exc()
        return EXIT_BUG

def _is_storage_error(exc: BaseException) -> bool:
    """DuckDB's own I/O errors (a full disk, a file removed or made read-only while in use): a
    problem of the machine, not of wavebook, reported like an OSError (exit 1)."""
    return type(exc).__module__.split(".")[0] in ("duckdb", "_duckdb") and type(exc).__name__ in (
        "IOException",
        "PermissionException",
    )


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else "(no message)"

if __name__ == "__main__":
    sys.exit(main())
