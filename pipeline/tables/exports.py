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

Each file is written to a temporary file in the destination folder and moved into place, so a
failure never leaves a half-written export. No respondent-level value is written.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import polars as pl

from pipeline.tables import BannerTables


def _atomic(path: Path, write) -> None:  # noqa: ANN001 - a polars writer method
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    os.close(fd)
    try:
        write(tmp)
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def write_exports(tables: BannerTables, folder: Path, stem: str) -> list[Path]:
    """Write `<stem>_cells.csv/.parquet` and `<stem>_tests.csv/.parquet` into `folder`; returns the paths."""
    written = []
    for name, frame in (("cells", tables.cells), ("tests", tables.tests)):
        for suffix in ("csv", "parquet"):
            path = Path(folder) / f"{stem}_{name}.{suffix}"
            writer = frame.write_csv if suffix == "csv" else frame.write_parquet
            _atomic(path, writer)
            written.append(path)
    return written


def read_export(path: Path) -> pl.DataFrame:
    """Read an export back (CSV or Parquet)."""
    return pl.read_parquet(path) if path.suffix == ".parquet" else pl.read_csv(path, infer_schema_length=None)
