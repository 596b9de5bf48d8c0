"""draft_spec / `wavebook init`: the draft is a valid spec that stages its own file, with the
types, codes and labels the data implies."""

from __future__ import annotations

import string
from pathlib import Path

import polars as pl
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from conftest import tracker_rows, write_csv
from pipeline.cli import main
from pipeline.errors import DataError
from pipeline.staging.draft import draft_spec
from pipeline.staging.spec import load_spec
from pipeline.staging.stage import check_wave


def draft_and_load(data: Path, **options: object):
    spec_path = data.parent.parent / "draft.toml"
    spec_path.write_text(draft_spec(data, spec_path=spec_path, **options), encoding="utf-8")
    return load_spec(spec_path)


def test_round_trip_from_csv(tmp_path: Path) -> None:
    data = write_csv(tmp_path / "waves" / "wave1.csv", tracker_rows(12))
    study = draft_and_load(data)
    assert study.respondent_id == "resp_id"
    assert study.waves[0].file == data.resolve()
    v = study.variables
    assert set(v) == {"region", "area", "p_select", "age_band", "channel", "aware", "satisfaction", "spend"}
    assert (v["region"].type, v["region"].values) == ("single", {1: "1", 2: "2"})
    assert (v["channel"].type, v["channel"].values) == ("single", {"shop": "shop", "web": "web"})
    assert (v["aware"].type, v["aware"].items) == ("multi", {"aware_kestrel": "kestrel", "aware_lumen": "lumen"})
    assert sorted(v["satisfaction"].values) == [0, 5, 7, 9, 10, 99]
    assert v["spend"].type == "numeric" and v["p_select"].type == "numeric"
    assert check_wave(study, "W1") == []  # the draft accepts its own file without a single problem


def test_only_csv_and_parquet_are_read(tmp_path: Path) -> None:
    """Any other suffix is refused by name, with the way out (export to CSV or Parquet)."""
    path = tmp_path / "waves" / "w.labelled"
    path.parent.mkdir()
    path.write_bytes(b"\x00\x01 not a table")
    with pytest.raises(DataError) as info:
        draft_spec(path)
    (problem,) = info.value.problems
    assert problem.rule == "unsupported-format" and problem.file == str(path.resolve())
    assert "reads .csv and .parquet files, not '.labelled'" in problem.message
    assert "export your data to CSV or Parquet" in problem.message


def test_id_choice(tmp_path: Path) -> None:
    rows = [{"group": "1", "serial": f"s{i}", "code": str(i % 2)} for i in range(6)]
    data = write_csv(tmp_path / "waves" / "a.csv", rows)
    assert draft_and_load(data).respondent_id == "serial"
    assert draft_and_load(data, id_column="serial").respondent_id == "serial"
    with pytest.raises(DataError) as info:
        draft_spec(data, id_column="nope")
    assert info.value.problems[0].rule == "missing-column"
    twice = write_csv(tmp_path / "waves" / "b.csv", rows + rows)
    with pytest.raises(DataError) as info:
        draft_spec(twice)
    assert info.value.problems[0].rule == "no-id-column"


def test_free_text_is_listed_not_drafted(tmp_path: Path) -> None:
    rows = [{"id": str(i), "comment": f"text number {i}", "odd": "x" if i else "1"} for i in range(30)]
    data = write_csv(tmp_path / "waves" / "a.csv", rows)
    text = draft_spec(data, spec_path=tmp_path / "draft.toml")
    assert "#   comment: text with 30 distinct values" in text
    study = draft_and_load(data)
    assert set(study.variables) == {"odd"}  # mixed text and numbers, few values: string codes
    assert study.variables["odd"].values == {"1": "1", "x": "x"}


def test_awkward_column_names_stay_valid_toml(tmp_path: Path) -> None:
    rows = [{"id": str(i), "Q1 \"best\" brand": str(i % 3), "naïve": f"{i * 1.5}"} for i in range(8)]
    data = write_csv(tmp_path / "waves" / "a.csv", rows)
    study = draft_and_load(data)
    assert set(study.variables) == {'Q1 "best" brand', "naïve"}
    assert check_wave(study, "W1") == []


def test_parquet_input(tmp_path: Path) -> None:
    path = tmp_path / "waves" / "a.parquet"
    path.parent.mkdir()
    pl.DataFrame({"id": ["a", "b", "c"], "score": [1, 2, 2], "spend": [0.5, 1.25, None]}).write_parquet(path)
    study = draft_and_load(path)
    assert (study.variables["score"].values, study.variables["spend"].type) == ({1: "1", 2: "2"}, "numeric")


_names = st.text(alphabet=string.ascii_lowercase, min_size=1, max_size=6)


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    columns=st.lists(
        st.one_of(
            st.lists(st.integers(-3, 30), min_size=6, max_size=6),
            st.lists(st.sampled_from(["a", "b b", "c", ""]), min_size=6, max_size=6),
            st.lists(st.floats(-1e6, 1e6, allow_nan=False).map(lambda x: f"{x:.3f}"), min_size=6, max_size=6),
        ),
        min_size=1,
        max_size=5,
    ),
    names=st.lists(_names, min_size=5, max_size=5, unique=True),
)
def test_any_draft_loads_and_accepts_its_file(tmp_path: Path, columns: list[list], names: list[str]) -> None:
    """Property: whatever the columns, the draft is a valid spec and its own file has no errors."""
    rows = [{"rid": f"r{i}", **{f"{names[j]}_{j}": str(col[i]) for j, col in enumerate(columns)}} for i in range(6)]
    folder = tmp_path / str(abs(hash((str(columns), str(names)))))
    data = write_csv(folder / "waves" / "a.csv", rows)
    study = draft_and_load(data)
    assert [p for p in check_wave(study, "W1") if p.severity == "error"] == []


def test_init_command_refuses_to_overwrite(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = write_csv(tmp_path / "waves" / "wave1.csv", tracker_rows(12))
    out = tmp_path / "study.toml"
    assert main(["init", str(data), "--out", str(out)]) == 0
    assert "review the lines marked REVIEW" in capsys.readouterr().out
    out.write_text("# edited by hand\n", encoding="utf-8")
    assert main(["init", str(data), "--out", str(out)]) == 1
    assert "[output-exists]" in capsys.readouterr().err
    assert out.read_text(encoding="utf-8") == "# edited by hand\n"
    assert main(["init", str(data), "--out", str(out), "--force", "--id", "resp_id"]) == 0
    assert main(["check", str(out)]) == 0
    assert list(tmp_path.glob(".study.toml.*")) == []  # no temp file left behind


def test_reserved_column_names_are_left_out(tmp_path: Path) -> None:
    rows = [{"id": str(i), "wave": "1", "score": str(i % 2)} for i in range(4)]
    data = write_csv(tmp_path / "waves" / "a.csv", rows)
    text = draft_spec(data, spec_path=tmp_path / "draft.toml")
    assert "#   wave: a name wavebook reserves for itself" in text
    assert set(draft_and_load(data).variables) == {"score"}
