"""stage_wave: typed rows, atomic replace, untouched neighbours, rollback on failure, same table
from CSV / Parquet, schema growth, and staging real reference files in place."""

from __future__ import annotations

import hashlib
from pathlib import Path

import duckdb
import polars as pl
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from polars.testing import assert_frame_equal

import pipeline.staging.stage
from pipeline.staging.spec import load_spec
from conftest import TRACKER_SPEC, Tracker, tracker_rows
from pipeline.cli import main
from pipeline.errors import DataError
from pipeline.staging.database import load_responses, open_database
from pipeline.staging.stage import stage_wave


def snapshot(tracker: Tracker) -> dict[str, list[tuple]]:
    """Every row of the staging tables, sorted, for before/after comparisons."""
    con = duckdb.connect(str(tracker.study().database_path), read_only=True)
    try:
        return {t: sorted(con.sql(f"select * from {t}").fetchall(), key=repr) for t in ("waves", "responses", "problems")}
    finally:
        con.close()


def read(tracker: Tracker, wave_ids: list[str] | None = None) -> pl.DataFrame:
    study = tracker.study()
    con = open_database(study, read_only=True)
    try:
        return load_responses(con, study, wave_ids)
    finally:
        con.close()


def test_stage_types_values_and_bookkeeping(tracker: Tracker) -> None:
    study = tracker.study()
    report = stage_wave(study, "W1", quiet=True)
    assert (report.wave, report.rows, report.replaced_rows, report.warnings) == ("W1", 12, 0, [])
    path = tracker.folder / "waves" / "wave1.csv"
    assert report.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    con = open_database(study, read_only=True)
    types = dict(con.sql("select column_name, data_type from information_schema.columns where table_name = 'responses'").fetchall())
    waves = con.sql("select wave, position, label, fieldwork_start, source_file, sha256, row_count from waves").fetchall()
    con.close()
    # column types as documented in DEVELOPERS.md ("Column types in responses")
    assert types == {
        "wave": "VARCHAR",
        "respondent_id": "VARCHAR",
        "region": "BIGINT",  # strata and a single variable: the codebook type wins
        "area": "VARCHAR",
        "p_select": "DOUBLE",
        "age_band": "BIGINT",
        "channel": "VARCHAR",
        "aware_kestrel": "TINYINT",
        "aware_lumen": "TINYINT",
        "satisfaction": "BIGINT",
        "spend": "DOUBLE",
    }
    assert waves == [("W1", 0, "Wave 1 (March 2026)", study.waves[0].fieldwork_start, str(path.resolve()), report.sha256, 12)]
    frame = read(tracker)
    source = pl.read_csv(path, infer_schema=False)
    assert frame["respondent_id"].to_list() == source["resp_id"].to_list()
    assert frame["spend"].to_list() == [None if v is None else float(v) for v in source["spend"].to_list()]
    assert frame["satisfaction"].to_list() == [int(v) for v in source["satisfaction"].to_list()]
    assert frame["area"].to_list() == source["area"].to_list()
    assert report.summary().startswith("W1: staged 12 rows from wave1.csv; no warnings")


def test_values_are_typed_from_their_spelling(tracker: Tracker) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[0].update(age_band="2.0", spend=" 1e3 ", aware_kestrel="1.0", region="01")
    tracker.write_wave("wave1.csv", rows)
    stage_wave(tracker.study(), "W1", quiet=True)
    first = read(tracker).row(0, named=True)
    assert (first["age_band"], first["spend"], first["aware_kestrel"], first["region"]) == (2, 1000.0, 1, 1)


def test_restaging_replaces_the_wave(tracker: Tracker) -> None:
    study = tracker.study()
    stage_wave(study, "W1", quiet=True)
    tracker.write_wave("wave1.csv", tracker_rows(9, prefix="a"))
    report = stage_wave(study, "W1", quiet=True)
    assert (report.rows, report.replaced_rows) == (9, 12)
    again = stage_wave(study, "W1", quiet=True)
    assert (again.rows, again.replaced_rows) == (9, 9)
    tables = snapshot(tracker)
    assert len(tables["responses"]) == 9 and len(tables["waves"]) == 1


def test_staging_w2_leaves_w1_identical(tracker: Tracker) -> None:
    study = tracker.study()
    stage_wave(study, "W1", quiet=True)
    before = snapshot(tracker)
    w1_before = read(tracker, ["W1"])
    stage_wave(study, "W2", quiet=True)
    stage_wave(study, "W2", quiet=True)
    after = snapshot(tracker)
    assert_frame_equal(read(tracker, ["W1"]), w1_before)
    assert [r for r in after["responses"] if r[0] == "W1"] == before["responses"]
    assert [r for r in after["waves"] if r[0] == "W1"] == before["waves"]
    assert read(tracker)["wave"].to_list() == ["W1"] * 12 + ["W2"] * 12


