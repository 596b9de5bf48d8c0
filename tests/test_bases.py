"""exclude_from_base: don't-know codes shown as their own rows, outside the base; base labels."""

from __future__ import annotations

from pathlib import Path

import polars as pl
import pytest

from conftest import TRACKER_SPEC, Tracker, tracker_rows
from pipeline.errors import SpecError
from pipeline.runner import variance_options, weigh_and_estimate
from pipeline.staging.database import open_database
from pipeline.staging.stage import stage_wave
from pipeline.tables.topline import unweighted_toplines

SPEC = TRACKER_SPEC.replace("exclude_from_statistics = [99]", "exclude_from_base = [99]")


@pytest.fixture
def cells(tmp_path: Path) -> pl.DataFrame:
    t = Tracker(tmp_path, SPEC)
    t.write_wave("wave1.csv", tracker_rows(36, prefix="a"))
    t.write_wave("wave2.csv", tracker_rows(30, prefix="b"))
    study = t.study()
    for wave in ("W1", "W2"):
        stage_wave(study, wave, quiet=True)
    con = open_database(study, read_only=True)
    try:
        toplines = unweighted_toplines(con, study)
    finally:
        con.close()
    estimated, *_ = weigh_and_estimate(study, toplines, variance_options(study), quiet=True)
    return estimated


def _satisfaction() -> pl.DataFrame:
    return pl.DataFrame(tracker_rows(36, prefix="a")).with_columns(
        pl.col("satisfaction").cast(pl.Int64), w=1.0 / pl.col("p_select").cast(pl.Float64)
    )


def test_dont_know_is_its_own_row_outside_the_base(cells: pl.DataFrame) -> None:
    w1 = cells.filter((pl.col("wave") == "W1") & (pl.col("variable") == "satisfaction"))
    data = _satisfaction()
    answering = data.filter(pl.col("satisfaction") != 99)
    base = w1.filter(pl.col("row_kind") == "base").row(0, named=True)
    assert (base["row_label"], base["count"]) == ("Base: excluding don't know", answering.height)
    nine = w1.filter(pl.col("code") == "9").row(0, named=True)
    assert nine["base"] == answering.height
    assert nine["percent"] == pytest.approx(100 * (answering["satisfaction"] == 9).sum() / answering.height)
    share = answering.select((pl.col("w") * (pl.col("satisfaction") == 9)).sum() / pl.col("w").sum()).item()
    assert nine["estimate"] == pytest.approx(100 * share, rel=1e-10)  # weighted share of those in the base
    dont_know = w1.filter(pl.col("row_kind") == "excluded").row(0, named=True)
    assert (dont_know["row_label"], dont_know["count"], dont_know["base"]) == (
        "Don't know", (data["satisfaction"] == 99).sum(), data.height)
    mean = w1.filter(pl.col("code") == "mean").row(0, named=True)
    assert mean["value"] == pytest.approx(answering["satisfaction"].mean())
    assert set(w1.filter(pl.col("row_kind") == "category")["code"]) == {str(c) for c in range(11)}


def test_base_labels_say_which_base(cells: pl.DataFrame) -> None:
    labels = dict(cells.filter((pl.col("wave") == "W1") & (pl.col("row_kind") == "base"))
                  .select("variable", "row_label").iter_rows())
    assert labels["aware"] == "Base: all asked"
    assert labels["channel"] == "Base: all giving an answer"
    assert labels["satisfaction"] == "Base: excluding don't know"


def test_a_net_cannot_count_a_code_outside_the_base(tmp_path: Path) -> None:
    spec = SPEC.replace('nets = { "Top two box (9-10)" = [9, 10] }', 'nets = { "Top or unsure" = [10, 99] }')
    with pytest.raises(SpecError) as exc:
        Tracker(tmp_path, spec).study()
    assert "variables.satisfaction.nets.Top or unsure: code 99 is excluded from the base" in exc.value.render()
