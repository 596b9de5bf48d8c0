"""Derived variables ([derived.<name>] with `when` conditions): computed at staging, checked for overlaps."""

from __future__ import annotations

from pathlib import Path

import polars as pl
import pytest

from conftest import TRACKER_SPEC, Tracker, tracker_rows
from pipeline.errors import DataError, SpecError
from pipeline.runner import stage_reasons
from pipeline.staging.database import load_responses, open_database
from pipeline.staging.stage import check_wave, stage_wave
from pipeline.tables.topline import unweighted_toplines

DERIVED = '''
[derived.young_shopper]
label = "Young in-shop buyer"
type = "single"
values = { 1 = "Yes", 2 = "No" }
when = { 1 = "age_band in [1, 2] and channel == 'shop'", 2 = "not (age_band in [1, 2] and channel == 'shop')" }
'''


@pytest.fixture
def derived(tmp_path: Path) -> Tracker:
    t = Tracker(tmp_path, TRACKER_SPEC + DERIVED)
    t.write_wave("wave1.csv", tracker_rows(36, prefix="a"))
    t.write_wave("wave2.csv", tracker_rows(24, prefix="b"))
    return t


def test_derived_codes_equal_a_direct_computation(derived: Tracker) -> None:
    study = derived.study()
    assert study.variables["young_shopper"].derived
    assert [p for p in check_wave(study, "W1") if p.severity == "error"] == []
    stage_wave(study, "W1", quiet=True)
    con = open_database(study, read_only=True)
    try:
        responses = load_responses(con, study, ["W1"])
        cells = unweighted_toplines(con, study)
    finally:
        con.close()
    raw = pl.DataFrame(tracker_rows(36, prefix="a"))
    young = raw.select(
        pl.when(pl.col("age_band").is_in(["1", "2"]) & (pl.col("channel") == "shop")).then(1).otherwise(2).alias("y")
    )["y"]
    assert responses.sort("respondent_id")["young_shopper"].to_list() == young.to_list()
    table = cells.filter((pl.col("variable") == "young_shopper") & (pl.col("row_kind") == "category"))
    assert dict(table.select("code", "count").iter_rows()) == {"1": (young == 1).sum(), "2": (young == 2).sum()}


def test_a_respondent_matching_two_conditions_is_a_check_error(derived: Tracker) -> None:
    derived.write_spec(TRACKER_SPEC + DERIVED.replace(
        "2 = \"not (age_band in [1, 2] and channel == 'shop')\"", "2 = \"age_band in [1, 3]\""))
    study = derived.study()
    problems = [p for p in check_wave(study, "W1") if p.rule == "derived-overlap"]
    raw = pl.DataFrame(tracker_rows(36, prefix="a"))
    both = raw.filter(pl.col("age_band").is_in(["1", "2"]) & (pl.col("channel") == "shop")
                      & pl.col("age_band").is_in(["1", "3"]))
    assert len(problems) == 1 and problems[0].severity == "error" and problems[0].count == both.height
    assert list(problems[0].examples) == sorted(both["resp_id"].to_list())[:5]
    with pytest.raises(DataError):
        stage_wave(study, "W1", quiet=True)


@pytest.mark.parametrize(
    ("old", "new", "fragment"),
    [
        ("channel == 'shop')\"", "chanel == 'shop')\"", "derived.young_shopper.when.2: 'chanel' is not a codebook variable"),
        ('2 = "not', '3 = "not', "derived.young_shopper.when.3: code 3 is not a valid code"),
        ("[derived.young_shopper]", "[derived.channel]", "'channel' is already a codebook variable"),
        ('type = "single"\nvalues = { 1 = "Yes"', 'type = "multi"\nvalues = { 1 = "Yes"', "a derived variable is single-choice"),
    ],
)
def test_bad_derived_variables_are_spec_errors(tmp_path: Path, old: str, new: str, fragment: str) -> None:
    assert old in DERIVED
    with pytest.raises(SpecError) as exc:
        Tracker(tmp_path, TRACKER_SPEC + DERIVED.replace(old, new)).study()
    assert fragment in exc.value.render()


def test_changing_a_condition_restages(derived: Tracker) -> None:
    study = derived.study()
    for wave in ("W1", "W2"):
        stage_wave(study, wave, quiet=True)
    assert stage_reasons(study) == {}
    derived.write_spec(TRACKER_SPEC + DERIVED.replace("age_band in [1, 2]", "age_band in [1]"))
    assert set(stage_reasons(derived.study())) == {"W1", "W2"}
