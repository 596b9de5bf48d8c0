"""The whole run of a study: stage what changed, compute the cells, render the book.

`run_study` is the library entry behind `wavebook run` (and `wavebook demo`). Its steps, in
order, are small functions so later stages slot in between staging and rendering:

  1. `load_spec`                        the validated Study
  2. `waves_to_stage` + `stage_wave`     each wave whose raw file changed (SHA-256) or all with restage
  3. `unweighted_toplines`               the tidy long cell frame (weighting and estimation go here)
  4. `render_book`                       the HTML book, written atomically
"""

from __future__ import annotations

import sys
from pathlib import Path

from pipeline import progress
from pipeline.book import render_book
from pipeline.database import open_database, staged_waves
from pipeline.errors import DataError, Problem
from pipeline.spec import Study, load_spec
from pipeline.stage import file_sha256, stage_wave
from pipeline.topline import unweighted_toplines


def default_book_path(study: Study) -> Path:
    """`<spec folder>/book/<spec stem>.html`."""
    return study.path.parent / "book" / f"{study.path.stem}.html"


def waves_to_stage(study: Study, *, restage: bool = False) -> list[str]:
    """Ids of the waves to (re)stage, in spec order.

    A wave is staged when `restage` is set, when it is not in the database's `waves` table yet,
    or when the SHA-256 of its raw file differs from the one recorded at its last staging.
    Raises DataError listing every wave whose raw file is missing.
    """
    missing = [
        Problem("wave-file-missing", f"the raw file of wave '{w.id}' does not exist", file=str(w.file), value=w.id)
        for w in study.waves
        if not w.file.is_file()
    ]
    if missing:
        raise DataError(f"cannot run {study.path}: wave files are missing", missing)
    if restage or not study.database_path.is_file():
        return [w.id for w in study.waves]
    con = open_database(study, read_only=True)
    try:
        recorded = dict(staged_waves(con).select("wave", "sha256").iter_rows())
    finally:
        con.close()
    return [w.id for w in study.waves if recorded.get(w.id) != file_sha256(w.file)]


def run_study(
    spec_path: str | Path, *, out: str | Path | None = None, restage: bool = False, quiet: bool = False
) -> Path:
    """Run the study spec at `spec_path` and return the path of the book written.

    Stages the waves `waves_to_stage` selects (a summary per wave unless `quiet`, and every
    staging warning, go to stderr), computes the unweighted toplines of every declared wave and
    renders the book to `out` (default `default_book_path`). Raises SpecError / DataError with
    every problem found.
    """
    study = load_spec(spec_path)
    for wave_id in waves_to_stage(study, restage=restage):
        report = stage_wave(study, wave_id, quiet=quiet)
        if not quiet:
            print(report.summary(), file=sys.stderr)
        for warning in report.warnings:
            print(warning.render(), file=sys.stderr)
    with progress.step("computing toplines", quiet=quiet):
        con = open_database(study, read_only=True)
        try:
            cells = unweighted_toplines(con, study)
        finally:
            con.close()
    out_path = Path(out) if out is not None else default_book_path(study)
    with progress.step("writing the book", quiet=quiet):
        return render_book(study, cells, out_path=out_path)
