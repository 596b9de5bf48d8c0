"""The study database (`<spec stem>.duckdb`): opening it, its schema, and reading staged rows.

Tables (see DEVELOPERS.md): `waves` (one row per staged wave), `responses` (one row per
wave and respondent, typed per the codebook) and `problems` (warnings recorded at staging).
Later stages add their own tables (`weights`, `weighting_*`).
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import polars as pl

from pipeline.errors import DataError, Problem
from pipeline.sqlfiles import sql
from pipeline.staging.readers import prepare_connection
from pipeline.staging.replicate_columns import staged_columns
from pipeline.staging.routing import route_frame
from pipeline.staging.spec import Study

DESIGN_TEXT = "VARCHAR"


def column_types(study: Study) -> dict[str, str]:
    """The study's own columns of `responses` and their DuckDB types, in table order.

    Design columns first (strata and PSU VARCHAR, base weight and selection probability DOUBLE,
    then the supplied replicate weights `replicate_weight_1..R` DOUBLE), then the codebook columns: single/rating BIGINT when every code is an integer else VARCHAR,
    multi-response items TINYINT, numeric DOUBLE. A column that is both a design column and a
    codebook variable (e.g. region as strata) takes its codebook type. The respondent id column
    is stored as `respondent_id` and is not listed here.
    """
    codebook: dict[str, str] = {}
    for variable in study.variables.values():
        if variable.type == "multi":
            codebook.update({item: "TINYINT" for item in variable.items})
        elif variable.type == "numeric":
            codebook[variable.name] = "DOUBLE"
        else:
            codebook[variable.name] = "BIGINT" if variable.int_coded else "VARCHAR"
    design = study.design
    types: dict[str, str] = {}
    for column, dtype in (
        (design.strata, DESIGN_TEXT),
        (design.psu, DESIGN_TEXT),
        (design.base_weight, "DOUBLE"),
        (design.selection_probability, "DOUBLE"),
    ):
        if column is not None:
            types[column] = codebook.get(column, dtype)
    for column in staged_columns(study):  # supplied replicate weights (pipeline.staging.replicate_columns)
        types.setdefault(column, "DOUBLE")
    for column, dtype in codebook.items():
        types.setdefault(column, dtype)
    return types


def open_database(study: Study, *, read_only: bool = False) -> duckdb.DuckDBPyConnection:
    """Open the study database; when writable, create the `waves`, `responses` and `problems` tables.

    Read-only opening of a database that does not exist yet raises FileNotFoundError naming it
    (stage a wave first). The connection has the `wb_number`/`wb_code` text macros installed.
    """
    path = study.database_path
    if read_only and not path.exists():
        raise FileNotFoundError(f"no study database at {path}; stage a wave first (wavebook stage {study.path})")
    con = connect(path, read_only=read_only)
    prepare_connection(con)
    if not read_only:
        create_tables(con, study)
    return con


DUCKDB_MAGIC = b"DUCK"  # bytes 8-11 of every DuckDB database file


def connect(path: Path, *, read_only: bool = False) -> duckdb.DuckDBPyConnection:
    """A DuckDB connection to the study database file.

    Refuses, before DuckDB touches it, a file that exists but is not a DuckDB database (a CSV
    named by `database =`, say): DataError rule not-a-database. A DuckDB error on opening is
    reported by its cause: database-busy (another process holds the file: DuckDB allows one
    writing process per file), database-permission, or database-unreadable.
    """
    if path.exists():
        _refuse_non_database(path)
    try:
        return duckdb.connect(str(path), read_only=read_only)
    except (duckdb.Error, OSError) as exc:
        text = str(exc)
        if "lock" in text.lower():
            rule, message = "database-busy", "another program is using the database; close it and retry"
        elif "permission denied" in text.lower() or isinstance(exc, PermissionError):
            rule, message = "database-permission", "permission denied: wavebook may not read or write this file"
        else:
            rule, message = "database-unreadable", f"DuckDB cannot open this file: {text.splitlines()[0] if text else exc}"
        raise DataError(f"cannot open the study database {path}", [Problem(rule, message, file=str(path))]) from None


def _refuse_non_database(path: Path) -> None:
    """DataError (not-a-database) unless `path` is an empty file or starts like a DuckDB file."""
    if path.is_dir():
        raise DataError(
            f"cannot open the study database {path}",
            [Problem("not-a-database", "this is a folder; `database =` must name a .duckdb file", file=str(path))],
        )
    try:
        with open(path, "rb") as handle:
            head = handle.read(12)
    except OSError as exc:
        raise DataError(
            f"cannot open the study database {path}",
            [Problem("database-permission", f"{exc.strerror or exc}: wavebook may not read this file", file=str(path))],
        ) from None
    if head and head[8:12] != DUCKDB_MAGIC:
        raise DataError(
            f"cannot open the study database {path}",
            [
                Problem(
                    "not-a-database",
                    "this file is not a DuckDB database; wavebook never opens another file as the study "
                    "database: fix `database =` in the spec or move the file away",
                    file=str(path),
                )
            ],
        )


def create_tables(con: duckdb.DuckDBPyConnection, study: Study) -> None:
    """Create the staging tables when absent (a new `responses` gets every column of the spec)."""
    columns = [{"name": name, "type": dtype} for name, dtype in column_types(study).items()]
    con.execute(sql("schema_waves.sql"))
    con.execute(sql("schema_waves_signature.sql"))
    con.execute(sql("schema_responses.sql", columns=columns))
    con.execute(sql("schema_problems.sql"))


def table_columns(con: duckdb.DuckDBPyConnection, table: str) -> dict[str, str]:
    """Column name -> DuckDB type of a table in the database (empty when the table does not exist)."""
    return dict(con.execute(sql("schema_columns.sql"), {"table": table}).fetchall())


def add_new_columns(con: duckdb.DuckDBPyConnection, study: Study) -> list[str]:
    """ALTER `responses` to add the spec's columns it lacks; return their names.

    Raises DataError (rule column-type-changed) when an existing column's type no longer matches
    the spec: the earlier waves were staged under another codebook type and must be restaged.
    Call inside the staging transaction so a failure leaves the table unchanged.
    """
    existing = table_columns(con, "responses")
    changed = [
        Problem(
            "column-type-changed",
            f"responses.{name} is {existing[name]} but the spec now makes it {dtype}; "
            f"delete {study.database_path} and restage every wave",
            column=name,
        )
        for name, dtype in column_types(study).items()
        if name in existing and existing[name] != dtype
    ]
    if changed:
        raise DataError(f"the study database {study.database_path} does not match the spec", changed)
    added = [name for name in column_types(study) if name not in existing]
    for name in added:
        con.execute(sql("schema_add_column.sql", column=name, type=column_types(study)[name]))
    return added


def staged_waves(con: duckdb.DuckDBPyConnection) -> pl.DataFrame:
    """The `waves` table in spec order (wave, position, label, fieldwork dates, file, sha256, rows, time,
    spec signature)."""
    signed = "spec_signature" in table_columns(con, "waves")
    return con.sql(sql("load_staged_waves.sql", signed=signed)).pl()


def load_responses(
    con: duckdb.DuckDBPyConnection,
    study: Study,
    wave_ids: list[str] | tuple[str, ...] | None = None,
    *,
    columns: list[str] | None = None,
) -> pl.DataFrame:
    """Staged rows as a polars DataFrame: wave, respondent_id, then the design and codebook columns.

    wave_ids: the waves to read (default: every wave of the spec that is staged); columns: the
    study columns to read (default all, in table order; the columns that routing conditions read
    are read with them and left out again). Rows come in spec wave order, then respondent id, so
    reads of different columns line up row for row. Routed variables come with their asked flags
    and the answers of respondents not asked masked (pipeline.staging.routing.route_frame).
    DataError naming the waves when a requested wave is not staged, or naming the columns when
    the spec has columns no staged wave has yet.
    """
    staged = set(staged_waves(con)["wave"].to_list())
    order = [w.id for w in study.waves]
    if wave_ids is None:
        wanted = [w for w in order if w in staged]
    else:
        wanted = sorted(wave_ids, key=lambda w: order.index(w) if w in order else len(order))
    problems = [
        Problem("wave-not-staged", f"wave '{w}' is not staged; run: wavebook stage {study.path} --wave {w}", value=w)
        for w in wanted
        if w not in staged
    ]
    existing = table_columns(con, "responses")
    wanted_columns = list(column_types(study)) if columns is None else list(columns)
    problems += [
        Problem(
            "column-not-staged",
            f"the spec declares '{c}' but no staged wave has it; restage the waves (wavebook stage {study.path})",
            column=c,
        )
        for c in wanted_columns
        if c not in existing
    ]
    if problems:
        raise DataError(f"cannot read the staged responses from {study.database_path}", problems)
    conditions = [c for v in study.variables.values() if v.asked_if is not None for n in v.asked_if.names
                  if n in study.variables for c in study.variables[n].columns]
    read = list(dict.fromkeys(wanted_columns + [c for c in conditions if c in existing]))
    frame = con.sql(sql("load_responses.sql", columns=read), params={"waves": wanted}).pl()
    routed = route_frame(frame, study)
    unwanted = [c for c in read if c not in wanted_columns]
    return routed.drop(unwanted) if unwanted else routed
