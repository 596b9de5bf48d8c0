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
    parser.add_argument("--force", action="store_true", help="overwrite --out if it exists (never the wave file itself)")


def run(args: argparse.Namespace) -> int:
    """Write the draft spec to --out (temp file, then rename); refuse to overwrite without --force."""
    from pathlib import Path

    from pipeline.outputs import Input, check_output, write_text_output
    from pipeline.progress import step
    from pipeline.staging.draft import draft_spec

    out = check_output(args.out, [Input(Path(args.data), "the wave file being profiled")], force=args.force, option="--out")
    with step(f"profiling {Path(args.data).name}", quiet=args.quiet):
        text = draft_spec(args.data, spec_path=out, id_column=args.id_column)
    write_text_output(out, text)
    print(f"wrote {out}; review the lines marked REVIEW, then run: wavebook check {out}")
    return 0
