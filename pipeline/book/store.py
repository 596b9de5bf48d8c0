"""What the book is rendered from, kept so `wavebook book` can re-render without recomputing.

`save_results(study, ...)` writes, into `results_folder(study)` (`<database stem>_results/`
beside the study database): `cells.parquet` (the long cell frame of the toplines),
`export.parquet` (the one cells export, `pipeline.tables.export_cells`: the Total and every banner
cell with their marks), `tests.parquet` (the tests export; with `[tables]`) — aggregates only, no
respondent rows or ids — and `book.json` (the weighting summary, the standard-error sentences,
the confidence level and the run manifest). Both are written atomically through
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
EXPORT_FILE = "export.parquet"
TESTS_FILE = "tests.parquet"
BOOK_FILE = "book.json"


@dataclass(frozen=True)
class StoredResults:
    """The stored inputs of the book."""

    cells: pl.DataFrame
    export: pl.DataFrame | None  # None: stored by a run before the one cells export
    tests: pl.DataFrame | None  # None: no [tables]
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
    export: pl.DataFrame | None = None,
    tests: pl.DataFrame | None = None,
    weighting: WeightingSection | None,
    variance: tuple[str, ...],
    level: float,
    manifest: dict | None,
) -> Path:
    """Store the book's inputs; returns the folder. A frame not given is not stored (and one stored
    before is removed, so `load_results` never returns another run's)."""
    folder = results_folder(study)
    write_output(folder / CELLS_FILE, cells.write_parquet)
    for name, frame in ((EXPORT_FILE, export), (TESTS_FILE, tests)):
        if frame is not None:
            write_output(folder / name, frame.write_parquet)
        else:
            (folder / name).unlink(missing_ok=True)
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
        export, tests = (pl.read_parquet(folder / n) if (folder / n).is_file() else None
                         for n in (EXPORT_FILE, TESTS_FILE))
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
        export=export,
        tests=tests,
        weighting=weighting,
        variance=tuple(payload.get("variance", ())),
        level=float(payload.get("level", 0.95)),
        manifest=payload.get("manifest"),
    )
