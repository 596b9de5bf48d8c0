"""Staging checks: each rule meets a deliberately broken wave file and names file, column, value,
row count and example ids; every problem of a file is reported at once."""

from __future__ import annotations

from pathlib import Path

import pytest

from conftest import TRACKER_COLUMNS, TRACKER_SPEC, Tracker, tracker_rows
from pipeline.cli import main
from pipeline.errors import Problem
from pipeline.staging.checks import DRIFT_CODE_MIN_SHARE, DRIFT_SHARE_THRESHOLD, MAX_PROBLEMS_PER_COLUMN
from pipeline.staging.stage import check_wave, stage_wave


def check_rows(tracker: Tracker, rows: list[dict[str, str]], columns: list[str] | None = None) -> list[Problem]:
    path = tracker.write_wave("wave1.csv", rows, columns)
    problems = check_wave(tracker.study(), "W1")
    assert all(p.file == str(path.resolve()) for p in problems)
    return problems


def only(problems: list[Problem], rule: str) -> list[Problem]:
    return [p for p in problems if p.rule == rule]


def test_clean_wave_has_no_problems(tracker: Tracker) -> None:
    assert check_wave(tracker.study(), "W1") == []


def test_duplicate_ids(tracker: Tracker) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[1]["resp_id"] = rows[2]["resp_id"] = "a001"
    rows[5]["resp_id"] = "a005"
    (problem,) = check_rows(tracker, rows)
    assert problem.rule == "duplicate-id" and problem.severity == "error"
    assert problem.column == "resp_id"
    assert problem.count == 5  # a001 on 3 rows, a005 on 2 rows
    assert problem.examples == ("a001", "a005")
    assert problem.message.startswith("2 respondent ids appear on more than one row")


def test_missing_ids_give_row_numbers(tracker: Tracker) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[3]["resp_id"] = ""
    rows[6]["resp_id"] = "  "
    (problem,) = check_rows(tracker, rows)
    assert problem.rule == "missing-id" and problem.count == 2
    assert problem.examples == ("row 4", "row 7")


def test_codes_outside_the_codebook(tracker: Tracker) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[0]["age_band"] = "4"
    rows[7]["age_band"] = "4.0"  # same code in another spelling
    rows[1]["age_band"] = "2.0"  # valid: integer codes compare in integer form
    rows[2]["age_band"] = " 3 "  # valid after trimming
    rows[3]["age_band"] = "2.5"
    rows[4]["channel"] = "post"
    rows[5]["channel"] = "Shop"  # string codes are exact
    rows[6]["satisfaction"] = "8"  # valid: unlabelled integer inside the scale
    rows[8]["satisfaction"] = "11"
    problems = check_rows(tracker, rows)
    assert all(p.rule == "code-outside-codebook" for p in problems)
    found = {(p.column, p.value): (p.count, p.examples) for p in problems}
    assert found == {
        ("age_band", "4"): (2, ("a001", "a008")),
        ("age_band", "2.5"): (1, ("a004",)),
        ("channel", "Shop"): (1, ("a006",)),
        ("channel", "post"): (1, ("a005",)),
        ("satisfaction", "11"): (1, ("a009",)),
    }
    message = next(p.message for p in problems if p.value == "11")
    assert "valid: 0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 99" in message


def test_non_numbers(tracker: Tracker) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[0]["spend"] = "12,5"
    rows[1]["spend"] = "abc"
    rows[2]["spend"] = "abc"
    rows[3]["satisfaction"] = "ten"
    rows[4]["p_select"] = "n/a"
    rows[5]["spend"] = "inf"
    problems = check_rows(tracker, rows)
    assert {p.rule for p in problems} == {"not-a-number"}
    found = {(p.column, p.value): (p.count, p.examples) for p in problems}
    assert found == {
        ("spend", "12,5"): (1, ("a001",)),
        ("spend", "abc"): (2, ("a002", "a003")),
        ("spend", "inf"): (1, ("a006",)),
        ("satisfaction", "ten"): (1, ("a004",)),
        ("p_select", "n/a"): (1, ("a005",)),
    }
    assert next(p for p in problems if p.column == "p_select").message == (
        "'n/a' is not a number; design.selection_probability holds numbers"
    )


def test_multi_items_hold_zero_or_one(tracker: Tracker) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[0]["aware_lumen"] = "2"
    rows[1]["aware_lumen"] = "yes"
    rows[2]["aware_kestrel"] = "1.0"  # valid
    rows[3]["aware_kestrel"] = ""  # valid: not asked
    problems = check_rows(tracker, rows)
    assert {(p.rule, p.column, p.value, p.count, p.examples) for p in problems} == {
        ("multi-not-binary", "aware_lumen", "2", 1, ("a001",)),
        ("multi-not-binary", "aware_lumen", "yes", 1, ("a002",)),
    }
    assert "multi-response set 'aware'" in problems[0].message


