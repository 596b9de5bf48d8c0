"""`wavebook weigh --export FILE --replicates`: the exported replicate weights reproduce the book's SEs."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import polars as pl
import pytest

from pipeline.cli import main
from pipeline.estimation import estimate
from pipeline.runner import variance_options
from pipeline.staging.database import load_responses, open_database
from pipeline.staging.spec import load_spec
from pipeline.tables.topline import unweighted_toplines
from pipeline.tables.weighted_cells import wave_estimates
from pipeline.weighting.store import fit_wave

SAMPLE = Path(__file__).resolve().parents[1] / "sample_data"


@pytest.mark.parametrize("method", ["bootstrap", "jackknife"])
def test_exported_replicates_reproduce_the_book_standard_errors(tmp_path: Path, method: str,
                                                               capsys: pytest.CaptureFixture[str]) -> None:
    if not (SAMPLE / "study.toml").is_file():
        pytest.skip("sample_data/study.toml is absent")
    demo = tmp_path / "demo"
    shutil.copytree(SAMPLE, demo, ignore=shutil.ignore_patterns("*.duckdb", "book"))
    spec = demo / "study.toml"
    variance = '[variance]\nmethod = "bootstrap"\nreplicates = 60\nseed = 5' if method == "bootstrap" else \
        '[variance]\nmethod = "jackknife"'
    spec.write_text(spec.read_text(encoding="utf-8").replace('[variance]\nmethod = "taylor"', variance), encoding="utf-8")
    assert main(["stage", str(spec), "--wave", "W3", "--quiet"]) == 0
    out = tmp_path / "w3.parquet"
    assert main(["weigh", str(spec), "--wave", "W3", "--export", str(out), "--replicates", "--quiet"]) == 0
    capsys.readouterr()
    recipe_info = json.loads((tmp_path / "w3.parquet.replicates.json").read_text(encoding="utf-8"))
    assert recipe_info["method"] == method and recipe_info["wave"] == "W3"
    exported = pl.read_parquet(out)
    assert exported.columns[:3] == ["respondent_id", "wave", "weight"]
    study = load_spec(spec)
    con = open_database(study, read_only=True)
    try:
        responses = load_responses(con, study, ["W3"])
        recipe, _ = fit_wave(study, "W3", con=con)
        layout = unweighted_toplines(con, study).filter(pl.col("wave") == "W3")
    finally:
        con.close()
    book = wave_estimates(responses, study, recipe, layout, variance_options(study), wave="W3")
    data = responses.join(exported.drop("wave"), on="respondent_id", how="inner", validate="1:1")
    mean_row = layout.filter((pl.col("variable") == "satisfaction") & (pl.col("code") == "mean"))["row_order"][0]
    book_se = book.filter((pl.col("variable") == "satisfaction") & (pl.col("row_order") == mean_row))["se"][0]
    scored = data.with_columns(s=pl.when(pl.col("satisfaction") != 99).then(pl.col("satisfaction")))
    again = estimate(scored, weight="weight", mean="s", variance="supplied", replicate_cols=r"replicate_\d+",
                     replicate_method=method, replicate_multiplier=recipe_info["multiplier"],
                     replicate_df=recipe_info["df"]).row(0, named=True)
    # the same replicate weights and multiplier: the book's SE to 1e-10 relative (identity)
    assert again["se"] == pytest.approx(book_se, rel=1e-10)
    row = layout.filter((pl.col("variable") == "recommend") & (pl.col("row_kind") == "category"))["row_order"][0]
    code = layout.filter((pl.col("variable") == "recommend") & (pl.col("row_order") == row))["code"][0]
    prop = estimate(data.with_columns(q=(pl.col("recommend").cast(pl.String) == code).cast(pl.Int64)), weight="weight",
                    mean="q", variance="supplied", replicate_cols=r"replicate_\d+", replicate_method=method,
                    replicate_multiplier=recipe_info["multiplier"], replicate_df=recipe_info["df"]).row(0, named=True)
    book_p = book.filter((pl.col("variable") == "recommend") & (pl.col("row_order") == row))["se"][0]
    assert 100 * prop["se"] == pytest.approx(book_p, rel=1e-10)
