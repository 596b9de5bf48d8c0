"""`wavebook book`: render the result book again from the stored results of the last run."""

from __future__ import annotations

import argparse

HELP = "render the HTML result book again from the last run's stored results, without recomputing"
EXAMPLE = "wavebook book tracker/study.toml --out tracker/book/latest.html"


def add_single_file(parser: argparse.ArgumentParser) -> None:
    """--single-file / --folder: the book's output form (default: one file under 100 tables and 2 MB)."""
    form = parser.add_mutually_exclusive_group()
    form.add_argument(
        "--single-file", dest="single_file", action="store_true", default=None,
        help="write the book as one HTML file (default when the study has fewer than 100 tables and the "
        "page stays under 2 MB)",
    )
    form.add_argument(
        "--folder", dest="single_file", action="store_false",
        help="write the book as a folder: index.html and a page per section",
    )


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """SPEC, --out, --force, --single-file / --folder (--quiet is added by pipeline.cli)."""
    parser.add_argument("spec", metavar="SPEC", help="the study spec (TOML file)")
    parser.add_argument(
        "--out",
        metavar="BOOK.html",
        help="where to write the book (default: book/<spec name>.html beside the spec; a folder "
        "book goes to the folder of that name without .html)",
    )
    parser.add_argument(
        "--force",
        action="store_true",
        help="replace an existing --out file that wavebook did not write (never an input of the study)",
    )
    add_single_file(parser)


def run(args: argparse.Namespace) -> int:
    """Re-render the book and print its path."""
    from pipeline.runner import rebuild_book

    print(rebuild_book(args.spec, out=args.out, single_file=args.single_file, quiet=args.quiet, force=args.force))
    return 0
