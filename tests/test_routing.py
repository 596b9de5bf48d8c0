"""Routed questions (asked_if): "Not asked" out of every base, its own row, the routing check."""

from __future__ import annotations

import re
from pathlib import Path

import polars as pl
import pytest

from conftest import TRACKER_SPEC, Tracker, tracker_rows
from pipeline.errors import SpecError
from pipeline.runner import run_study
from pipeline.staging.database import load_responses, open_database
from pipeline.staging.stage import check_wave, stage_wave
from pipeline.tables.topline import unweighted_toplines

ROUTED_SPEC = TRACKER_SPEC.replace(
    'minimum = 0\nmaximum = 5000\n', 'minimum = 0\nmaximum = 5000\nasked_if = "age_band != 3"\n'
).replace(
    'items = { aware_kestrel = "Kestrel", aware_lumen = "Lumen" }\n',
    'items = { aware_kestrel = "Kestrel", aware_lumen = "Lumen" }\nasked_if = "channel == \'shop\'"\n',
)


def _clean_rows(n: int, prefix: str) -> list[dict[str, str]]:
    """Tracker rows whose routed answers follow the filters (blank where not asked)."""
    rows = tracker_rows(n, prefix=prefix)
    for row in rows:
        if row["age_band"] == "3":
            row["spend"] = ""
        if row["channel"] != "shop":
            row["aware_kestrel"] = row["aware_lumen"] = ""
    return rows


@pytest.fixture
def routed(tmp_path: Path) -> Tracker:
    t = Tracker(tmp_path, ROUTED_SPEC)
    t.write_wave("wave1.csv", _clean_rows(30, "a"))
    t.write_wave("wave2.csv", _clean_rows(24, "b"))
    return t


def _raw(t: Tracker, name: str) -> pl.DataFrame:
    return pl.read_csv(t.folder / "waves" / name, infer_schema=False).with_columns(
        pl.col(c).cast(pl.Int64, strict=False) for c in ("age_band", "aware_kestrel", "aware_lumen")
    ).with_columns(pl.col("spend").cast(pl.Float64, strict=False))


def _row(cells: pl.DataFrame, wave: str, variable: str, kind: str) -> dict:
    return cells.filter(
        (pl.col("wave") == wave) & (pl.col("variable") == variable) & (pl.col("row_kind") == kind)
    ).row(0, named=True)


def test_not_asked_is_its_own_row_and_out_of_every_base(routed: Tracker) -> None:
    study = routed.study()
    for wave in ("W1", "W2"):
        stage_wave(study, wave, quiet=True)
    con = open_database(study, read_only=True)
    try:
        cells = unweighted_toplines(con, study)
    finally:
        con.close()
    for wave, name in (("W1", "wave1.csv"), ("W2", "wave2.csv")):
        raw = _raw(routed, name)
        asked = raw.filter(pl.col("age_band") != 3)
        assert _row(cells, wave, "spend", "base")["count"] == asked["spend"].is_not_null().sum()
        assert _row(cells, wave, "spend", "missing")["count"] == asked["spend"].is_null().sum()
        assert _row(cells, wave, "spend", "missing")["base"] == asked.height
        not_asked = _row(cells, wave, "spend", "not-asked")
        assert (not_asked["count"], not_asked["base"], not_asked["row_label"]) == (
            raw.height - asked.height, raw.height, "Not asked")
        shop = raw.filter(pl.col("channel") == "shop")
        assert _row(cells, wave, "aware", "base")["count"] == shop.height
        assert _row(cells, wave, "aware", "not-asked")["count"] == raw.height - shop.height


def test_answers_of_respondents_routed_past_are_masked_and_warned_with_ids(routed: Tracker) -> None:
    rows = _clean_rows(30, "a")
    wrong = [r for r in rows if r["age_band"] == "3"][:3]
    for r in wrong:
        r["spend"] = "40"
    routed.write_wave("wave1.csv", rows)
    study = routed.study()
    problems = [p for p in check_wave(study, "W1") if p.rule == "answered-not-asked"]
    assert len(problems) == 1 and problems[0].severity == "warning"
    assert problems[0].count == 3 and problems[0].column == "spend"
    assert list(problems[0].examples) == sorted(r["resp_id"] for r in wrong)
    stage_wave(study, "W1", quiet=True)
    con = open_database(study, read_only=True)
    try:
        responses = load_responses(con, study, ["W1"])
        cells = unweighted_toplines(con, study)
    finally:
        con.close()
    masked = responses.filter(pl.col("respondent_id").is_in([r["resp_id"] for r in wrong]))
    assert masked["spend"].null_count() == 3 and not masked["__asked__spend"].any()
    raw = _raw(routed, "wave1.csv")
    assert _row(cells, "W1", "spend", "base")["count"] == raw.filter(
        (pl.col("age_band") != 3) & pl.col("spend").is_not_null()).height


def test_weighted_book_shows_not_asked_rows_and_estimates_on_those_asked(routed: Tracker) -> None:
    book = run_study(routed.spec_path, quiet=True)
    html = book.read_text(encoding="utf-8")
    assert html.count('<tr class="row-not-asked">') == 2  # spend and aware
    study = routed.study()
    con = open_database(study, read_only=True)
    try:
        weights = con.sql("select respondent_id, weight from weights where wave = 'W1'").pl()
    finally:
        con.close()
    raw = _raw(routed, "wave1.csv").rename({"resp_id": "respondent_id"}).join(weights, on="respondent_id")
    asked = raw.filter(pl.col("age_band") != 3)
    not_asked_share = 100 * raw.filter(pl.col("age_band") == 3)["weight"].sum() / raw["weight"].sum()
    mean = asked.filter(pl.col("spend").is_not_null()).select(
        (pl.col("weight") * pl.col("spend")).sum() / pl.col("weight").sum()).item()
    assert re.search(rf">{round(not_asked_share)}%<", html)
    assert f"{mean:,.2f}" in html


@pytest.mark.parametrize(
    ("asked_if", "fragment"),
    [
        ("age_band = 3", "use == to compare\n    age_band = 3\n             ^"),
        ("age_band == 7", "7 is not a code of 'age_band'"),
        ("spend > 0", "'spend' cannot be filtered on its own answers"),
        ("mood == 1", "'mood' is not a codebook variable"),
    ],
)
def test_bad_asked_if_is_a_spec_error_with_a_caret(tmp_path: Path, asked_if: str, fragment: str) -> None:
    spec = TRACKER_SPEC.replace('minimum = 0\nmaximum = 5000\n', f'minimum = 0\nmaximum = 5000\nasked_if = "{asked_if}"\n')
    with pytest.raises(SpecError) as exc:
        Tracker(tmp_path, spec).study()
    assert [p.rule for p in exc.value.problems] == ["bad-condition"]
    assert exc.value.problems[0].message.startswith("variables.spend.asked_if: ")
    assert fragment in exc.value.problems[0].message
