"""Issue 8, data loss 2, 3, 4 and 6: a wave never silently becomes another wave, a non-database
file is never opened as the study database, file names are never patterns, and restaging a
wave never leaves weights that belong to its old rows.

Refusals leave the study folder byte-identical (SHA-256 fingerprints before and after).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import duckdb
import pytest
from conftest import TRACKER_SPEC, Tracker, tracker_rows
from safety_support import fingerprint, wavebook


@pytest.mark.parametrize("how", ["same path", "same path spelled differently", "a copy"])
def test_one_raw_file_for_two_waves_is_an_error(tracker: Tracker, how: str, capsys: pytest.CaptureFixture[str]) -> None:
    assert wavebook(["stage", str(tracker.spec_path), "--quiet"], capsys)[0] == 0
    if how == "a copy":
        shutil.copyfile(tracker.folder / "waves" / "wave1.csv", tracker.folder / "waves" / "wave1_copy.csv")
    second = {"same path": "waves/wave1.csv", "same path spelled differently": "./waves/../waves/wave1.csv",
              "a copy": "waves/wave1_copy.csv"}[how]
    tracker.write_spec(TRACKER_SPEC.replace('file = "waves/wave2.csv"', f'file = "{second}"'))
    before = fingerprint(tracker.folder)
    for command in ("check", "stage"):
        code, out, err = wavebook([command, str(tracker.spec_path), "--quiet"], capsys)
        assert code == 1, command
        lines = [line for line in (out + err).splitlines() if "[same-file-two-waves]" in line]
        assert any("wave W1" in line and "wave W2" in line for line in lines), (command, out + err)
    assert fingerprint(tracker.folder) == before


def test_database_naming_an_existing_csv_is_refused(tracker: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    (tracker.folder / "panel.csv").write_text("id,name\n1,kept\n", encoding="utf-8")
    tracker.write_spec('database = "panel.csv"\n' + TRACKER_SPEC)
    before = fingerprint(tracker.folder)
    for command in ("stage", "weigh", "run", "check"):
        code, _, err = wavebook([command, str(tracker.spec_path), "--quiet"], capsys)
        assert code == 1, command
        assert "[not-a-database]" in err, (command, err)
        assert "database-busy" not in err
    assert fingerprint(tracker.folder) == before


def test_database_naming_a_folder_is_refused_by_check_too(tracker: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    (tracker.folder / "archive").mkdir()
    tracker.write_spec('database = "archive"\n' + TRACKER_SPEC)
    for command in ("check", "stage", "run"):
        code, _, err = wavebook([command, str(tracker.spec_path), "--quiet"], capsys)
        assert (command, code, "[not-a-database]" in err) == (command, 1, True)


def test_database_naming_the_spec_is_refused(tracker: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    tracker.write_spec('database = "study.toml"\n' + TRACKER_SPEC)
    before = fingerprint(tracker.folder)
    code, _, err = wavebook(["stage", str(tracker.spec_path), "--quiet"], capsys)
    assert (code, "[not-a-database]" in err) == (1, True)
    assert fingerprint(tracker.folder) == before


@pytest.mark.parametrize("name", ["wave[1].csv", "wave*.csv", "wave?.csv"])
def test_wave_file_names_are_literal_never_patterns(tracker: Tracker, name: str) -> None:
    from pipeline.staging.database import open_database
    from pipeline.staging.stage import stage_wave

    tracker.write_wave(name, tracker_rows(5, prefix="literal"))  # beside wave1.csv and wave2.csv (12 rows each)
    tracker.write_spec(TRACKER_SPEC.replace('file = "waves/wave1.csv"', f'file = "waves/{name}"'))
    study = tracker.study()
    report = stage_wave(study, "W1", quiet=True)
    assert report.rows == 5
    con = open_database(study, read_only=True)
    try:
        ids = [r[0] for r in con.execute("select respondent_id from responses where wave = 'W1' order by 1").fetchall()]
    finally:
        con.close()
    assert ids == [f"literal{i:03d}" for i in range(1, 6)]


def _wave_rows(con: duckdb.DuckDBPyConnection, table: str) -> dict[str, int]:
    return dict(con.execute(f"select wave, count(*) from {table} group by wave").fetchall())


def test_restaging_deletes_the_waves_old_weights(tracker: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    spec = str(tracker.spec_path)
    assert wavebook(["stage", spec, "--quiet"], capsys)[0] == 0
    assert wavebook(["weigh", spec, "--quiet"], capsys)[0] == 0
    tracker.write_wave("wave1.csv", tracker_rows(15, prefix="new"))
    assert wavebook(["stage", spec, "--wave", "W1", "--quiet"], capsys)[0] == 0
    con = duckdb.connect(str(tracker.folder / "study.duckdb"), read_only=True)
    try:
        assert _wave_rows(con, "weights") == {"W2": 12}  # W1's old weights are gone, W2's untouched
        assert "W1" not in _wave_rows(con, "weighting_steps")
    finally:
        con.close()
    assert wavebook(["run", spec, "--quiet"], capsys)[0] == 0  # run weighs the restaged wave again
    con = duckdb.connect(str(tracker.folder / "study.duckdb"), read_only=True)
    try:
        unmatched = con.execute(
            "select count(*) from weights w anti join responses r using (wave, respondent_id)"
        ).fetchall()[0][0]
        assert (_wave_rows(con, "weights"), unmatched) == ({"W1": 15, "W2": 12}, 0)
    finally:
        con.close()


@pytest.mark.parametrize("suffix", ["csv", "parquet"])
def test_estimate_and_rake_read_file_names_literally(tmp_path: Path, suffix: str, capsys: pytest.CaptureFixture[str]) -> None:
    import polars as pl

    def write(name: str, values: list[float]) -> None:
        frame = pl.DataFrame({"w": [1.0] * len(values), "y": values, "g": ["a"] * len(values)})
        frame.write_csv(tmp_path / name) if suffix == "csv" else frame.write_parquet(tmp_path / name)

    write(f"data1.{suffix}", [100.0, 100.0])
    write(f"data[1].{suffix}", [1.0, 3.0])
    literal = str(tmp_path / f"data[1].{suffix}")
    code, out, err = wavebook(["estimate", literal, "--weight", "w", "--mean", "y", "--quiet"], capsys)
    assert code == 0, err
    assert float(out.splitlines()[1].split(",")[4]) == 2.0  # the mean of 1 and 3, not of the other file
    (tmp_path / "targets.csv").write_text("variable,category,target\ng,a,1\n", encoding="utf-8")
    code, out, err = wavebook(["rake", literal, "--targets", str(tmp_path / "targets.csv"), "--quiet"], capsys)
    assert code == 0 and "2 of 2 rows weighted" in out, out + err
