"""Staging close to the reader: a CSV file is read typed, a clean file straight into `responses`,
and a value that does not convert, or whose spelling a check reports, is still seen as written."""

from __future__ import annotations

from pathlib import Path

import duckdb
import pytest

from conftest import Tracker, tracker_rows
from pipeline.errors import DataError
from pipeline.staging import stage as stage_module
from pipeline.staging.readers import read_raw
from pipeline.staging.stage import check_wave, stage_wave
from pipeline.staging.wave_columns import typed_file_columns


def raw_types(tracker: Tracker, path: Path) -> dict[str, str]:
    con = duckdb.connect()
    try:
        read_raw(con, path, "raw", typed_file_columns(tracker.study(), "W1"))
        relation = con.table("raw")
        return {name: str(dtype) for name, dtype in zip(relation.columns, relation.types, strict=True)}
    finally:
        con.close()


def test_numbers_are_read_typed_and_only_failing_columns_as_text(tracker: Tracker) -> None:
    path = tracker.folder / "waves" / "wave1.csv"
    assert raw_types(tracker, path) == {
        "resp_id": "VARCHAR", "region": "DOUBLE", "area": "VARCHAR", "p_select": "DOUBLE",
        "age_band": "DOUBLE", "channel": "VARCHAR", "aware_kestrel": "DOUBLE", "aware_lumen": "DOUBLE",
        "satisfaction": "DOUBLE", "spend": "DOUBLE",
    }
    rows = tracker_rows(12, prefix="a")
    rows[0]["spend"] = "12,5"  # does not convert: DuckDB's rejects table names the column
    rows[1]["satisfaction"] = "2.50"  # converts, but a fraction in a code column is reported as written
    rows[2]["aware_lumen"] = "2"  # converts, but an item holds 0 or 1
    tracker.write_wave("wave1.csv", rows)
    types = raw_types(tracker, path)
    assert {c for c, t in types.items() if t == "VARCHAR"} == {"resp_id", "area", "channel", "spend", "satisfaction", "aware_lumen"}


def test_values_are_reported_as_written(tracker: Tracker) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[0]["spend"] = "Infinity"  # a typed read would hold inf
    rows[1]["spend"] = "12,5"
    rows[2]["age_band"] = "NaN"
    rows[3]["satisfaction"] = "2.50"  # a typed read would print 2.5
    rows[4]["p_select"] = "1e400"
    tracker.write_wave("wave1.csv", rows)
    problems = check_wave(tracker.study(), "W1")
    assert {(p.rule, p.column, p.value, p.count, p.examples) for p in problems} == {
        ("not-a-number", "spend", "Infinity", 1, ("a001",)),
        ("not-a-number", "spend", "12,5", 1, ("a002",)),
        ("not-a-number", "age_band", "NaN", 1, ("a003",)),
        ("code-outside-codebook", "satisfaction", "2.50", 1, ("a004",)),
        ("not-a-number", "p_select", "1e400", 1, ("a005",)),
    }


def test_a_bad_file_staged_reports_what_check_reports_and_writes_nothing(tracker: Tracker) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[0]["spend"] = "abc"
    rows[1]["age_band"] = "4"
    rows[2]["aware_kestrel"] = "0.5"  # a typed insert would round it
    tracker.write_wave("wave1.csv", rows)
    study = tracker.study()
    expected = check_wave(study, "W1")
    with pytest.raises(DataError) as caught:
        stage_wave(study, "W1", quiet=True)
    assert caught.value.problems == expected
    assert {p.rule for p in expected} == {"not-a-number", "code-outside-codebook", "multi-not-binary"}
    assert not study.database_path.exists()


def test_a_fraction_in_an_integer_column_fails_the_direct_insert(tracker: Tracker) -> None:
    """Without the strict insert a 0.5 in a TINYINT item would be rounded and pass every check."""
    rows = tracker_rows(12, prefix="a")
    rows[5]["aware_kestrel"] = "0.5"
    tracker.write_wave("wave1.csv", rows)
    study = tracker.study()
    con = duckdb.connect()
    try:
        assert stage_module._stage_direct(con, study, study.wave("W1"), quiet=True) is None
        assert not con.execute("select count(*) from information_schema.tables where table_name = 'responses'").fetchall()[0][0]
    finally:
        con.close()


def staged(study_path: Path) -> tuple[list[tuple], list[tuple]]:
    con = duckdb.connect(str(study_path), read_only=True)
    try:
        rows = con.execute("select * from responses order by wave, respondent_id").fetchall()
        problems = con.execute("select wave, rule, column_name, value, count, examples, message from problems order by all").fetchall()
        return rows, problems
    finally:
        con.close()


def test_direct_and_exact_paths_stage_the_same_rows_and_warnings(
    tracker: Tracker, monkeypatch: pytest.MonkeyPatch
) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[0]["age_band"] = " 3 "  # spellings of valid codes
    rows[1]["satisfaction"] = "9.0"
    rows[2]["region"] = "02"
    rows[3]["spend"] = "1e2"
    rows[4]["aware_lumen"] = "1.0"
    for row in rows:
        row["note"] = "extra"  # an extra column: a warning recorded in `problems`
    tracker.write_wave("wave1.csv", rows)
    study = tracker.study()

    def no_exact_read(*args: object, **kwargs: object) -> None:
        raise AssertionError("a clean CSV file is staged straight from the file")

    with monkeypatch.context() as patch:
        patch.setattr(stage_module, "read_raw", no_exact_read)
        stage_wave(study, "W1", quiet=True)
        stage_wave(study, "W2", quiet=True)  # W1 staged: the drift checks run on W2
    direct = staged(study.database_path)
    study.database_path.unlink()
    with monkeypatch.context() as patch:
        patch.setattr(stage_module, "_stage_direct", lambda *args, **kwargs: None)
        stage_wave(study, "W1", quiet=True)
        stage_wave(study, "W2", quiet=True)
    exact = staged(study.database_path)
    assert direct == exact
    assert len(direct[0]) == 24 and ("W1", "extra-column") in {(p[0], p[1]) for p in direct[1]}
    con = duckdb.connect(str(study.database_path), read_only=True)
    try:
        values = con.execute(
            "select respondent_id, age_band, satisfaction, region, spend, aware_lumen from responses "
            "where wave = 'W1' and respondent_id in ('a001', 'a002', 'a003', 'a004', 'a005') order by 1"
        ).fetchall()
    finally:
        con.close()
    assert [v[1:] for v in values] == [(3, 0, 1, 0.0, 0), (2, 9, 2, 12.5, 0), (3, 9, 2, 25.0, 0), (1, 10, 2, 100.0, 1), (2, 99, 1, None, 1)]