def test_failed_checks_leave_the_database_unchanged(tracker: Tracker) -> None:
    study = tracker.study()
    stage_wave(study, "W1", quiet=True)
    stage_wave(study, "W2", quiet=True)
    before = snapshot(tracker)
    rows = tracker_rows(12, prefix="a")
    rows[0]["age_band"] = "9"
    tracker.write_wave("wave1.csv", rows)
    with pytest.raises(DataError) as info:
        stage_wave(study, "W1", quiet=True)
    assert "nothing was staged" in info.value.summary
    assert [p.rule for p in info.value.problems] == ["code-outside-codebook"]
    assert snapshot(tracker) == before


def test_failed_first_staging_leaves_no_database(tracker: Tracker) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[0]["resp_id"] = ""
    tracker.write_wave("wave1.csv", rows)
    with pytest.raises(DataError):
        stage_wave(tracker.study(), "W1", quiet=True)
    assert not tracker.study().database_path.exists()


def test_exception_mid_insert_rolls_everything_back(tracker: Tracker, monkeypatch: pytest.MonkeyPatch) -> None:
    study = tracker.study()
    stage_wave(study, "W1", quiet=True)
    before = snapshot(tracker)
    original = pipeline.staging.stage._insert_rows

    def insert_then_fail(*args: object, **kwargs: object) -> None:
        original(*args, **kwargs)  # the old rows are deleted and the new ones inserted by now
        raise RuntimeError("disk full (simulated)")

    monkeypatch.setattr(pipeline.staging.stage, "_insert_rows", insert_then_fail)
    tracker.write_wave("wave1.csv", tracker_rows(5, prefix="z"))
    with pytest.raises(RuntimeError, match="simulated"):
        stage_wave(study, "W1", quiet=True)
    assert snapshot(tracker) == before


def test_spec_gaining_a_column_adds_it(tmp_path: Path) -> None:
    without_spend = TRACKER_SPEC[: TRACKER_SPEC.index("[variables.spend]")]
    tracker = Tracker(tmp_path, without_spend)
    tracker.write_wave("wave1.csv", tracker_rows(12, prefix="a"))
    tracker.write_wave("wave2.csv", tracker_rows(12, prefix="b"))
    first = stage_wave(tracker.study(), "W1", quiet=True)
    assert [p.rule for p in first.warnings] == ["extra-column"]
    tracker.write_spec(TRACKER_SPEC)
    report = stage_wave(tracker.study(), "W2", quiet=True)
    assert report.added_columns == ["spend"]
    frame = read(tracker)
    assert frame.filter(pl.col("wave") == "W1")["spend"].null_count() == 12
    assert frame.filter(pl.col("wave") == "W2")["spend"].null_count() == 2  # rows 5 and 10 have no spend
    con = duckdb.connect(str(tracker.study().database_path), read_only=True)
    recorded = con.sql("select wave, rule, severity from problems").fetchall()
    con.close()
    assert recorded == [("W1", "extra-column", "warning")]


def test_codebook_type_change_is_refused(tracker: Tracker) -> None:
    stage_wave(tracker.study(), "W1", quiet=True)
    before = snapshot(tracker)
    tracker.write_spec(TRACKER_SPEC.replace('values = { shop = "In a shop", web = "On the web" }', 'values = { 1 = "In a shop", 2 = "On the web" }'))
    rows = tracker_rows(12, prefix="b")
    for row in rows:
        row["channel"] = "1" if row["channel"] == "shop" else "2"
    tracker.write_wave("wave2.csv", rows)
    with pytest.raises(DataError) as info:
        stage_wave(tracker.study(), "W2", quiet=True)
    (problem,) = info.value.problems
    assert problem.rule == "column-type-changed" and problem.column == "channel"
    assert "responses.channel is VARCHAR but the spec now makes it BIGINT" in problem.message
    assert snapshot(tracker) == before


