"""`wavebook init`: draft a study spec from a wave file."""

from __future__ import annotations

import argparse

HELP = "draft a study spec (TOML) from a wave file, to review and complete"
EXAMPLE = "wavebook init waves/wave1.csv --out study.toml --id resp_id"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of `wavebook init`."""
    parser.add_argument("data", help="a wave file: .csv or .parquet")
    parser.add_argument("--out", default="study.toml", help="where to write the draft (default: study.toml)")
    parser.add_argument("--id", dest="id_column", help="the respondent id column (default: guessed)")
    parser.add_argument("--force", action="store_true", help="overwrite --out if it exists")


def run(args: argparse.Namespace) -> int:
    """Write the draft spec to --out (temp file, then rename); refuse to overwrite without --force."""
    import os
    import tempfile
    from pathlib import Path

    from pipeline.staging.draft import draft_spec
    from pipeline.errors import Problem, WavebookError
    from pipeline.progress import step

    out = Path(args.out)
    if out.exists() and not args.force:
        raise WavebookError(
            f"not writing {out}",
            [Problem("file-exists", f"{out} already exists; choose another --out or add --force", file=str(out))],
        )
    with step(f"profiling {Path(args.data).name}", quiet=args.quiet):
        text = draft_spec(args.data, spec_path=out, id_column=args.id_column)
    out.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=out.parent, prefix=f".{out.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as handle:
            handle.write(text)
        os.replace(tmp, out)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    print(f"wrote {out}; review the lines marked REVIEW, then run: wavebook check {out}")
    return 0
