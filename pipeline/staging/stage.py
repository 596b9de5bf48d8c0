"""Stage a wave: read its raw file, check it, and replace the wave in the study database atomically.

Everything happens in ONE transaction: add the columns the spec gained, delete the wave's old rows
and their weights, insert the typed rows, record the wave in `waves` and its warnings in
`problems`. Any failure rolls the transaction back, so the database is exactly as it was.
Staging one wave never touches another wave's rows.

A CSV wave is staged straight from the file (`_stage_direct`): the typed read
(pipeline.staging.readers.csv_relation) feeds the insert, with every value that would not be
stored as the checks read it failing the insert (`strict`), and the checks
(pipeline.staging.checks) then run on the inserted rows inside the transaction. A clean file is
so read once, at the reader's speed. Anything else (a rejected value, a failed insert, an error
found by a check, a Parquet file) rolls that back and takes the exact path: the file into a temp
table (text where a value must be seen as written), every check on it, and the write only when
no check fails, so a bad file's problems are those of the raw values, with their spellings.
"""

from __future__ import annotations

import datetime as dt
import time
from dataclasses import dataclass, field
from pathlib import Path

import duckdb

from pipeline.errors import DataError, Problem
from pipeline.outputs import file_sha256, same_file
from pipeline.progress import step
from pipeline.sqlfiles import sql
from pipeline.staging.checks import run_checks
from pipeline.staging.database import (
    add_new_columns,
    column_types,
    connect,
    create_tables,
    open_database,
    staged_waves,
    table_columns,
)
from pipeline.staging.readers import csv_relation, file_format, prepare_connection, read_raw, rejected_lines
from pipeline.staging.replicate_columns import wave_replicates
from pipeline.staging.spec import Study, Wave
from pipeline.staging.wave_columns import typed_file_columns, wave_signature, wave_sources, wave_view

RAW_TABLE = "__wavebook_raw"


@dataclass(frozen=True)
class StageReport:
    """What staging one wave did: rows written, the file and its SHA-256, the warnings."""

    wave: str
    rows: int
    file: Path
    sha256: str
    warnings: list[Problem] = field(default_factory=list)
    replaced_rows: int = 0  # rows the wave had before (0 when staged for the first time)
    added_columns: list[str] = field(default_factory=list)
    seconds: float = 0.0

    def summary(self) -> str:
        """One line: wave, rows, file, what was replaced, warnings count, time."""
        text = f"{self.wave}: staged {self.rows:,} rows from {self.file.name}"
        if self.replaced_rows:
            text += f" (replaced {self.replaced_rows:,})"
        if self.added_columns:
            text += f"; added column{'s' if len(self.added_columns) != 1 else ''} {', '.join(self.added_columns)}"
        n = len(self.warnings)
        text += f"; {n} warning{'s' if n != 1 else ''}" if n else "; no warnings"
        return text + f" ({self.seconds:.1f} s)"


def check_wave(study: Study, wave_id: str) -> list[Problem]:
    """Every problem (errors and warnings) staging `wave_id` would meet; writes nothing.

    The drift warnings compare with the earlier waves already staged in the study database,
    which is opened read-only when it exists.
    """
    wave = study.wave(wave_id)
    if study.database_path.exists():  # a folder or another file there is refused (not-a-database)
        con = open_database(study, read_only=True)
    else:
        con = duckdb.connect()
        prepare_connection(con)
    try:
        problems = _inspect(con, study, wave, quiet=True)
    finally:
        con.close()
    if any(p.severity == "error" for p in problems):
        return problems
    from pipeline.staging.rehearsal import weighting_rehearsal

    return problems + weighting_rehearsal(study, wave)


