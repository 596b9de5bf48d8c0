"""Read a raw wave file (CSV or Parquet) into a DuckDB temp table, close to the reader's own speed.

A CSV file is read once, typed: the columns the spec reads as numbers (integer codes, 0/1 items,
numeric variables, design weights; `typed`, from pipeline.staging.wave_columns.typed_file_columns)
as DOUBLE, every other column as text exactly as written. A value that does not convert is not
lost: the typed read records it in DuckDB's rejects table (`store_rejects`) instead of failing,
and the columns it names, with the typed columns holding a value whose spelling the checks must
report as written (not finite; a fraction or a huge number in a code column; anything but 0/1 in
an item: `sql/load_text_needed.sql`, one pass), are read again as text, so the staging checks see
what was written there (a '3,5' in a numeric column is reported, not silently turned into NULL).
A structural error (ragged row, non-UTF-8 line) fails the second, strict read and is reported as
before. The SQL reads every column through the `wb_text` (trimmed, empty -> NULL), `wb_number`,
`wb_code` and `wb_value` macros, which take text or typed numbers alike. Parquet files arrive as
text; whole floats from their typed columns are written as integer text ('3.0' -> '3'), so both
formats stage identical rows. The table's rowid + 1 is the data row number (rows keep the file's
order).
"""

from __future__ import annotations

import csv
import io
import re
from collections.abc import Mapping
from pathlib import Path

import duckdb

from pipeline.errors import DataError, Problem
from pipeline.sqlfiles import sql

FORMATS = {".csv": "csv", ".txt": "csv", ".parquet": "parquet", ".pq": "parquet"}
_FLOAT_TYPES = ("DOUBLE", "FLOAT", "REAL")
REJECTS_TABLES = ("wb_rejects", "wb_reject_scans")  # named in sql/load_csv_read.sql
MAX_LISTED = 20  # rows listed one by one in a file's problems; the rest are counted


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
    and the macros the load, check and stage SQL read values with (`wb_number`, `wb_code`, `wb_text`, `wb_value`, `wb_blank`)."""
    con.execute(sql("load_settings.sql"))
    con.execute(sql("load_macro_number.sql"))
    con.execute(sql("load_macro_code.sql"))
    con.execute(sql("load_macro_text.sql"))
    con.execute(sql("load_macro_value.sql"))
    con.execute(sql("load_macro_blank.sql"))


def literal_path(path: Path) -> str:
    """`path` as DuckDB's readers take it with every glob character (`*`, `?`, `[`) matched
    literally (`[*]`, `[?]`, `[[]`): a wave's file name is a name, never a pattern."""
    return re.sub(r"([*?\[])", r"[\1]", str(path))


def read_raw(
    con: duckdb.DuckDBPyConnection, path: Path, table: str, typed: Mapping[str, str] | None = None
) -> list[str]:
    """Load `path` into the temp table `table`; return the file's column names in order.

    typed: file column -> "number", "code" or "item" for the columns a CSV file is read typed
    (DOUBLE); every other column, every column of a Parquet file, and a typed column with a value
    that must be seen as written (see the module docstring) is text.

    Raises DataError naming the file when it cannot be read: missing-file, empty-file,
    duplicate-column (with the 1-based positions), not-utf8 and ragged-row (with the line numbers
    and the field counts), unreadable-file (the reader's own message) for anything else.
    """
    path = Path(path)
    if path.is_dir():
        raise DataError(f"cannot read {path}", [Problem("not-a-file", "this is a folder; name a .csv or .parquet file", file=str(path))])
    if not path.is_file():
        raise DataError(
            f"cannot read {path}",
            [Problem("missing-file", "the wave file does not exist (paths are relative to the spec's folder)", file=str(path))],
        )
    fmt = file_format(path)
    prepare_connection(con)
    header: list[str] = []
    try:
        if fmt == "parquet":
            params = {"path": literal_path(path)}
            columns = _columns(con.execute(sql("load_describe_parquet.sql"), params).fetchall())
            con.execute(sql("load_parquet.sql", table=table, columns=columns), params)
        else:
            header = csv_header(path)
            _read_csv(con, path, table, header, {c: kind for c, kind in (typed or {}).items() if c in header})
            columns = _columns(con.execute(sql("load_describe_table.sql", table=table)).fetchall())
    except duckdb.Error as exc:
        problems = csv_problems(path, len(header)) if fmt == "csv" else []
        raise DataError(
            f"cannot read {path}",
            problems or [Problem("unreadable-file", f"the {fmt} file cannot be read: {_reader_message(exc)}", file=str(path))],
        ) from None
    return [c["name"] for c in columns]


