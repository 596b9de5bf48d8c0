"""Base weights from the design and the nonresponse status checks."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline.errors import DataError
from pipeline.staging.spec import Design, Study
from pipeline.weighting.base import design_base_weights
from pipeline.weighting.recipe import fit_recipe
from pipeline.weighting.steps import NonresponseStep

LOHR = Path(__file__).resolve().parents[1].parent / "shared" / "reference" / "lohr_sda3"


def _study(design: Design) -> Study:
    return Study(path=Path("s.toml"), title="t", respondent_id="id", waves=(), design=design, variables={})


def test_stratum_population_over_sample_size_matches_lohr_agstrat() -> None:
    if not LOHR.is_dir():
        pytest.skip(f"reference folder {LOHR} is absent")
    data = pl.read_csv(LOHR / "agstrat.csv").with_columns(pl.int_range(pl.len()).cast(pl.String).alias("respondent_id"))
    design = Design(strata="region", population={"NC": 1054, "NE": 220, "S": 1382, "W": 422})
    w, how = design_base_weights(data, _study(design))
    assert how == "stratum population / stratum sample size"
    # Lohr, Sampling: Design and Analysis, 3rd ed.: agstrat's own weight column `strwt` = N_h / n_h (sums to 3078)
    np.testing.assert_allclose(w, data["strwt"].to_numpy(), rtol=1e-12)
    assert w.sum() == pytest.approx(3078)


def test_selection_probability_and_nonprobability() -> None:
    data = pl.DataFrame({"respondent_id": ["a", "b", "c"], "p": [0.5, 0.25, 0.1]})
    w, _ = design_base_weights(data, _study(Design(selection_probability="p")))
    np.testing.assert_allclose(w, [2.0, 4.0, 10.0])  # Horvitz-Thompson: 1 / pi
    w, how = design_base_weights(data, _study(Design(kind="nonprobability", selection_probability="p")))
    assert how.startswith("equal") and w.tolist() == [1.0, 1.0, 1.0]


def test_bad_probabilities_are_all_reported() -> None:
    data = pl.DataFrame({"respondent_id": ["a", "b", "c", "d"], "p": [1.5, 0.0, None, 0.2]})
    with pytest.raises(DataError) as exc:
        design_base_weights(data, _study(Design(selection_probability="p")))
    assert [(p.rule, p.examples) for p in exc.value.problems] == [("selection-probability", ("a",))]
    data = data.with_columns(p=pl.Series([0.5, 0.0, None, 0.2]))
    with pytest.raises(DataError) as exc:
        design_base_weights(data, _study(Design(selection_probability="p")))
    assert [(p.rule, p.examples) for p in exc.value.problems] == [
        ("base-weight-missing", ("c",)), ("base-weight-nonpositive", ("b",))]


def test_unknown_status_codes_and_empty_classes_are_reported_together() -> None:
    data = pl.DataFrame({"respondent_id": list("abcdef"), "status": [1, 2, 7, 7, 2, None], "cls": [1, 1, 1, 2, 2, 2]})
    step = NonresponseStep(0, "status", ("1",), ("2",), (), ("cls",))
    with pytest.raises(DataError) as exc:
        fit_recipe(data, [step], base_weights=np.ones(6))
    found = {(p.rule, p.value, p.count) for p in exc.value.problems}
    assert ("status-unknown", "7", 2) in found and ("status-unknown", "(missing)", 1) in found
    assert ("nonresponse-empty-class", "cls=2", 1) in found  # class 2: a nonrespondent and no respondent
