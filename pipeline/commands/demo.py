"""`wavebook demo`: copy the invented demo study into a folder, run it there, print the book's path.

`copy_demo(folder, force=...)` is the importable part: it copies the demo study shipped in
`sample_data/` (spec, wave files, population margins and truth, generator script) and marks the
folder as a demo with a `.wavebook-demo` file, so a later `wavebook demo` may copy over it.
"""

from __future__ import annotations

import argparse
import shutil
from pathlib import Path

HELP = "copy the invented demo study into a folder and build its result book"
EXAMPLE = "wavebook demo ./wavebook-demo"

DEMO_SPEC = "study.toml"
MARKER = ".wavebook-demo"
# Files a run creates beside the study; never copied from sample_data (a checkout may hold them).
_NOT_COPIED = ("*.duckdb", "*.duckdb.wal", "*.wal", "book", "*_results", "__pycache__", "*.pyc", MARKER)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """FOLDER and --force (--quiet is added by pipeline.cli)."""
    parser.add_argument(
        "folder",
        metavar="FOLDER",
        nargs="?",
        default="wavebook-demo",
        help="where to put the demo study (default: ./wavebook-demo)",
    )
    parser.add_argument(
        "--force",
        action="store_true",
        help="copy into FOLDER even if it holds files that are not from an earlier demo",
    )


def copy_demo(folder: str | Path, *, force: bool = False) -> Path:
    """Copy the demo study into `folder` (created if needed) and return the folder.

    Refuses (WavebookError) a non-empty folder without the demo marker unless `force`; files of
    an earlier demo are overwritten, the study database and book it produced are kept (the run
    restages waves whose files changed).
    """
    from pipeline.errors import Problem, WavebookError
    from pipeline.resources import resource_dir

    target = Path(folder)
    if target.exists() and not target.is_dir():
        raise WavebookError(f"cannot put the demo in {target}: it is a file, not a folder")
    if target.is_dir() and any(target.iterdir()) and not (target / MARKER).is_file() and not force:
        raise WavebookError(
            f"{target} is not empty and does not hold an earlier wavebook demo",
            [
                Problem(
                    "demo-folder-not-empty",
                    "choose an empty or new folder, or add --force to copy into it anyway",
                    file=str(target),
                )
            ],
        )
    source = resource_dir("sample_data")
    if not (source / DEMO_SPEC).is_file():
        raise WavebookError(f"the demo study is incomplete: {source / DEMO_SPEC} is missing; reinstall wavebook")
    shutil.copytree(source, target, ignore=shutil.ignore_patterns(*_NOT_COPIED), dirs_exist_ok=True)
    note = "Copied by `wavebook demo`; `wavebook demo` may copy over this folder.\n"
    (target / MARKER).write_text(note, encoding="utf-8")
    return target


def run(args: argparse.Namespace) -> int:
    """Copy the demo study, run it and print the book's path."""
    folder = copy_demo(args.folder, force=args.force)
    from pipeline.runner import run_study

    print(run_study(folder / DEMO_SPEC, quiet=args.quiet))
    return 0