def stage_wave(study: Study, wave_id: str, *, quiet: bool = False) -> StageReport:
    """Check `wave_id`'s file and, if it has no errors, replace the wave in the database atomically.

    Raises DataError listing every problem (errors and warnings) when any check fails; then
    nothing is written. Returns a StageReport whose warnings are also recorded in `problems`.
    """
    start = time.perf_counter()
    wave = study.wave(wave_id)
    path = study.database_path
    created = not path.exists()
    con = connect(path)
    try:
        prepare_connection(con)
        direct = _stage_direct(con, study, wave, quiet=quiet)
        if direct is not None:
            digest, warnings, (rows, replaced, added) = direct
        else:
            problems = _inspect(con, study, wave, quiet=quiet)
            errors = [p for p in problems if p.severity == "error"]
            if errors:
                raise DataError(
                    f"wave {wave.id}: {len(errors)} error{'s' if len(errors) != 1 else ''} in {wave.file}; "
                    "nothing was staged",
                    problems,
                )
            warnings = [p for p in problems if p.severity != "error"]
            with step(f"{wave.id}: hashing {wave.file.name}", quiet=quiet):
                digest = file_sha256(wave.file)
            with step(f"{wave.id}: writing to {path.name}", quiet=quiet):
                rows, replaced, added = _write(con, study, wave, digest=digest, warnings=warnings)
    except BaseException:
        con.close()
        if created:  # the failed first staging leaves no empty database behind
            for leftover in (path, path.with_name(path.name + ".wal")):
                leftover.unlink(missing_ok=True)
        raise
    con.close()
    return StageReport(
        wave=wave.id,
        rows=rows,
        file=wave.file,
        sha256=digest,
        warnings=warnings,
        replaced_rows=replaced,
        added_columns=added,
        seconds=time.perf_counter() - start,
    )


def shared_file_problems(study: Study, wave: Wave) -> list[Problem]:
    """Errors (rule same-file-two-waves) naming both wave ids when `wave`'s raw file is another
    wave's file: the same file however its path is spelled, or a file with the same bytes
    (SHA-256; only files of equal size are hashed). Staging it would replace one wave with the other."""
    if not wave.file.is_file():
        return []
    size = wave.file.stat().st_size
    digest: str | None = None
    problems = []
    for other in study.waves:
        if other.id == wave.id or not other.file.is_file():
            continue
        if same_file(wave.file, other.file):
            reason = "is the same file as"
        elif other.file.stat().st_size == size:
            digest = digest or file_sha256(wave.file)
            if file_sha256(other.file) != digest:
                continue
            reason = "has the same bytes (SHA-256) as"
        else:
            continue
        problems.append(
            Problem(
                "same-file-two-waves",
                f"the raw file of wave {wave.id} {reason} the raw file of wave {other.id} ({other.file}); "
                "each wave needs its own file: fix `file =` of one of them",
                file=str(wave.file),
                value=f"{wave.id}, {other.id}",
            )
        )
    return problems


def _stage_direct(
    con: duckdb.DuckDBPyConnection, study: Study, wave: Wave, *, quiet: bool
) -> tuple[str, list[Problem], tuple[int, int, list[str]]] | None:
    """Stage a CSV wave straight from its file and check the inserted rows, in one transaction;
    (digest, warnings, (rows, replaced, added)) when it is committed, None (rolled back, nothing
    changed) when the exact path must decide: not a CSV file, a shared file, supplied replicate
    weights, a rejected value, a failed insert or an error found by a check."""
    if (
        not wave.file.is_file()
        or file_format(wave.file) != "csv"
        or shared_file_problems(study, wave)
        or wave_replicates(study, wave.id)  # their checks report file lines: the exact path's row numbers
    ):
        return None
    typed = typed_file_columns(study, wave.id)
    con.execute(sql("stage_insert_order.sql", keep=False))
    con.begin()
    try:
        with step(f"{wave.id}: reading {wave.file.name} into {study.database_path.name}", quiet=quiet):
            relation, header = csv_relation(con, wave.file, typed)
            con.register(RAW_TABLE, relation)
            replaced, added = _replace_start(con, study, wave)
            _insert_rows(con, study, wave, strict=True)
            if rejected_lines(con):
                raise _Fallback
        with step(f"{wave.id}: checking", quiet=quiet):
            _, columns, ignored = wave_view(con, study, wave.id, RAW_TABLE, header)
            problems = _wave_checks(con, study, wave, _staged_view(con, study, wave, columns), columns, ignored)
        if any(p.severity == "error" for p in problems):
            raise _Fallback
        with step(f"{wave.id}: hashing {wave.file.name}", quiet=quiet):
            digest = file_sha256(wave.file)
        with step(f"{wave.id}: writing to {study.database_path.name}", quiet=quiet):
            rows = _replace_finish(con, study, wave, digest=digest, warnings=problems)
            con.commit()
    except (_Fallback, duckdb.Error, DataError):
        con.rollback()
        return None
    except BaseException:
        con.rollback()
        raise
    finally:
        _unregister(con, RAW_TABLE, STAGED_VIEW)
        con.execute(sql("stage_insert_order.sql", keep=True))
    return digest, problems, (rows, replaced, added)