def test_numeric_bounds(tracker: Tracker) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[0]["spend"] = "-5"
    rows[1]["spend"] = "6000"
    rows[2]["spend"] = "7000.5"
    rows[3]["spend"] = "5000"  # on the bound: valid
    problems = check_rows(tracker, rows)
    assert {(p.rule, p.value, p.count, p.examples) for p in problems} == {
        ("out-of-bounds", "below", 1, ("a001",)),
        ("out-of-bounds", "above", 2, ("a002", "a003")),
    }
    above = next(p for p in problems if p.value == "above")
    assert above.message == "2 values above the declared maximum 5000 (variables.spend.maximum); highest 7000.5"


def test_missing_design_values(tracker: Tracker) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[2]["area"] = ""
    rows[9]["area"] = ""
    rows[4]["p_select"] = ""
    problems = check_rows(tracker, rows)
    assert {(p.rule, p.column, p.count, p.examples) for p in problems} == {
        ("missing-design-value", "area", 2, ("a003", "a010")),
        ("missing-design-value", "p_select", 1, ("a005",)),
    }
    assert next(p for p in problems if p.column == "area").message.startswith("2 rows have no design.psu value")


def test_missing_stratum_is_a_design_problem(tracker: Tracker) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[0]["region"] = ""
    (problem,) = check_rows(tracker, rows)
    assert (problem.rule, problem.column, problem.examples) == ("missing-design-value", "region", ("a001",))


def test_selection_probabilities_in_unit_interval(tracker: Tracker) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[0]["p_select"] = "0"
    rows[1]["p_select"] = "1.5"
    rows[2]["p_select"] = "1"  # valid: a certainty selection
    (problem,) = check_rows(tracker, rows)
    assert (problem.rule, problem.column, problem.count, problem.examples) == (
        "bad-design-weight",
        "p_select",
        2,
        ("a001", "a002"),
    )
    assert problem.message == "selection probabilities must be in (0, 1] (lowest 0.0, highest 1.5)"


def test_base_weights_positive(tmp_path: Path) -> None:
    tracker = Tracker(tmp_path, TRACKER_SPEC.replace('selection_probability = "p_select"', 'base_weight = "p_select"'))
    rows = tracker_rows(12, prefix="a")
    rows[3]["p_select"] = "-2"
    (problem,) = check_rows(tracker, rows)
    assert (problem.rule, problem.count, problem.examples) == ("bad-design-weight", 1, ("a004",))
    assert problem.message.startswith("base weights must be positive")


def test_unique_psu_ids_in_one_stratum(tmp_path: Path) -> None:
    tracker = Tracker(tmp_path, TRACKER_SPEC.replace('psu_ids = "within-stratum"', 'psu_ids = "unique"'))
    rows = tracker_rows(12, prefix="a")  # areas 1 and 2 both occur in regions 1 and 2
    (problem,) = check_rows(tracker, rows)
    assert problem.rule == "psu-in-several-strata"
    assert (problem.column, problem.value, problem.count) == ("area", "1", 12)
    assert problem.message.startswith("2 PSU id(s) appear in more than one stratum")


def test_stratum_without_population(tmp_path: Path) -> None:
    tracker = Tracker(tmp_path, TRACKER_SPEC.replace("population = { 1 = 220, 2 = 180 }", "population = { 1 = 220 }"))
    rows = tracker_rows(12, prefix="a")
    (problem,) = check_rows(tracker, rows)
    assert (problem.rule, problem.column, problem.value, problem.count) == ("stratum-without-population", "region", "2", 6)
    assert problem.examples == ("a002", "a004", "a006", "a008", "a010")


def test_population_smaller_than_sample(tmp_path: Path) -> None:
    tracker = Tracker(tmp_path, TRACKER_SPEC.replace("population = { 1 = 220, 2 = 180 }", "population = { 1 = 1, 2 = 180 }"))
    (problem,) = check_rows(tracker, tracker_rows(12, prefix="a"))
    assert (problem.rule, problem.value, problem.count) == ("population-too-small", "1", None)
    assert problem.message == "stratum '1' has 2 sampled PSUs but design.population gives 1"


def test_missing_and_extra_columns(tracker: Tracker) -> None:
    columns = [c for c in TRACKER_COLUMNS if c not in ("spend", "aware_lumen")] + ["comments"]
    problems = check_rows(tracker, tracker_rows(12, prefix="a"), columns)
    missing = sorted((p.column, p.message) for p in only(problems, "missing-column"))
    assert missing == [
        ("aware_lumen", "column 'aware_lumen' (declared at variables.aware.items) is not in the file"),
        ("spend", "column 'spend' (declared at variables.spend) is not in the file"),
    ]
    (extra,) = only(problems, "extra-column")
    assert extra.severity == "warning"
    assert extra.message.endswith("1 column in the file is not in the spec and will not be staged: comments")
    assert len(problems) == 3