def _write_formats(tracker: Tracker) -> None:
    """The same 12 respondents as CSV (W1), Parquet with native types (W2) and Parquet with every
    number stored as a float (W3, as many export tools write it: 3.0 must stage as code 3)."""
    rows = tracker_rows(12, prefix="a")
    tracker.write_wave("wave1.csv", rows)
    typed = pl.DataFrame(rows).with_columns(
        pl.col("region", "area", "age_band", "satisfaction", "aware_kestrel", "aware_lumen").cast(pl.Int64),
        pl.col("p_select").cast(pl.Float64),
        pl.when(pl.col("spend") == "").then(None).otherwise(pl.col("spend")).cast(pl.Float64).alias("spend"),
    )
    typed.write_parquet(tracker.folder / "waves" / "wave2.parquet")
    numeric = [c for c, t in typed.schema.items() if t != pl.String]
    typed.with_columns(pl.col(numeric).cast(pl.Float64)).write_parquet(tracker.folder / "waves" / "wave3.parquet")
    spec = TRACKER_SPEC.replace('file = "waves/wave2.csv"', 'file = "waves/wave2.parquet"')
    spec = spec.replace("[design]", '[waves.W3]\nlabel = "Wave 3"\nfile = "waves/wave3.parquet"\n\n[design]')
    tracker.write_spec(spec)


def test_csv_parquet_and_float_parquet_stage_the_same_rows(tracker: Tracker) -> None:
    _write_formats(tracker)
    study = tracker.study()
    reports = [stage_wave(study, w, quiet=True) for w in ("W1", "W2", "W3")]
    assert [r.warnings for r in reports] == [[], [], []]  # identical data: no drift either
    frame = read(tracker)
    per_wave = [frame.filter(pl.col("wave") == w).drop("wave") for w in ("W1", "W2", "W3")]
    assert per_wave[0].height == 12
    assert_frame_equal(per_wave[1], per_wave[0])
    assert_frame_equal(per_wave[2], per_wave[0])


def test_load_responses_names_unstaged_waves(tracker: Tracker) -> None:
    stage_wave(tracker.study(), "W1", quiet=True)
    with pytest.raises(DataError) as info:
        read(tracker, ["W2"])
    assert [p.rule for p in info.value.problems] == ["wave-not-staged"]
    assert "wave 'W2' is not staged" in info.value.problems[0].message


def test_stage_command_stages_each_wave(tracker: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["stage", str(tracker.spec_path)]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].startswith("W1: staged 12 rows from wave1.csv")
    assert lines[1].startswith("W2: staged 12 rows from wave2.csv")
    rows = tracker_rows(12, prefix="b")
    rows[0]["spend"] = "-1"
    tracker.write_wave("wave2.csv", rows)
    assert main(["stage", str(tracker.spec_path)]) == 1
    captured = capsys.readouterr()
    assert captured.out.startswith("W1: staged 12 rows from wave1.csv (replaced 12)")
    assert "[out-of-bounds]" in captured.err and "1 wave not staged" in captured.err
    assert main(["stage", str(tracker.spec_path), "--wave", "W9"]) == 1
    assert "no wave 'W9' in the spec" in capsys.readouterr().err


def test_stage_reference_file_in_place(tmp_path: Path, reference_dir: Path) -> None:
    """Lohr, Sampling: Design and Analysis, 3rd ed., data set htstrat (stratified by gender),
    read in place from ../shared/reference/lohr_sda3; population counts from htpop.csv."""
    folder = reference_dir / "lohr_sda3"
    population = pl.read_csv(folder / "htpop.csv").group_by("gender").len()
    sizes = ", ".join(f"{g} = {n}" for g, n in population.iter_rows())
    spec = f"""
title = "Heights"
respondent_id = "rn"
[waves.S]
label = "Sample"
file = {str(folder / "htstrat.csv")!r}
[design]
strata = "gender"
population = {{ {sizes} }}
[variables.height]
label = "Height (cm)"
type = "numeric"
minimum = 0
"""
    (tmp_path / "heights.toml").write_text(spec, encoding="utf-8")
    study = load_spec(tmp_path / "heights.toml")
    report = stage_wave(study, "S", quiet=True)
    # SOURCE.md of lohr_sda3: htstrat has 200 rows; population htpop has 2000
    assert report.rows == 200 and population["len"].sum() == 2000
    con = open_database(study, read_only=True)
    staged = load_responses(con, study).group_by("gender").agg(pl.len(), pl.col("height").mean()).sort("gender")
    con.close()
    # reference library: polars reading the same file directly
    direct = pl.read_csv(folder / "htstrat.csv").group_by("gender").agg(pl.len(), pl.col("height").mean()).sort("gender")
    assert staged["len"].to_list() == direct["len"].to_list()
    assert staged["height"].to_list() == pytest.approx(direct["height"].to_list(), rel=1e-15)


