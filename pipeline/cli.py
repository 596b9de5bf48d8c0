"""The `wavebook` command: a thin layer over the importable stage functions.

Each subcommand lives in `pipeline/commands/<name>.py` and exposes:
  HELP: str                      one line for the command list
  EXAMPLE: str                   an example shown at the end of its --help
  add_arguments(parser) -> None  declare its options (argparse only: no heavy imports here)
  run(args) -> int               do the work (import polars/duckdb/scipy inside, lazily)

Exit codes: 0 ok, 1 data or spec error (a WavebookError, printed with every problem), 2 usage.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from pipeline import __version__

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
    )
    parser.add_argument("--version", action="version", version=f"wavebook {__version__}")
    parser.add_argument("--quiet", action="store_true", help="no progress display")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name, module_name in COMMANDS.items():
        module = importlib.import_module(f"pipeline.commands.{module_name}")
        cmd = sub.add_parser(
            name,
            help=module.HELP,
            description=module.HELP,
            epilog=f"example:\n  {module.EXAMPLE}",
            formatter_class=argparse.RawDescriptionHelpFormatter,
        )
        cmd.add_argument("--quiet", action="store_true", default=argparse.SUPPRESS, help="no progress display")
        module.add_arguments(cmd)
        cmd.set_defaults(_run=module.run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the `wavebook` command; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    from pipeline.errors import WavebookError

    try:
        return int(args._run(args) or 0)
    except WavebookError as exc:
        print(exc.render(), file=sys.stderr)
        return 1
    except FileNotFoundError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
