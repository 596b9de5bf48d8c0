"""Issue 8, items 7, 9 and 10: malformed wave and targets files are named errors with their
line, never a silently wrong reading nor a library traceback.
"""

from __future__ import annotations

import pytest
from conftest import TRACKER_COLUMNS, TRACKER_SPEC, Tracker, tracker_rows
from safety_support import AGE_TARGETS, RAKE_STEP, fingerprint, wavebook

from pipeline.errors import DataError
from pipeline.staging.stage import check_wave


def _wave_text(rows: int = 6) -> str:
    lines = [",".join(TRACKER_COLUMNS)]
    lines += [",".join(row[c] for c in TRACKER_COLUMNS) for row in tracker_rows(rows)]
    return "\n".join(lines) + "\n"


def _problems(tracker: Tracker, text: bytes | str) -> list:
    path = tracker.folder / "waves" / "wave1.csv"
    path.write_bytes(text if isinstance(text, bytes) else text.encode("utf-8"))
    return check_wave(tracker.study(), "W1")


def test_duplicate_column_names_are_an_error_with_their_positions(tracker: Tracker) -> None:
    header = ",".join(TRACKER_COLUMNS) + ",channel"
    body = _wave_text().split("\n", 1)[1].replace("\n", ",web\n")
    problems = _problems(tracker, header + "\n" + body)
    assert [(p.rule, p.column, p.line) for p in problems] == [("duplicate-column", "channel", 1)]
    assert f"positions {TRACKER_COLUMNS.index('channel') + 1}, {len(TRACKER_COLUMNS) + 1}" in problems[0].message
    assert "channel_1" not in problems[0].render()


def test_an_extra_field_early_is_a_ragged_row(tracker: Tracker) -> None:
    lines = _wave_text().splitlines()
    lines[2] += ",surplus"
    problems = _problems(tracker, "\n".join(lines) + "\n")
    assert [(p.rule, p.line) for p in problems] == [("ragged-row", 3)]
    assert f"{len(TRACKER_COLUMNS) + 1} fields but the header has {len(TRACKER_COLUMNS)}" in problems[0].message


def test_a_summary_line_is_a_ragged_row(tracker: Tracker) -> None:
    problems = _problems(tracker, _wave_text(6) + "Total,,,,\n")
    assert [(p.rule, p.line, p.value) for p in problems] == [("ragged-row", 8, "Total,,,,")]
    rendered = problems[0].render()
    assert "read_csv" not in rendered and "strict_mode" not in rendered  # no internal SQL or reader settings


def test_every_ragged_row_is_listed_at_once(tracker: Tracker) -> None:
    lines = _wave_text(8).splitlines()
    lines[2] += ",x"
    lines[5] = lines[5].rsplit(",", 1)[0]
    problems = _problems(tracker, "\n".join(lines) + "\n")
    assert [(p.rule, p.line) for p in problems] == [("ragged-row", 3), ("ragged-row", 6)]


def test_bytes_that_are_not_utf8_name_their_line(tracker: Tracker) -> None:
    text = _wave_text(6).encode("utf-8").replace(b"shop", b"sh\xe9p", 1)
    line = text[: text.index(b"\xe9")].count(b"\n") + 1
    problems = _problems(tracker, text)
    assert [(p.rule, p.line) for p in problems] == [("not-utf8", line)]
    assert "must be saved as UTF-8" in problems[0].message


def test_an_empty_file_is_one_error(tracker: Tracker) -> None:
    problems = _problems(tracker, "")
    assert [p.rule for p in problems] == ["empty-file"]
    assert "column0" not in problems[0].render()


def test_stage_of_a_ragged_file_changes_nothing(tracker: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    assert wavebook(["stage", str(tracker.spec_path), "--quiet"], capsys)[0] == 0
    (tracker.folder / "waves" / "wave1.csv").write_text(_wave_text(6) + "Total,,,,\n", encoding="utf-8")
    before = fingerprint(tracker.folder)
    code, _, err = wavebook(["stage", str(tracker.spec_path), "--wave", "W1", "--quiet"], capsys)
    assert (code, "[ragged-row]" in err, "line 8" in err) == (1, True, True)
    assert fingerprint(tracker.folder) == before


MALFORMED_TARGETS = [
    ("ragged", AGE_TARGETS + "age_band,4,0.1,extra\n", "[ragged-row]", 5),
    ("empty", "", "is empty", 1),
    ("semicolons", AGE_TARGETS.replace(",", ";"), "semicolons", 1),
    ("empty target", AGE_TARGETS.replace("0.4", ""), "is empty", 4),
    ("not a number", AGE_TARGETS.replace("0.4", "forty"), "'forty' is not a number", 4),
    ("not UTF-8", AGE_TARGETS.replace("0.4", "0.4\u00e9").encode("latin-1"), "not UTF-8", 4),
]


@pytest.mark.parametrize(("case", "content", "message", "line"), MALFORMED_TARGETS, ids=[c[0] for c in MALFORMED_TARGETS])
def test_malformed_targets_file_is_a_named_error_with_its_line(
    tracker: Tracker, capsys: pytest.CaptureFixture[str], case: str, content: str | bytes, message: str, line: int
) -> None:
    tracker.write_spec(TRACKER_SPEC + RAKE_STEP)
    targets = tracker.folder / "targets.csv"
    targets.write_bytes(content if isinstance(content, bytes) else content.encode("utf-8"))
    for argv in (["check", str(tracker.spec_path)], ["rake", str(tracker.folder / "waves" / "wave1.csv"), "--targets", str(targets)]):
        code, _, err = wavebook(argv, capsys)
        assert code == 1, (argv[0], err)
        assert message in err and f"line {line}" in err, (argv[0], err)
        assert "Traceback" not in err and "None" not in err


def test_read_raw_refuses_duplicates_before_reading(tracker: Tracker) -> None:
    import duckdb

    from pipeline.staging.readers import read_raw

    path = tracker.folder / "dup.csv"
    path.write_text("id,a,a,b,b\n1,2,3,4,5\n", encoding="utf-8")
    con = duckdb.connect()
    with pytest.raises(DataError) as info:
        read_raw(con, path, "raw")
    assert [(p.column, p.line) for p in info.value.problems] == [("a", 1), ("b", 1)]
