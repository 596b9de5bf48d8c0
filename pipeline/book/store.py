"""What the book is rendered from, kept so `wavebook book` can re-render without recomputing.

`save_results(study, ...)` writes, into `results_folder(study)` (`<database stem>_results/`
beside the study database): `cells.parquet` (the unified cells frame the book shows,
`pipeline.book.source`: aggregates only, no respondent rows or ids), `tests.parquet` (the tests
export, when the run made banner tables) and `book.json` (the weighting summary, the standard-error
sentences, the confidence level and the run manifest). Both are written atomically through
`pipeline.outputs` (a failed write is a cannot-write error naming the file).
`load_results(study)` reads them back; a missing or unreadable folder is a named DataError.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass
from pathlib import Path

import polars as pl

from pipeline.outputs import write_output, write_text_output
from pipeline.book.weighting import MarginRow, WaveWeighting, WeightingSection
from pipeline.errors import DataError, Problem
from pipeline.staging.spec import Study

CELLS_FILE = "cells.parquet"
TESTS_FILE = "tests.parquet"
BOOK_FILE = "book.json"


@dataclass(frozen=True)
class StoredResults:
    """The stored inputs of the book."""

    cells: pl.DataFrame
    tests: pl.DataFrame | None
    weighting: WeightingSection | None
    variance: tuple[str, ...]
    level: float
    manifest: dict | None


def results_folder(study: Study) -> Path:
    """`<database stem>_results/` beside the study database."""
    database = study.database_path
    return database.with_name(f"{database.stem}_results")


def save_results(
    study: Study,
    cells: pl.DataFrame,
    *,
    tests: pl.DataFrame | None = None,
    weighting: WeightingSection | None,
    variance: tuple[str, ...],
    level: float,
    manifest: dict | None,
) -> Path:
    """Store the book's inputs; returns the folder."""
    folder = results_folder(study)
    write_output(folder / CELLS_FILE, cells.write_parquet)
    if tests is not None:
        write_output(folder / TESTS_FILE, tests.write_parquet)
    elif (folder / TESTS_FILE).exists():
        (folder / TESTS_FILE).unlink()
    payload = {
        "weighting": asdict(weighting) if weighting is not None else None,
        "variance": list(variance),
        "level": level,
        "manifest": manifest,
    }
    write_text_output(folder / BOOK_FILE, json.dumps(payload, indent=1, ensure_ascii=False) + "\n")
    return folder


def load_results(study: Study) -> StoredResults:
    """The stored inputs of `study`'s book (DataError when `wavebook run` has not stored them)."""
    folder = results_folder(study)
    cells_path, book_path = folder / CELLS_FILE, folder / BOOK_FILE
    if not cells_path.is_file() or not book_path.is_file():
        raise DataError(
            f"no stored results for {study.path}: run `wavebook run {study.path}` first",
            [Problem("results-missing", "the results of the last run are not there", file=str(folder))],
        )
    try:
        cells = pl.read_parquet(cells_path)
        tests = pl.read_parquet(folder / TESTS_FILE) if (folder / TESTS_FILE).is_file() else None
        payload = json.loads(book_path.read_text(encoding="utf-8"))
    except (OSError, ValueError, pl.exceptions.PolarsError) as exc:
        raise DataError(
            f"the stored results of {study.path} cannot be read; run `wavebook run` again",
            [Problem("results-unreadable", str(exc), file=str(folder))],
        ) from None
    raw = payload.get("weighting")
    weighting = None
    if raw is not None:
        weighting = WeightingSection(
            waves=tuple(WaveWeighting(**w) for w in raw["waves"]),
            wave_labels=tuple(raw["wave_labels"]),
            margins=tuple(
                MarginRow(m["margin"], m["category"], m["target"], tuple(tuple(s) for s in m["shares"]))
                for m in raw["margins"]
            ),
            notes=tuple(raw["notes"]),
            variables=tuple(raw["variables"]),
        )
    return StoredResults(
        cells=cells,
        tests=tests,
        weighting=weighting,
        variance=tuple(payload.get("variance", ())),
        level=float(payload.get("level", 0.95)),
        manifest=payload.get("manifest"),
    )
