"""Read a raw wave file (CSV, Parquet or SPSS .sav) into a DuckDB temp table of text columns.

Every column arrives as text, exactly as the file holds it, so the staging checks see what was
written (a '3,5' in a numeric column is reported, not silently turned into NULL); the SQL reads
it through the `wb_text` (trimmed, empty -> NULL), `wb_number` and `wb_code` macros. Whole floats
from typed formats are written as integer text ('3.0' -> '3'), so the three formats stage
identical rows. The table's rowid + 1 is the data row number (rows keep the file's order).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import duckdb

from pipeline.errors import DataError, Problem
from pipeline.sqlfiles import sql

FORMATS = {".csv": "csv", ".txt": "csv", ".parquet": "parquet", ".pq": "parquet", ".sav": "sav", ".zsav": "sav"}
_FLOAT_TYPES = ("DOUBLE", "FLOAT", "REAL")


@dataclass(frozen=True)
class SpssMetadata:
    """What an SPSS file says about its columns: labels and value labels (used by `wavebook init`)."""

    column_labels: dict[str, str]
    value_labels: dict[str, dict[object, str]]


def file_format(path: Path) -> str:
    """'csv', 'parquet' or 'sav' from the file name; DataError for anything else."""
    fmt = FORMATS.get(path.suffix.lower())
    if fmt is None:
        raise DataError(
            f"cannot read {path}",
            [
                Problem(
                    "unsupported-format",
                    f"wavebook reads .csv, .parquet and .sav files, not '{path.suffix}'",
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
        if fmt == "sav":
            frame, _ = read_sav(path)
            con.register("__wavebook_frame", frame)
            try:
                columns = _columns(con.execute(sql("load_describe_frame.sql", frame="__wavebook_frame")).fetchall())
                con.execute(sql("load_frame.sql", table=table, columns=columns, frame="__wavebook_frame"))
            finally:
                con.unregister("__wavebook_frame")
        elif fmt == "parquet":
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


def read_sav(path: Path) -> tuple[object, SpssMetadata]:
    """Read an SPSS .sav file with pyreadstat: (polars DataFrame of the codes, labels).

    pyreadstat is an optional dependency (`pip install wavebook[spss]`); DataError if absent.
    """
    try:
        import pyreadstat
    except ModuleNotFoundError:
        raise DataError(
            f"cannot read {path}",
            [
                Problem(
                    "missing-package",
                    "reading SPSS files needs pyreadstat: pip install 'wavebook[spss]'",
                    file=str(path),
                )
            ],
        ) from None
    import polars as pl

    try:
        frame, meta = pyreadstat.read_sav(str(path), apply_value_formats=False)
    except Exception as exc:  # pyreadstat raises its own error classes for corrupt files
        raise DataError(
            f"cannot read {path}",
            [Problem("unreadable-file", f"the SPSS file cannot be read: {exc}", file=str(path))],
        ) from None
    labels = dict(zip(meta.column_names, meta.column_labels or [], strict=False))
    return pl.from_pandas(frame), SpssMetadata(
        column_labels={k: v for k, v in labels.items() if v},
        value_labels=dict(meta.variable_value_labels or {}),
    )
