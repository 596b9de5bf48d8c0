"""The demo study's banner tables: its Total column is the weighted topline; suppressed cells hold no number."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import polars as pl
import polars.testing
import pytest

from pipeline.staging.database import load_responses, open_database
from pipeline.estimation.options import VarianceOptions
from pipeline.runner import run_study
from pipeline.staging.spec import load_spec
from pipeline.staging.stage import stage_wave
from pipeline.tables import Tabulation, tables_spec
from pipeline.tables.exports import read_export
from pipeline.tables.topline import unweighted_toplines
from pipeline.tables.weighted_cells import wave_estimates
from pipeline.weighting.store import fit_wave

DEMO = Path(__file__).resolve().parents[1] / "sample_data"
NUMBERS = ["estimate", "se", "ci_low", "ci_high", "df", "deff", "base_unweighted", "base_weighted", "base_effective"]


@pytest.fixture(scope="module")
def demo_wave(tmp_path_factory):
    """Wave W1 of the demo: (banner tables result, weighted topline estimates)."""
    if not (DEMO / "study.toml").is_file():
        pytest.skip("sample_data/study.toml is absent")
    folder = tmp_path_factory.mktemp("demo") / "study"
    shutil.copytree(DEMO, folder, ignore=shutil.ignore_patterns("*.duckdb", "book"))
    study = load_spec(folder / "study.toml")
    stage_wave(study, "W1", quiet=True)
    con = open_database(study)
    try:
        layout = unweighted_toplines(con, study).filter(pl.col("wave") == "W1")
        recipe, _ = fit_wave(study, "W1", con=con)
        responses = load_responses(con, study, ["W1"])
    finally:
        con.close()
    options = VarianceOptions()
    tab = Tabulation(study, tables_spec(study), options)
    tab.add_wave("W1", responses, recipe, layout)
    topline = wave_estimates(responses, study, recipe, layout, options, wave="W1")
    jackknife = Tabulation(study, tables_spec(study), VarianceOptions(method="stratified-jackknife"))
    jackknife.add_wave("W1", responses, recipe, layout)
    return tab.finish(), topline, jackknife.finish()


def test_demo_declares_a_banner():
    spec = tables_spec(load_spec(DEMO / "study.toml"))
    assert spec is not None and spec.banner_of("satisfaction").breaks == ("sex", "age_band", "region")


def test_total_column_equals_the_weighted_topline(demo_wave):
    tables, topline, _ = demo_wave
    total = tables.cells.filter(pl.col("column") == "total").select(
        "variable", pl.col("row").alias("row_order"), "estimate", "se", "deff", "flags")
    joined = total.join(topline, on=["variable", "row_order"], suffix="_topline")
    assert joined.height == topline.height > 50
    shown = joined.filter(~pl.col("flags").str.contains("suppressed|empty"))
    np.testing.assert_allclose(shown["estimate"], shown["estimate_topline"], rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(shown["se"], shown["se_topline"], rtol=1e-8, atol=1e-10)


def test_multi_response_columns_may_add_past_100_percent(demo_wave):
    tables, _, _ = demo_wave
    items = tables.cells.filter((pl.col("variable") == "aware") & (pl.col("row_label") != "Any of these")
                                & (pl.col("row_label") != "Not asked") & (pl.col("column") == "total"))
    assert items["estimate"].sum() > 100


def test_with_calibration_taylor_and_the_stratified_jackknife_agree(demo_wave):
    """Raked weights, 1,578 respondents in 48 PSUs: the calibration-residual Taylor SEs and the jackknife
    SEs (raking replayed in every replicate) agree to first order (Wolter 2007, Introduction to Variance
    Estimation, 2nd ed., section 4.6, from memory). Tolerance: the median ratio within 10% and 90% of the
    cells within 25%, common practice for a sample of this size, no source."""
    taylor, _, jackknife = demo_wave
    keys = ["table", "row", "column"]
    cells = taylor.cells.join(jackknife.cells, on=keys, suffix="_jk").filter(
        (pl.col("se") > 0.05) & (pl.col("se_jk") > 0) & (pl.col("statistic") == "percent"))
    ratio = (cells["se_jk"] / cells["se"]).to_numpy()
    assert len(ratio) > 1000
    assert abs(np.median(ratio) - 1) < 0.10
    assert np.mean(np.abs(ratio - 1) < 0.25) > 0.90
    tests = taylor.tests.join(jackknife.tests, on=["comparison", "table", "row", "column_a", "column_b"],
                              suffix="_jk").filter(pl.col("comparison").is_in(["columns", "total"])
                                                   & (pl.col("se_difference") > 0.05))
    diff_ratio = (tests["se_difference_jk"] / tests["se_difference"]).to_numpy()
    assert len(diff_ratio) > 1000
    assert abs(np.nanmedian(diff_ratio) - 1) < 0.10


def test_demo_run_writes_exports_and_suppressed_cells_hold_no_number(tmp_path):
    """The demo's smallest columns have about 100 respondents, so this copy suppresses below 150."""
    folder = tmp_path / "study"
    shutil.copytree(DEMO, folder, ignore=shutil.ignore_patterns("*.duckdb", "book"))
    spec = folder / "study.toml"
    text = spec.read_text(encoding="utf-8")
    assert "suppress_below = 20" in text
    spec.write_text(text.replace("suppress_below = 20", "suppress_below = 150"), encoding="utf-8")
    book = run_study(folder / "study.toml", quiet=True, xlsx=True)
    stem = book.parent / book.stem
    export = read_export(Path(f"{stem}_cells.parquet"))
    cells = export.filter(pl.col("banner") != "total")
    tests = read_export(Path(f"{stem}_tests.parquet"))
    assert read_export(Path(f"{stem}_cells.csv")).height == export.height
    assert read_export(Path(f"{stem}_tests.csv")).height == tests.height
    assert not Path(f"{stem}_banner_cells.parquet").exists()
    for column in ("comparison", "wave", "table", "variable", "row", "banner", "column_a", "column_b", "difference",
                   "se_difference", "statistic", "df_num", "df_den", "p_value", "p_adjusted", "significant"):
        assert column in tests.columns
    hidden = export.filter(pl.col("flags").str.contains("suppressed"))
    assert hidden.height > 0 and set(hidden["banner"]) == {"default"}
    assert hidden.select(pl.sum_horizontal(pl.col(NUMBERS).is_not_null())).to_series().sum() == 0
    keys = hidden.select("wave", "table", "row", "banner", "column")
    for side in ("column_a", "column_b"):
        used = tests.join(keys, left_on=["wave", "table", "row", "banner", side],
                          right_on=["wave", "table", "row", "banner", "column"])
        assert used.height == 0
    assert "respondent_id" not in cells.columns and "resp_id" not in cells.columns
    assert set(cells["wave"]) == {"W1", "W2", "W3"}
    assert set(tests["comparison"]) >= {"columns", "total", "waves", "independence"}
    assert tests.filter(pl.col("comparison") == "columns")["p_value"].is_not_null().sum() > 100
    _check_workbook(Path(f"{stem}_tables.xlsx"), cells)


