"""weigh_wave: weights and diagnostics stored per wave in one transaction; the weigh command and its export."""

from __future__ import annotations

import shutil
from pathlib import Path

import duckdb
import numpy as np
import polars as pl
import pytest

from pipeline.cli import main
from pipeline.errors import DataError
from pipeline.staging.database import open_database
from pipeline.staging.spec import load_spec
from pipeline.staging.stage import stage_wave
from pipeline.weighting.store import weigh_wave

SAMPLE = Path(__file__).resolve().parents[1] / "sample_data"


@pytest.fixture(scope="module")
def study_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    if not (SAMPLE / "study.toml").is_file():
        pytest.skip("sample_data/study.toml is absent")
    folder = tmp_path_factory.mktemp("demo")
    shutil.copytree(SAMPLE / "waves", folder / "waves")
    shutil.copy(SAMPLE / "population_margins.csv", folder)
    spec = (SAMPLE / "study.toml").read_text()
    assert "[[weighting]]" in spec, "the demo spec declares its weighting (rake, then trim)"
    (folder / "study.toml").write_text(spec)
    (folder / "bare.toml").write_text(spec.split("[[weighting]]")[0])  # the same study, unweighted
    for name in ("study.toml", "bare.toml"):
        study = load_spec(folder / name)
        stage_wave(study, "W1", quiet=True)
    return folder


def _table(path: Path, query: str) -> pl.DataFrame:
    con = duckdb.connect(str(path), read_only=True)
    try:
        return con.sql(query).pl()
    finally:
        con.close()


def test_weigh_wave_stores_weights_and_diagnostics(study_dir: Path) -> None:
    study = load_spec(study_dir / "study.toml")
    con = open_database(study)
    try:
        report = weigh_wave(study, "W1", con=con)
        weigh_wave(study, "W1", con=con)  # a second run replaces the wave's rows
    finally:
        con.close()
    db = study.database_path
    weights = _table(db, "select * from weights")
    staged = _table(db, "select count(*) as n from responses where wave = 'W1'")["n"][0]
    assert weights.height == staged == report.n_weighted  # one row per respondent, not duplicated
    assert weights["weight"].sum() == pytest.approx(599_995, rel=1e-8)  # sum of the region count targets
    steps = _table(db, "select stage, n, deff, trimmed from weighting_steps order by position")
    assert steps["stage"].to_list() == ["base", "rake", "trim", "final"]
    assert steps["deff"][-1] == pytest.approx(report.final.deff)
    margins = _table(db, "select * from weighting_margins where position = 1 and margin = 'region'")
    assert margins.height == 6 and margins["achieved"].sum() == pytest.approx(599_995, rel=1e-8)
    largest = _table(db, "select * from weighting_largest order by rank")
    assert largest.height == 10 and "resp" not in " ".join(largest["profile"].to_list())
    assert "age_band=" in largest["profile"][0]


def test_failed_weighting_leaves_stored_weights_untouched(study_dir: Path) -> None:
    study = load_spec(study_dir / "study.toml")
    con = open_database(study)
    try:
        weigh_wave(study, "W1", con=con)
        before = con.sql("select * from weights order by respondent_id").pl()
        broken = load_spec(study_dir / "study.toml")
        object.__setattr__(broken, "weighting", ({"step": "rake", "margins": ["region"], "totals": {"region": {"1": 1.0}}},))
        with pytest.raises(DataError) as exc:
            weigh_wave(broken, "W1", con=con)
        assert {p.rule for p in exc.value.problems} == {"target-no-category"}
        after = con.sql("select * from weights order by respondent_id").pl()
    finally:
        con.close()
    assert before.equals(after)


def test_no_weighting_steps_store_base_weights(study_dir: Path) -> None:
    study = load_spec(study_dir / "bare.toml")
    con = open_database(study)
    try:
        report = weigh_wave(study, "W1", con=con)
        stored = con.sql("select w.weight, r.p_select from weights w join responses r using (wave, respondent_id)").pl()
    finally:
        con.close()
    np.testing.assert_allclose(stored["weight"].to_numpy(), 1.0 / stored["p_select"].to_numpy(), rtol=1e-12)
    assert report.steps == ()


def test_weigh_command_exports(study_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = study_dir / "w.parquet"
    assert main(["weigh", str(study_dir / "study.toml"), "--wave", "W1", "--export", str(out), "--quiet"]) == 0
    exported = pl.read_parquet(out)
    assert exported.columns == ["respondent_id", "wave", "weight"]
    assert exported["weight"].sum() == pytest.approx(599_995, rel=1e-8)
    text = capsys.readouterr().out
    assert "final weights" in text and "largest weights" in text