def _read_csv(con: duckdb.DuckDBPyConnection, path: Path, table: str, header: list[str], typed: dict[str, str]) -> None:
    """The CSV file into `table`, the `typed` columns as DOUBLE; a column with a value that does
    not convert or must be seen as written is read again as text (each round only moves columns
    to text, so this ends; a clean file is read once). A structural error ends in the strict
    read, which raises as an all-text read would."""
    path_text = literal_path(path)
    typed = dict(typed)
    while typed:
        params = {"path": path_text, "columns": {c: "DOUBLE" if c in typed else "VARCHAR" for c in header}}
        _drop_rejects(con)
        try:
            con.execute(sql("load_csv.sql", table=table, rejects=True), params)
            lines, structural, text = con.execute(sql("load_rejected.sql")).fetchall()[0]
        except duckdb.Error:  # what the typed read cannot get past, the strict text read names
            lines, structural, text = 1, 1, []
        finally:
            _drop_rejects(con)
        if structural or (lines and not text):  # a bad row, not a bad value: the strict read says which
            typed = {}
            break
        kept = [{"name": c, "kind": kind} for c, kind in typed.items() if c not in text]
        if kept:
            flags = con.execute(sql("load_text_needed.sql", table=table, columns=kept)).fetchall()[0]
            text = [*text, *(c["name"] for c, flag in zip(kept, flags, strict=True) if flag)]
        if not lines and not text:
            return
        typed = {c: kind for c, kind in typed.items() if c not in text}
    params = {"path": path_text, "columns": {c: "DOUBLE" if c in typed else "VARCHAR" for c in header}}
    con.execute(sql("load_csv.sql", table=table, rejects=False), params)


def csv_relation(
    con: duckdb.DuckDBPyConnection, path: Path, typed: Mapping[str, str]
) -> tuple[duckdb.DuckDBPyRelation, list[str]]:
    """A lazy relation reading the CSV file `path` typed (the `typed` columns as DOUBLE) with its
    conversion failures recorded rather than raised (`rejected_lines` counts them afterwards), and
    the file's column names. For staging straight from the file; DataError as `csv_header`."""
    path = Path(path)
    header = csv_header(path)
    prepare_connection(con)
    _drop_rejects(con)
    columns = {c: "DOUBLE" if c in typed else "VARCHAR" for c in header}
    return con.sql(sql("load_csv_relation.sql"), params={"path": literal_path(path), "columns": columns}), header


def rejected_lines(con: duckdb.DuckDBPyConnection) -> int:
    """How many lines the last typed read (`csv_relation`) skipped; 1 when it left no rejects
    table (so the caller never takes an unread file for a clean one)."""
    try:
        lines = int(con.execute(sql("load_rejected.sql")).fetchall()[0][0])
    except duckdb.CatalogException:
        return 1
    _drop_rejects(con)
    return lines


def checked_csv_header(path: Path) -> list[str]:
    """The column names of a CSV file after one strict reading pass over the whole file (DuckDB,
    nothing kept): DataError listing every ragged row, non-UTF-8 line, duplicate name, or an empty
    file. For readers that are not strict themselves (polars pads short rows); polars also keeps
    a doubled quote in a quoted header name, so callers use these names."""
    header = csv_header(path)
    con = duckdb.connect()
    try:
        con.execute(sql("load_csv_check.sql"), {"path": literal_path(path), "columns": dict.fromkeys(header, "VARCHAR")})
    except duckdb.Error as exc:
        problems = csv_problems(path, len(header))
        raise DataError(
            f"cannot read {path}",
            problems or [Problem("unreadable-file", f"the csv file cannot be read: {_reader_message(exc)}", file=str(path))],
        ) from None
    finally:
        con.close()
    return header


