"""The `weights` table has no index: an older study database's indexed table is rebuilt, rows kept."""

from __future__ import annotations

from pathlib import Path

import duckdb

from pipeline.weighting.store import create_weighting_tables

OLD_SCHEMA = """create table weights (wave varchar not null, respondent_id varchar not null, weight double not null,
primary key (wave, respondent_id))"""


def _indexed(con: duckdb.DuckDBPyConnection) -> bool:
    query = "select count(*) from duckdb_constraints() where table_name = 'weights' and constraint_type = 'PRIMARY KEY'"
    return con.execute(query).fetchone()[0] > 0


def test_new_weights_table_has_no_index(tmp_path: Path) -> None:
    con = duckdb.connect(str(tmp_path / "study.duckdb"))
    create_weighting_tables(con)
    assert not _indexed(con)
    assert con.execute("select count(*) from weights").fetchone()[0] == 0


def test_an_indexed_weights_table_is_rebuilt_without_its_index_keeping_every_row(tmp_path: Path) -> None:
    con = duckdb.connect(str(tmp_path / "study.duckdb"))
    con.execute(OLD_SCHEMA)
    rows = [("W1", "R1", 1.5), ("W1", "R2", 2.5), ("W2", "R1", 0.5)]
    con.executemany("insert into weights values (?, ?, ?)", rows)
    assert _indexed(con)
    create_weighting_tables(con)
    assert not _indexed(con)
    assert sorted(con.execute("select wave, respondent_id, weight from weights").fetchall()) == rows
    create_weighting_tables(con)  # a second call changes nothing
    assert con.execute("select count(*) from weights").fetchone()[0] == 3
