"""Issue 8, the kill test: `kill -9` of `wavebook stage` and `wavebook run` at a few points never
changes an input file and never leaves the study database half-written; a rerun then succeeds.

A seeded wave of 50,000 rows is staged, then replaced by another file (other ids, 49,000 rows) and
the commands are killed while they restage it. After every kill:
  - the spec and every wave file are byte-identical (SHA-256);
  - the database is all-or-nothing: each wave's rows belong to one file, the one whose SHA-256
    and row count the `waves` table records, and its weights, when present, cover exactly its
    rows; a process killed before any commit leaves every table's content as it was (a content
    fingerprint per table: DuckDB may leave unused blocks in the file, so its bytes are not the
    measure);
  - a book, when present, is complete.
"""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import duckdb
import numpy as np
import polars as pl
import pytest
from conftest import TRACKER_SPEC
from safety_support import fingerprint

from pipeline.outputs import file_sha256
from pipeline.runner import run_study
from pipeline.staging.spec import load_spec
from pipeline.staging.stage import stage_wave

pytestmark = pytest.mark.slow


def _wave(n: int, *, seed: int, prefix: str) -> pl.DataFrame:
    """`n` invented respondents of the tracker spec (seeded)."""
    rng = np.random.default_rng(seed)
    region = rng.integers(1, 3, n)
    return pl.DataFrame({
        "resp_id": [f"{prefix}{i:06d}" for i in range(n)],
        "region": region,
        "area": rng.integers(1, 41, n),
        "p_select": np.where(region == 1, 0.01, 0.02),
        "age_band": rng.integers(1, 4, n),
        "channel": rng.choice(["shop", "web"], n),
        "aware_kestrel": rng.integers(0, 2, n),
        "aware_lumen": rng.integers(0, 2, n),
        "satisfaction": rng.choice([0, 3, 5, 7, 9, 10, 99], n),
        "spend": rng.gamma(2.0, 100.0, n).round(1),
    })


def _inputs(folder: Path) -> dict[str, str]:
    return {k: v for k, v in fingerprint(folder).items() if k == "study.toml" or k.startswith("waves/")}


def _content(database: Path) -> dict[str, tuple]:
    """Table -> (rows, sum of the rows' 64-bit hashes): the database's content, whatever the order
    of its rows or the layout of its file."""
    con = duckdb.connect(str(database), read_only=True)
    try:
        tables = [t for (t,) in con.execute("select table_name from information_schema.tables order by 1").fetchall()]
        return {t: con.execute(f'select count(*), sum(hash(t)) from "{t}" as t').fetchall()[0] for t in tables}
    finally:
        con.close()


def _assert_consistent(folder: Path, prefixes: dict[str, str]) -> None:
    """Each wave's rows are those of one of its files (`prefixes`: file SHA-256 -> id prefix), as
    recorded in `waves`, and its weights (when stored) cover exactly its rows."""
    con = duckdb.connect(str(folder / "study.duckdb"), read_only=True)
    try:
        for wave, sha, rows in con.execute("select wave, sha256, row_count from waves").fetchall():
            count, wrong = con.execute(
                "select count(*), count(*) filter (where not starts_with(respondent_id, $p)) from responses "
                "where wave = $w", {"w": wave, "p": prefixes[sha]}).fetchall()[0]
            assert (count, wrong) == (rows, 0), wave
            tables = {t for (t,) in con.execute("select table_name from information_schema.tables").fetchall()}
            if "weights" in tables:
                weighted, unmatched = con.execute(
                    "select count(*), count(*) filter (where r.respondent_id is null) from weights w "
                    "left join responses r using (wave, respondent_id) where w.wave = $w", {"w": wave}).fetchall()[0]
                assert unmatched == 0 and weighted in (0, rows), wave
    finally:
        con.close()
    book = folder / "book" / "study.html"
    if book.exists():
        assert book.read_text(encoding="utf-8").rstrip().endswith("</html>")


def _kill(argv: list[str], folder: Path, *, after: float | None = None, when: Path | None = None) -> int | None:
    """Start `wavebook ARGV` in `folder` and `kill -9` it after `after` seconds or as soon as
    `when` exists (polled every 5 ms, 30 s at most); the exit code when it finished first."""
    process = subprocess.Popen([sys.executable, "-m", "pipeline.cli", *argv], cwd=folder,
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + (after if after is not None else 30.0)
    while time.monotonic() < deadline and process.poll() is None:
        if when is not None and when.exists():
            break
        time.sleep(0.005)
    finished = process.poll()
    process.kill()
    process.wait()
    return finished


def test_kill_minus_9_during_stage_and_run_leaves_everything_whole(tmp_path: Path) -> None:
    folder = tmp_path / "study"
    (folder / "waves").mkdir(parents=True)
    (folder / "study.toml").write_text(TRACKER_SPEC, encoding="utf-8")
    _wave(50_000, seed=8, prefix="a").write_csv(folder / "waves" / "wave1.csv")
    _wave(300, seed=9, prefix="b").write_csv(folder / "waves" / "wave2.csv")
    prefixes = {file_sha256(folder / "waves" / name): p for name, p in (("wave1.csv", "a"), ("wave2.csv", "b"))}
    study = load_spec(folder / "study.toml")
    for wave_id in ("W1", "W2"):
        stage_wave(study, wave_id, quiet=True)
    _wave(49_000, seed=10, prefix="c").write_csv(folder / "waves" / "wave1.csv")  # the file to restage
    prefixes[file_sha256(folder / "waves" / "wave1.csv")] = "c"
    inputs = _inputs(folder)
    database = folder / "study.duckdb"

    # (command, kill point, whether the kill surely falls before any commit)
    kills = [
        (["stage", "study.toml", "--wave", "W1", "--quiet"], {"after": 0.4}, True),
        (["stage", "study.toml", "--wave", "W1", "--quiet"], {"when": folder / "study.duckdb.wal"}, False),
        (["stage", "study.toml", "--wave", "W1", "--quiet"], {"after": 2.0}, False),
        (["run", "study.toml", "--quiet"], {"after": 2.5}, False),
        (["run", "study.toml", "--quiet"], {"after": 4.5}, False),
    ]
    for argv, when, before_any_commit in kills:
        before = _content(database)
        finished = _kill(argv, folder, **when)
        assert finished in (None, 0), (argv, when)
        assert _inputs(folder) == inputs, (argv, when)
        _assert_consistent(folder, prefixes)
        if before_any_commit:
            assert _content(database) == before, (argv, when)

    run_study(folder / "study.toml", quiet=True)
    _assert_consistent(folder, prefixes)
    con = duckdb.connect(str(database), read_only=True)
    try:
        assert con.execute("select wave, count(*) from weights group by 1 order by 1").fetchall() == [
            ("W1", 49_000), ("W2", 300)]
    finally:
        con.close()
    assert _inputs(folder) == inputs