def csv_header(path: Path) -> list[str]:
    """The column names of a CSV file's header line; DataError for an empty file, a header that is
    not UTF-8, or a name given twice (rule duplicate-column, naming its positions)."""
    with open(path, "rb") as raw:
        first = raw.readline()
        try:
            first.decode("utf-8")
        except UnicodeDecodeError:
            raise DataError(f"cannot read {path}", [_not_utf8(path, [1], 1)]) from None
        raw.seek(0)
        text = io.TextIOWrapper(raw, encoding="utf-8-sig", errors="replace", newline="")
        header = next(csv.reader(text), [])
    if not any(name.strip() for name in header):
        raise DataError(
            f"cannot read {path}",
            [Problem("empty-file", "the file is empty: a CSV file starts with a header line of column names", file=str(path))],
        )
    positions: dict[str, list[int]] = {}
    for position, name in enumerate(header, start=1):
        positions.setdefault(name, []).append(position)
    duplicates = [
        Problem(
            "duplicate-column",
            f"the header names column '{name}' {len(where)} times (positions {', '.join(map(str, where))}); "
            "give each column its own name",
            file=str(path),
            line=1,
            column=name,
        )
        for name, where in positions.items()
        if len(where) > 1
    ]
    if duplicates:
        raise DataError(f"cannot read {path}", duplicates)
    return header


def csv_problems(path: Path, expected: int) -> list[Problem]:
    """Why a CSV file does not read: its lines that are not UTF-8, and its rows whose field count
    differs from the header's `expected` (one ragged-row problem per row, up to MAX_LISTED, then
    a count of the rest). Only called once the reader has failed, so speed does not matter."""
    bad_lines = []
    with open(path, "rb") as raw:
        for number, line in enumerate(raw, start=1):
            try:
                line.decode("utf-8")
            except UnicodeDecodeError:
                bad_lines.append(number)
    problems = [_not_utf8(path, bad_lines, len(bad_lines))] if bad_lines else []
    ragged: list[Problem] = []
    count = 0
    with open(path, encoding="utf-8-sig", errors="replace", newline="") as text:
        reader = csv.reader(text)
        next(reader, None)
        for record in reader:
            if record and len(record) != expected:
                count += 1
                if len(ragged) < MAX_LISTED:
                    ragged.append(
                        Problem(
                            "ragged-row",
                            f"this row has {len(record)} field{'s' if len(record) != 1 else ''} but the header has "
                            f"{expected}; a summary line, an unquoted comma or a missing field?",
                            file=str(path),
                            line=reader.line_num,
                            value=",".join(record)[:60],
                        )
                    )
    if count > len(ragged):
        ragged.append(
            Problem("ragged-row", f"{count - len(ragged)} more rows with the wrong number of fields", file=str(path), count=count - len(ragged))
        )
    return problems + ragged


def _not_utf8(path: Path, lines: list[int], count: int) -> Problem:
    shown = ", ".join(map(str, lines[:MAX_LISTED])) + (", ..." if count > MAX_LISTED else "")
    return Problem(
        "not-utf8",
        f"line{'s' if count != 1 else ''} {shown} {'are' if count != 1 else 'is'} not UTF-8 text; "
        "the file must be saved as UTF-8",
        file=str(path),
        line=lines[0],
        count=count,
    )


def _drop_rejects(con: duckdb.DuckDBPyConnection) -> None:
    for table in REJECTS_TABLES:
        con.execute(sql("load_drop_rejects.sql", table=table))


def _reader_message(exc: duckdb.Error) -> str:
    """The reader's own explanation: its first lines, without the SQL, the settings or the hints."""
    kept = []
    for line in str(exc).splitlines():
        if not line.strip() or line.startswith(("LINE ", "Possible", "*", "  ")):
            break
        kept.append(line.strip())
    return " ".join(kept) or type(exc).__name__


def _columns(described: list[tuple]) -> list[dict[str, str]]:
    out = []
    for name, dtype, *_ in described:
        kind = "text" if dtype == "VARCHAR" else "float" if dtype in _FLOAT_TYPES else "other"
        out.append({"name": name, "kind": kind})
    return out
