"""The banner exports beside the book: `<stem>_cells` and `<stem>_tests`, each as CSV and Parquet.

`<stem>_cells`: one row per (wave, table, row, banner, column) with the tidy cell columns (wave,
table, variable, row, row_label, banner, column, column_label, statistic, estimate, se, ci_low,
ci_high, df, deff, base_unweighted, base_weighted, base_effective, flags) extended with the banner
columns (break_variable, letter, sig_higher_than, sig_higher_than_lighter, vs_total,
change_from_previous, se_change, change_mark, note). A suppressed or empty cell holds no number.

`<stem>_tests`: one row per test, comparison "columns" (a pair of columns of one break), "total"
(a column against the Total), "waves" (a cell against the same cell of an earlier wave, `wave_b`)
or "independence" (Rao-Scott, `column_a` names the break); t tests report statistic t with
df_num 1 and df_den the t's degrees of freedom; the independence test reports F, df_num, df_den.

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
    """The files beside `book`: `<stem>_banner_cells.csv/.parquet`, `<stem>_tests.csv/.parquet` (and `<stem>_tables.xlsx`)."""
    book = Path(book)
    paths = [book.with_name(f"{book.stem}_{name}.{suffix}") for name in ("banner_cells", "tests") for suffix in ("csv", "parquet")]
    return paths + ([book.with_name(f"{book.stem}_tables.xlsx")] if xlsx else [])


def write_exports(tables: BannerTables, paths: list[Path]) -> list[Path]:
    """Write the cells and tests files to `paths` (`export_paths` order), each through
    `pipeline.outputs.write_output` (temporary file, rename, recorded as wavebook's output)."""
    frames = {"cells": tables.cells, "tests": tables.tests}
    for path in paths:
        frame = frames[path.stem.rsplit("_", 1)[1]]
        writer = frame.write_csv if path.suffix == ".csv" else frame.write_parquet
        write_output(path, writer)
    return paths


def read_export(path: Path) -> pl.DataFrame:
    """Read an export back (CSV or Parquet)."""
    return pl.read_parquet(path) if path.suffix == ".parquet" else pl.read_csv(path, infer_schema_length=None)