def test_demo_results_do_not_depend_on_the_batching_banner_cells_and_tests_included(tmp_path):
    """One variable per batch (a 1-byte budget: each stub's banner cells in a pass of their own) gives the
    cells and tests of one pass for everything, to 1e-12: every cell, test and variance reads only its own
    stub's quantities."""
    frames = []
    for name, budget in (("one", None), ("many", 1)):
        folder = tmp_path / name
        shutil.copytree(DEMO, folder, ignore=shutil.ignore_patterns("*.duckdb", "book"))
        book = run_study(folder / "study.toml", quiet=True, **({} if budget is None else {"memory_budget": budget}))
        frames.append([read_export(book.parent / f"{book.stem}_{kind}.parquet") for kind in ("cells", "tests")])
    key = ["comparison", "wave", "wave_b", "table", "row", "banner", "column_a", "column_b"]
    frames[0][1], frames[1][1] = (t.sort(key, nulls_last=True) for t in (frames[0][1], frames[1][1]))
    for one, many in zip(*frames, strict=True):
        assert one.height == many.height > 1000
        pl.testing.assert_frame_equal(one, many, check_exact=False, rel_tol=1e-12, abs_tol=1e-12)


def _check_workbook(path: Path, cells: pl.DataFrame) -> None:
    """One sheet per table; the suppression symbol and the legend are in it (read from the .xlsx XML)."""
    import re
    import zipfile

    with zipfile.ZipFile(path) as z:
        workbook = z.read("xl/workbook.xml").decode()
        strings = z.read("xl/sharedStrings.xml").decode()
    assert len(re.findall(r"<sheet ", workbook)) == cells["table"].n_unique()
    assert "<t>*</t>" in strings and "fewer than 150 respondents (not shown)" in strings
