"""`wavebook run`: stage the waves whose files changed, compute the tables, write the result book."""

from __future__ import annotations

import argparse

from pipeline.commands.book import add_single_file

HELP = "stage changed waves, compute the tables and write the HTML result book"
EXAMPLE = "wavebook run tracker/study.toml --out tracker/book/latest.html"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """SPEC, --out, --force, --single-file / --folder, --xlsx, --restage, --memory-budget (--quiet is added by pipeline.cli)."""
    parser.add_argument("spec", metavar="SPEC", help="the study spec (TOML file)")
    parser.add_argument(
        "--out",
        metavar="BOOK.html",
        help="where to write the book (default: book/<spec name>.html beside the spec; an existing folder "
        "gets <folder>/<spec name>.html); never the spec, the database, a wave or targets file",
    )
    parser.add_argument(
        "--force",
        action="store_true",
        help="replace an existing --out file that wavebook did not write (never an input of the study)",
    )
    add_single_file(parser)
    parser.add_argument(
        "--xlsx",
        action="store_true",
        help="also write the banner tables as a spreadsheet workbook (<book>_tables.xlsx; needs [tables] "
        "and the xlsx extra: pip install 'wavebook[xlsx]')",
    )
    parser.add_argument(
        "--restage",
        action="store_true",
        help="stage every wave again, even those whose raw file has not changed",
    )
    from pipeline.memory import parse_size

    parser.add_argument(
        "--memory-budget",
        metavar="SIZE",
        type=parse_size,
        default="2GB",
        help="memory for the respondent-level work of one wave, e.g. 2GB or 512MB (default 2GB): "
        "the answer columns are estimated in batches that fit it",
    )


def run(args: argparse.Namespace) -> int:
    """Run the study and print the book's path."""
    from pipeline.runner import run_study

    path = run_study(
        args.spec, out=args.out, restage=args.restage, quiet=args.quiet, force=args.force, single_file=args.single_file,
        xlsx=args.xlsx, memory_budget=args.memory_budget,
    )
    print(path)
    return 0