class _Fallback(Exception):
    """The direct path gives way to the exact path (see the module docstring)."""


STAGED_VIEW = "__wavebook_staged"


def _staged_view(con: duckdb.DuckDBPyConnection, study: Study, wave: Wave, columns: list[str]) -> str:
    """Register STAGED_VIEW: the wave's rows of `responses` (inserted, not yet committed) under the
    names the checks read (the respondent id under its spec name), the wave view's columns only."""
    staged = set(table_columns(con, "responses"))
    relation = con.table("responses").filter(
        duckdb.ColumnExpression("wave") == duckdb.ConstantExpression(wave.id)
    ).select(
        duckdb.ColumnExpression("respondent_id").alias(study.respondent_id),
        *(duckdb.ColumnExpression(c) for c in columns if c in staged and c != study.respondent_id),
    )
    con.register(STAGED_VIEW, relation)
    return STAGED_VIEW


def _unregister(con: duckdb.DuckDBPyConnection, *names: str) -> None:
    for name in names:
        con.unregister(name)  # a name never registered is no error


def _inspect(con: duckdb.DuckDBPyConnection, study: Study, wave: Wave, *, quiet: bool) -> list[Problem]:
    """Check the wave's file is its own, read it into the raw temp table and run every check;
    return the problems."""
    shared = shared_file_problems(study, wave)
    try:
        with step(f"{wave.id}: reading {wave.file.name}", quiet=quiet):
            file_columns = read_raw(con, wave.file, RAW_TABLE, typed_file_columns(study, wave.id))
    except DataError as exc:
        return shared + exc.problems
    view, columns, ignored = wave_view(con, study, wave.id, RAW_TABLE, file_columns)
    with step(f"{wave.id}: checking", quiet=quiet):
        return shared + _wave_checks(con, study, wave, view, columns, ignored)


def _wave_checks(
    con: duckdb.DuckDBPyConnection, study: Study, wave: Wave, raw: str, columns: list[str], ignored: list[str]
) -> list[Problem]:
    """Every check of the wave on the relation `raw` (its columns under their spec names)."""
    return run_checks(
        con,
        study,
        raw=raw,
        file_columns=columns,
        file=str(wave.file),
        previous=_earlier_staged(con, study, wave),
        wave=wave.id,
        sources=wave_sources(study, wave.id),
        ignored=tuple(ignored),
    )


def _earlier_staged(con: duckdb.DuckDBPyConnection, study: Study, wave: Wave) -> list[str]:
    """The waves declared before `wave` in the spec that are staged, in spec order."""
    if not table_columns(con, "waves") or not table_columns(con, "responses"):
        return []
    staged = set(staged_waves(con)["wave"].to_list())
    order = [w.id for w in study.waves]
    return [w for w in order[: order.index(wave.id)] if w in staged]


