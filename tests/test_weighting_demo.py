"""The demo study's weighting: base weights from the design, raking, trimming; estimates move towards the truth.

The test parses the [[weighting]] steps of sample_data/study.toml with `parse_steps` and reads
the wave files with polars.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline.staging.spec import load_spec
from pipeline.weighting.base import design_base_weights
from pipeline.weighting.recipe import fit_recipe
from pipeline.weighting.steps import parse_steps

SAMPLE = Path(__file__).resolve().parents[1] / "sample_data"


# measures whose answers the generator makes depend on age and education (see generate_demo.py docstring)
AGE_EDUCATION_ITEMS = ("aware_tarnwick", "aware_quendle", "aware_halvorn")


def _wave(study: object, wave_id: str) -> pl.DataFrame:
    file = study.wave(wave_id).file  # type: ignore[attr-defined]
    frame = pl.read_csv(file) if file.suffix == ".csv" else pl.read_parquet(file)
    return frame.rename({"resp_id": "respondent_id"})


@pytest.fixture(scope="module")
def weighted() -> dict[str, tuple[pl.DataFrame, np.ndarray]]:
    if not (SAMPLE / "study.toml").is_file():
        pytest.skip("sample_data/study.toml is absent")
    study = load_spec(SAMPLE / "study.toml")
    assert study.weighting, "the demo spec declares its weighting"
    steps = parse_steps(study.weighting, study.step_context())
    out = {}
    for wave in study.waves:
        data = _wave(study, wave.id)
        base, how = design_base_weights(data, study)
        assert how == "1 / selection probability 'p_select'"
        recipe = fit_recipe(data, steps, base_weights=base, code_order=study.step_context().code_order(set(study.variables)))
        out[wave.id] = (data, recipe.weights)
    return out


def test_weights_meet_the_population_margins(weighted: dict) -> None:
    margins = pl.read_csv(SAMPLE / "population_margins.csv")
    population = margins.filter(pl.col("variable") == "region")["target"].sum()
    for data, w in weighted.values():
        assert w.sum() == pytest.approx(population, rel=1e-8)  # identity: count targets fix the total
        for code, target in margins.filter(pl.col("variable") == "education").select("category", "target").iter_rows():
            assert w[data["education"].to_numpy() == int(code)].sum() == pytest.approx(target, rel=1e-6)
        assert w.max() <= 4.0 * w.mean() * (1 + 1e-6) and w.min() >= 0.25 * w.mean() * (1 - 1e-6)


def test_weighted_estimates_are_closer_to_the_truth(weighted: dict) -> None:
    truth = pl.read_csv(SAMPLE / "population_truth.csv")
    for wave, (data, w) in weighted.items():
        rows = truth.filter(pl.col("wave") == wave)
        for item in AGE_EDUCATION_ITEMS:
            y = data[item].to_numpy().astype(float)
            true = rows.filter(pl.col("category") == item)["value"][0]
            # the population truth is the generator's own (sample_data/population_truth.csv)
            assert abs(np.dot(w, y) / w.sum() - true) < abs(y.mean() - true), (wave, item)
        s = data["satisfaction"].to_numpy()
        ok = s != 99
        true = rows.filter((pl.col("measure") == "mean") & (pl.col("variable") == "satisfaction"))["value"][0]
        assert abs(np.dot(w[ok], s[ok]) / w[ok].sum() - true) < abs(s[ok].mean() - true), (wave, "satisfaction")
