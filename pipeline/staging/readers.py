"""Read a raw wave file (CSV or Parquet) into a DuckDB temp table of text columns.

Every column arrives as text, exactly as the file holds it, so the staging checks see what was
written (a '3,5' in a numeric column is reported, not silently turned into NULL); the SQL reads
it through the `wb_text` (trimmed, empty -> NULL), `wb_number` and `wb_code` macros. Whole floats
from Parquet's typed columns are written as integer text ('3.0' -> '3'), so both formats stage
identical rows. The table's rowid + 1 is the data row number (rows keep the file's order).
"""

from __future__ import annotations

from pathlib import Path

import duckdb

from pipeline.errors import DataError, Problem
from pipeline.sqlfiles import sql

FORMATS = {".csv": "csv", ".txt": "csv", ".parquet": "parquet", ".pq": "parquet"}
_FLOAT_TYPES = ("DOUBLE", "FLOAT", "REAL")


def file_format(path: Path) -> str:
    """'csv' or 'parquet' from the file name; DataError for anything else."""
    fmt = FORMATS.get(path.suffix.lower())
    if fmt is None:
        raise DataError(
            f"cannot read {path}",
            [
                Problem(
                    "unsupported-format",
                    f"wavebook reads .csv and .parquet files, not '{path.suffix}'; export your data to CSV or Parquet",
                    file=str(path),
                )
            ],
        )
    return fmt


def prepare_connection(con: duckdb.DuckDBPyConnection) -> None:
    """Set a connection up for wavebook: no progress bar on the terminal (wavebook shows its own),
    and the text macros the load, check and stage SQL use (`wb_text`, `wb_number`, `wb_code`)."""
    con.execute(sql("load_settings.sql"))
    con.execute(sql("load_macro_text.sql"))
    con.execute(sql("load_macro_number.sql"))
    con.execute(sql("load_macro_code.sql"))


def read_raw(con: duckdb.DuckDBPyConnection, path: Path, table: str) -> list[str]:
    """Load `path` into the temp table `table` (text columns); return the file's column names in order.

    Raises DataError (rule missing-file or unreadable-file) naming the file when it cannot be read.
    """
    path = Path(path)
    if not path.is_file():
        raise DataError(
            f"cannot read {path}",
            [Problem("missing-file", "the wave file does not exist (paths are relative to the spec's folder)", file=str(path))],
        )
    fmt = file_format(path)
    prepare_connection(con)
    try:
        if fmt == "parquet":
            params = {"path": str(path)}
            columns = _columns(con.execute(sql("load_describe_parquet.sql"), params).fetchall())
            con.execute(sql("load_parquet.sql", table=table, columns=columns), params)
        else:
            con.execute(sql("load_csv.sql", table=table), {"path": str(path)})
            columns = _columns(con.execute(sql("load_describe_table.sql", table=table)).fetchall())
    except duckdb.Error as exc:
        raise DataError(
            f"cannot read {path}",
            [Problem("unreadable-file", f"the {fmt} file cannot be read: {exc}", file=str(path))],
        ) from None
    return [c["name"] for c in columns]


def _columns(described: list[tuple]) -> list[dict[str, str]]:
    out = []
    for name, dtype, *_ in described:
        kind = "text" if dtype == "VARCHAR" else "float" if dtype in _FLOAT_TYPES else "other"
        out.append({"name": name, "kind": kind})
    return out