def _write(
    con: duckdb.DuckDBPyConnection, study: Study, wave: Wave, *, digest: str, warnings: list[Problem]
) -> tuple[int, int, list[str]]:
    """One transaction: new columns, delete the wave with its weights and weighting diagnostics (they
    belong to the old rows; the next `weigh` or `run` weighs the new ones), insert its rows, record
    it; (rows, replaced, added)."""
    con.begin()
    try:
        replaced, added = _replace_start(con, study, wave)
        _insert_rows(con, study, wave)
        rows = _replace_finish(con, study, wave, digest=digest, warnings=warnings)
        con.commit()
    except BaseException:
        con.rollback()
        raise
    return rows, replaced, added


def _replace_start(con: duckdb.DuckDBPyConnection, study: Study, wave: Wave) -> tuple[int, list[str]]:
    """Inside the staging transaction: the tables, the columns the spec gained, and the wave's old
    rows deleted with their weights and weighting diagnostics; (rows replaced, columns added)."""
    create_tables(con, study)
    added = add_new_columns(con, study)
    params = {"wave": wave.id}
    replaced = con.execute(sql("stage_count_wave.sql"), params).fetchall()[0][0]
    con.execute(sql("stage_delete_wave.sql"), params)
    for (table,) in con.execute(sql("stage_weighting_tables.sql")).fetchall():
        con.execute(sql("weighting_delete_wave.sql", table=table), params)
    return replaced, added


def _replace_finish(
    con: duckdb.DuckDBPyConnection, study: Study, wave: Wave, *, digest: str, warnings: list[Problem]
) -> int:
    """Inside the staging transaction, once the rows are in: the wave's row in `waves` and its
    warnings in `problems`; the number of rows staged."""
    params = {"wave": wave.id}
    rows = con.execute(sql("stage_count_wave.sql"), params).fetchall()[0][0]
    now = dt.datetime.now(dt.UTC).replace(tzinfo=None)
    con.execute(
        sql("stage_upsert_wave.sql"),
        {
            "wave": wave.id,
            "position": [w.id for w in study.waves].index(wave.id),
            "label": wave.label,
            "fieldwork_start": wave.fieldwork_start,
            "fieldwork_end": wave.fieldwork_end,
            "source_file": str(wave.file),
            "sha256": digest,
            "row_count": rows,
            "staged_at": now,
            "spec_signature": wave_signature(study, wave.id, column_types(study)),
        },
    )
    con.execute(sql("stage_delete_problems.sql"), params)
    for p in warnings:
        con.execute(
            sql("stage_insert_problem.sql"),
            {
                "wave": wave.id,
                "rule": p.rule,
                "severity": p.severity,
                "column_name": p.column,
                "value": p.value,
                "count": p.count,
                "examples": list(p.examples),
                "message": p.message,
                "recorded_at": now,
            },
        )
    return rows


def _insert_rows(con: duckdb.DuckDBPyConnection, study: Study, wave: Wave, *, strict: bool = False) -> None:
    """Insert the wave view's rows, typed per the codebook, as the wave's rows of `responses`.

    Columns of variables the wave did not ask are left NULL (not in the file). strict: fail on a
    value that would not be stored as the checks read it (`sql/stage_insert_responses.sql`).
    """
    view, file_columns, _ = wave_view(con, study, wave.id, RAW_TABLE, list(con.table(RAW_TABLE).columns))
    derived = {v.name for v in study.variables.values() if v.derived}
    present = set(file_columns) & (set(study.design.columns) | set(wave_sources(study, wave.id)) | derived)
    source = con.table(view)
    typed = {name for name, dtype in zip(source.columns, source.types, strict=True) if str(dtype) == "DOUBLE"}
    columns = [
        {"name": name, "type": dtype, "typed": name in typed}
        for name, dtype in column_types(study).items()
        if name in present
    ]
    con.execute(
        sql("stage_insert_responses.sql", raw=view, id=study.respondent_id, columns=columns, strict=strict),
        {"wave": wave.id},
    )