def test_empty_file(tracker: Tracker) -> None:
    (problem,) = check_rows(tracker, [], TRACKER_COLUMNS)
    assert (problem.rule, problem.count) == ("empty-file", 0)


def test_missing_file(tracker: Tracker) -> None:
    (tracker.folder / "waves" / "wave1.csv").unlink()
    (problem,) = check_wave(tracker.study(), "W1")
    assert problem.rule == "missing-file" and problem.file.endswith("wave1.csv")


def test_three_problems_reported_at_once(tracker: Tracker) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[1]["resp_id"] = "a001"
    rows[2]["age_band"] = "7"
    rows[3]["spend"] = "lots"
    problems = check_rows(tracker, rows)
    assert sorted(p.rule for p in problems) == ["code-outside-codebook", "duplicate-id", "not-a-number"]


def test_many_bad_values_are_capped_per_column(tracker: Tracker) -> None:
    rows = tracker_rows(30, prefix="a")
    for i, row in enumerate(rows[:15]):
        row["age_band"] = str(100 + i)
    rows[0]["age_band"] = rows[1]["age_band"] = "100"
    problems = check_rows(tracker, rows)
    assert len(problems) == MAX_PROBLEMS_PER_COLUMN + 1
    assert problems[0].value == "100" and problems[0].count == 2  # the most frequent first
    summary = problems[-1]
    assert summary.message == "and 4 more distinct values breaking the same rule" and summary.count == 4


def test_drift_against_earlier_wave(tracker: Tracker) -> None:
    study = tracker.study()
    stage_wave(study, "W1", quiet=True)
    rows = tracker_rows(12, prefix="b")
    for row in rows:
        row["channel"] = "shop"  # W1: half shop, half web
        row["age_band"] = "1" if row["age_band"] == "3" else row["age_band"]  # code 3 disappears
    rows[0]["satisfaction"] = "8"  # never answered in W1
    tracker.write_wave("wave2.csv", rows)
    problems = check_wave(study, "W2")
    assert all(p.severity == "warning" for p in problems)
    found = {(p.rule, p.column, p.value) for p in problems}
    assert ("code-gone", "age_band", "3") in found
    assert ("code-new", "satisfaction", "8") in found
    assert ("share-shift", "channel", "shop") in found and ("share-shift", "channel", "web") in found
    web = next(p for p in problems if p.rule == "share-shift" and p.value == "web")
    assert web.message.endswith("50.0% in W1, 0.0% now")
    # age band 1 went from 4/12 to 8/12 (33.3 points > the 15-point threshold); age band 2 stayed at 4/12
    assert DRIFT_SHARE_THRESHOLD < 1 / 3
    assert ("share-shift", "age_band", "1") in found and ("share-shift", "age_band", "2") not in found


def test_drift_ignores_later_waves(tracker: Tracker) -> None:
    study = tracker.study()
    rows = tracker_rows(12, prefix="b")
    for row in rows:
        row["channel"] = "shop"
    tracker.write_wave("wave2.csv", rows)
    stage_wave(study, "W2", quiet=True)
    assert check_wave(study, "W1") == []  # W1 comes before W2: nothing earlier to compare with


def test_check_command_prints_every_problem_and_fails(tracker: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    rows = tracker_rows(12, prefix="a")
    rows[1]["resp_id"] = "a001"
    rows[2]["age_band"] = "7"
    tracker.write_wave("wave1.csv", rows)
    assert main(["check", str(tracker.spec_path), "--wave", "W1"]) == 1
    out = capsys.readouterr().out
    assert "[duplicate-id]" in out and "[code-outside-codebook]" in out
    assert out.strip().endswith("W1: 2 errors, 0 warnings")
    assert not tracker.study().database_path.exists()  # check writes nothing
    assert main(["check", str(tracker.spec_path), "--wave", "W2"]) == 0


def test_rare_codes_coming_and_going_are_not_drift(tracker: Tracker) -> None:
    study = tracker.study()
    rows = tracker_rows(300, prefix="a")
    for row in rows:
        row["satisfaction"] = "5" if row["satisfaction"] == "8" else row["satisfaction"]
    rows[0]["satisfaction"] = "8"  # 1 of 300 = 0.3% < DRIFT_CODE_MIN_SHARE
    tracker.write_wave("wave1.csv", rows)
    stage_wave(study, "W1", quiet=True)
    later = tracker_rows(300, prefix="b")
    later[0]["satisfaction"] = "3"  # new, but 0.3% of the answers
    tracker.write_wave("wave2.csv", later)
    found = {(p.rule, p.value) for p in check_wave(study, "W2")}
    assert ("code-gone", "8") not in found and ("code-new", "3") not in found
    assert DRIFT_CODE_MIN_SHARE == pytest.approx(0.01)
