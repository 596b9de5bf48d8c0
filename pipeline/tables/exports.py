"""The tests export beside the book: `<stem>_tests`, as CSV and Parquet (and the optional workbook's path).

`<stem>_tests`: one row per test, comparison "columns" (a pair of columns of one break), "total"
(a column against the Total), "waves" (a cell against the same cell of an earlier wave, `wave_b`;
the Total of every variable under banner "total", column "total", and every banner cell) or
"independence" (Rao-Scott, `column_a` names the break); t tests report statistic t with df_num 1
and df_den the t's degrees of freedom; the independence test reports F, df_num, df_den.
Differences of percentages are in points (0-100). The cells themselves, with their marks, are in
the one cells export (`pipeline.tables.cells_export`).

Each path is checked before the run like the book's (`pipeline.outputs.check_output`) and written
to a temporary file in the destination folder, then moved into place, so a failure never leaves a
half-written export. No respondent-level value is written.
"""

from __future__ import annotations

from pathlib import Path

import polars as pl

from pipeline.outputs import write_output
from pipeline.tables.result import BannerTables


def export_paths(book: Path, *, xlsx: bool = False) -> list[Path]:
    """The files beside `book`: `<stem>_tests.csv/.parquet` (and `<stem>_tables.xlsx`)."""
    book = Path(book)
    paths = [book.with_name(f"{book.stem}_tests.{suffix}") for suffix in ("csv", "parquet")]
    return paths + ([book.with_name(f"{book.stem}_tables.xlsx")] if xlsx else [])


def write_exports(tables: BannerTables, paths: list[Path]) -> list[Path]:
    """Write the tests to `paths` (CSV or Parquet by suffix), each through `pipeline.outputs.write_output`
    (temporary file, rename, recorded as wavebook's output)."""
    for path in paths:
        writer = tables.tests.write_csv if path.suffix == ".csv" else tables.tests.write_parquet
        write_output(path, writer)
    return paths


def read_export(path: Path) -> pl.DataFrame:
    """Read an export back (CSV or Parquet)."""
    return pl.read_parquet(path) if path.suffix == ".parquet" else pl.read_csv(path, infer_schema_length=None)