def test_duplicate_ids_in_reference_file(tmp_path: Path, reference_dir: Path) -> None:
    """Lohr SDA 3rd ed. agstrat: `rn` repeats across strata; the duplicate-id check must agree with
    polars' own count of repeated values (reference library), file read in place."""
    path = reference_dir / "lohr_sda3" / "agstrat.csv"
    spec = f"""
title = "Farms"
respondent_id = "rn"
[waves.S]
label = "Sample"
file = {str(path)!r}
[design]
strata = "region"
base_weight = "strwt"
[variables.acres92]
label = "Acres 1992"
type = "numeric"
"""
    (tmp_path / "farms.toml").write_text(spec, encoding="utf-8")
    study = load_spec(tmp_path / "farms.toml")
    with pytest.raises(DataError) as info:
        stage_wave(study, "S", quiet=True)
    (problem,) = [p for p in info.value.problems if p.severity == "error"]
    direct = pl.read_csv(path, infer_schema=False)
    repeated = direct.filter(pl.col("rn").is_duplicated())
    assert problem.rule == "duplicate-id"
    assert problem.count == repeated.height
    assert problem.message.startswith(f"{repeated['rn'].n_unique()} respondent ids appear")
    assert list(problem.examples) == sorted(repeated["rn"].unique().to_list())[:5]


def _spellings(code: int) -> st.SearchStrategy[str]:
    return st.sampled_from([str(code), f"{code}.0", f" {code} ", f"{code}.00"])


_respondent = st.fixed_dictionaries(
    {
        "region": st.sampled_from([1, 2]),
        "age_band": st.sampled_from([1, 2, 3]),
        "satisfaction": st.sampled_from([*range(11), 99]),
        "aware_kestrel": st.sampled_from([0, 1]),
        "spend": st.one_of(st.none(), st.floats(0, 5000, allow_nan=False)),
    }
).flatmap(
    lambda r: st.fixed_dictionaries(
        {
            "typed": st.just(r),
            "age_text": _spellings(r["age_band"]),
            "satisfaction_text": _spellings(r["satisfaction"]),
        }
    )
)


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(respondents=st.lists(_respondent, min_size=1, max_size=15))
def test_staged_values_equal_the_intended_values(tmp_path_factory: pytest.TempPathFactory, respondents: list[dict]) -> None:
    """Property: any valid file, whatever the spelling of its codes, stages without a problem and
    the typed table holds exactly the intended values (spend round-trips through its repr)."""
    tracker = Tracker(tmp_path_factory.mktemp("prop"))
    rows = []
    for i, r in enumerate(respondents):
        t = r["typed"]
        rows.append(
            {
                **tracker_rows(1, prefix=f"p{i}-")[0],
                "region": str(t["region"]),
                "age_band": r["age_text"],
                "satisfaction": r["satisfaction_text"],
                "aware_kestrel": str(t["aware_kestrel"]),
                "spend": "" if t["spend"] is None else repr(t["spend"]),
            }
        )
    tracker.write_wave("wave1.csv", rows)
    report = stage_wave(tracker.study(), "W1", quiet=True)
    assert report.warnings == [] and report.rows == len(rows)
    staged = read(tracker).sort("respondent_id")
    expected = sorted(((f"p{i}-001", r["typed"]) for i, r in enumerate(respondents)), key=lambda x: x[0])
    assert staged["respondent_id"].to_list() == [e[0] for e in expected]
    for column in ("region", "age_band", "satisfaction", "aware_kestrel", "spend"):
        assert staged[column].to_list() == [e[1][column] for e in expected]


def test_demo_study_stages_cleanly(tmp_path: Path) -> None:
    """The invented demo study in sample_data/ (copied, so its database lands in tmp_path) passes
    every check and stages each wave whole; row counts from polars reading the files directly."""
    import shutil

    source = Path(__file__).resolve().parents[1] / "sample_data"
    if not (source / "study.toml").is_file():
        pytest.skip("sample_data/study.toml is not built in this checkout")
    folder = tmp_path / "demo"
    shutil.copytree(source, folder, ignore=shutil.ignore_patterns("*.duckdb", "*.duckdb.wal", "__pycache__"))
    study = load_spec(folder / "study.toml")
    for wave in study.waves:
        report = stage_wave(study, wave.id, quiet=True)
        direct = pl.read_parquet(wave.file) if wave.file.suffix == ".parquet" else pl.read_csv(wave.file, infer_schema=False)
        assert report.rows == direct.height
        assert [p for p in report.warnings if p.rule == "extra-column"] == []
