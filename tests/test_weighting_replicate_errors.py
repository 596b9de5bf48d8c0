"""A replicate whose re-weighting cannot meet the margins finishes, counted and warned (the full-sample fit converged)."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from pipeline.errors import DataError
from pipeline.weighting.recipe import fit_recipe
from pipeline.weighting.steps import RakeStep
from pipeline.weighting.targets import TargetTable


def test_replicate_raking_without_a_solution_finishes_counted_and_warned() -> None:
    data = pl.DataFrame({"respondent_id": [str(i) for i in range(8)], "a": [1, 1, 2, 2, 1, 1, 2, 2],
                         "b": [1, 2, 1, 2, 1, 2, 1, 2]})
    targets = TargetTable({"a": {("1",): 60.0, ("2",): 40.0}, "b": {("1",): 50.0, ("2",): 50.0}}, "test")
    recipe = fit_recipe(data, [RakeStep(0, (("a",), ("b",)), targets, max_iterations=50)], base_weights=np.ones(8))
    # the full-sample fit meets both margins (sums of the final weights by category)
    np.testing.assert_allclose(np.bincount(data["a"].to_numpy(), weights=recipe.weights)[1:], [60.0, 40.0], rtol=1e-6)
    # a replicate keeping only the classes (a=1, b=1) and (a=2, b=2): a=1 must hold 60 and b=1 50 in the
    # same class, so no raking solution exists (the margins conflict: an arithmetic fact)
    diagonal = np.array([[2.0, 0.0, 0.0, 2.0]])
    factors = recipe.replay(diagonal)
    assert np.all(np.isfinite(factors))  # replicate re-weighting always finishes
    assert recipe.replicate_adjustments() == {"collapsed": 0, "unconverged": 1}
    text = " ".join(w.render() for w in recipe.warnings)
    assert "replicate tolerance" in text and "replicate_max_iterations" in text


def test_full_sample_raking_is_never_relaxed() -> None:
    data = pl.DataFrame({"respondent_id": [str(i) for i in range(4)], "a": [1, 1, 2, 2], "b": [1, 1, 2, 2]})
    targets = TargetTable({"a": {("1",): 60.0, ("2",): 40.0}, "b": {("1",): 50.0, ("2",): 50.0}}, "test")
    with pytest.raises(DataError, match="did not converge"):
        fit_recipe(data, [RakeStep(0, (("a",), ("b",)), targets, max_iterations=50, replicate_tolerance=0.5)],
                   base_weights=np.ones(4))
