"""`wavebook demo`: copy the invented demo study into a folder, run it there, print the book's path.

`copy_demo(folder, force=...)` is the importable part: it copies the demo study shipped in
`sample_data/` (spec, wave files, population margins and truth, generator script) and marks the
folder as a demo with a `.wavebook-demo` file, so a later `wavebook demo` may copy over it.
"""

from __future__ import annotations

import argparse
import shutil
from fnmatch import fnmatch
from pathlib import Path

HELP = "copy the invented demo study into a folder and build its result book"
EXAMPLE = "wavebook demo ./wavebook-demo"

DEMO_SPEC = "study.toml"
MARKER = ".wavebook-demo"
# Files a run creates beside the study; never copied from sample_data (a checkout may hold them).
_NOT_COPIED = ("*.duckdb", "*.duckdb.wal", "*.wal", "book", "*_results", "__pycache__", "*.pyc", MARKER, ".wavebook-outputs")


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

    Refuses (WavebookError) a non-empty folder without the demo marker unless `force`. In an
    earlier demo folder only files the demo itself wrote and nobody changed since (recorded by
    `pipeline.outputs`) or files equal to the shipped ones are replaced; every other file the copy
    would replace (an edited study.toml, say) is listed (rule demo-file-changed) and nothing is
    copied unless `force`. The study database and book an earlier run produced are kept (the run
    restages waves whose files changed).
    """
    from pipeline.errors import Problem, WavebookError
    from pipeline.outputs import file_sha256, is_own_output, write_output
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
    files = _demo_files(source)
    changed = [
        Problem(
            "demo-file-changed",
            "this file was not written by the demo or was changed since; move it away or add --force to replace it",
            file=str(target / rel),
        )
        for rel in files
        if (target / rel).exists()
        and not is_own_output(target / rel)
        and not ((target / rel).is_file() and file_sha256(target / rel) == file_sha256(source / rel))
    ]
    if changed and not force:
        raise WavebookError(f"not copying the demo into {target}: it would replace files you changed", changed)
    for rel in files:
        write_output(target / rel, lambda temp, rel=rel: shutil.copyfile(source / rel, temp))
    note = "Copied by `wavebook demo`; `wavebook demo` may copy over this folder.\n"
    (target / MARKER).write_text(note, encoding="utf-8")
    return target


def _demo_files(source: Path) -> list[Path]:
    """The shipped demo files, relative to `source`, without anything a run creates (`_NOT_COPIED`)."""
    return sorted(
        path.relative_to(source)
        for path in source.rglob("*")
        if path.is_file()
        and not any(fnmatch(part, pattern) for part in path.relative_to(source).parts for pattern in _NOT_COPIED)
    )


def run(args: argparse.Namespace) -> int:
    """Copy the demo study, run it and print the book's path."""
    folder = copy_demo(args.folder, force=args.force)
    from pipeline.runner import run_study

    print(run_study(folder / DEMO_SPEC, quiet=args.quiet, force=args.force))
    return 0
