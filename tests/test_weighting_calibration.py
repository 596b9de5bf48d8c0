"""Calibration (linear GREG and bounded logit) against closed forms and identities."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from pipeline.errors import DataError
from pipeline.weighting.calibration import distance_function
from pipeline.weighting.recipe import fit_recipe
from pipeline.weighting.steps import CalibrateStep, PoststratifyStep
from pipeline.weighting.targets import TargetTable

MARGINS = TargetTable(
    {"a": {("1",): 0.3, ("2",): 0.4, ("3",): 0.3}, "b": {("1",): 0.45, ("2",): 0.55}}, source="test"
)
POPULATION = 8000.0
HH_TOTAL = 21000.0


def _data(n: int = 500, seed: int = 3) -> tuple[pl.DataFrame, np.ndarray]:
    rng = np.random.default_rng(seed)
    a = rng.choice([1, 2, 3], size=n, p=[0.45, 0.35, 0.2])
    b = rng.integers(1, 3, size=n)
    hh = rng.integers(1, 6, size=n).astype(float)
    data = pl.DataFrame({"respondent_id": [f"r{i}" for i in range(n)], "a": a, "b": b, "hh_size": hh})
    return data, rng.uniform(5.0, 30.0, size=n)


def _greg(data: pl.DataFrame, base: np.ndarray, *, numeric: bool) -> np.ndarray:
    """Closed-form GREG weights w = d (1 + x'(X'DX)^{-1}(t - X'd)) (Sarndal, Swensson & Wretman 1992,
    Model Assisted Survey Sampling, eq. 6.5.9; Deville & Sarndal 1992 eq. 3.3), with numpy.linalg."""
    a, b = data["a"].to_numpy(), data["b"].to_numpy()
    cols = [np.ones(len(a)), a == 2, a == 3, b == 2]
    t = [POPULATION, 0.4 * POPULATION, 0.3 * POPULATION, 0.55 * POPULATION]
    if numeric:
        cols.append(data["hh_size"].to_numpy())
        t.append(HH_TOTAL)
    x = np.column_stack(cols).astype(float)
    lam = np.linalg.solve(x.T @ (base[:, None] * x), np.array(t) - x.T @ base)
    return base * (1.0 + x @ lam)


def test_linear_calibration_equals_closed_form_greg_on_classes() -> None:
    data, base = _data()
    step = CalibrateStep(0, "linear", (("a",), ("b",)), {}, MARGINS, total=POPULATION)
    recipe = fit_recipe(data, [step], base_weights=base)
    np.testing.assert_allclose(recipe.weights, _greg(data, base, numeric=False), rtol=1e-10)
    assert recipe.aux_matrix is None
    assert recipe.calibration_matrix().shape == (6, 4)  # 3 x 2 classes; 3 + (2 - 1) reference-coded columns


def test_linear_calibration_with_numeric_auxiliary_equals_greg() -> None:
    data, base = _data()
    step = CalibrateStep(0, "linear", (("a",), ("b",)), {"hh_size": HH_TOTAL}, MARGINS, total=POPULATION)
    recipe = fit_recipe(data, [step], base_weights=base)
    np.testing.assert_allclose(recipe.weights, _greg(data, base, numeric=True), rtol=1e-10)
    assert recipe.aux_matrix is not None and recipe.aux_matrix.shape == (500, 5)
    assert np.dot(recipe.weights, data["hh_size"].to_numpy()) == pytest.approx(HH_TOTAL, rel=1e-10)
    # every respondent is its own class, so replay still reproduces the weights
    f = recipe.replay(recipe.class_totals()[None, :])
    np.testing.assert_allclose(recipe.adjusted_base * f[0, recipe.classes], recipe.weights, rtol=1e-12)


def test_logit_calibration_meets_totals_within_bounds() -> None:
    data, base = _data()
    bounds = (0.5, 2.0)  # feasible here: GREG ratios span 0.11-2.53, so bounds bind on both sides
    scale = POPULATION / base.sum()  # bounds apply to w/d: start from base weights on the population scale
    step = CalibrateStep(0, "logit", (("a",), ("b",)), {"hh_size": HH_TOTAL}, MARGINS, bounds=bounds, total=POPULATION)
    recipe = fit_recipe(data, [step], base_weights=base * scale)
    ratio = recipe.weights / (base * scale)
    assert ratio.min() > bounds[0] and ratio.max() < bounds[1]  # Deville & Sarndal (1992) logit: L < F < U
    a, b = data["a"].to_numpy(), data["b"].to_numpy()
    assert recipe.weights.sum() == pytest.approx(POPULATION, rel=1e-8)  # calibration equations (identity)
    assert recipe.weights[a == 2].sum() == pytest.approx(0.4 * POPULATION, rel=1e-8)
    assert recipe.weights[b == 2].sum() == pytest.approx(0.55 * POPULATION, rel=1e-8)
    assert np.dot(recipe.weights, data["hh_size"].to_numpy()) == pytest.approx(HH_TOTAL, rel=1e-8)


def test_logit_distance_function_identities() -> None:
    u = np.linspace(-3, 3, 13)
    f, fprime = distance_function(u, distance="logit", bounds=(0.5, 2.5))
    f0, fp0 = distance_function(np.zeros(1), distance="logit", bounds=(0.5, 2.5))
    # Deville & Sarndal (1992) require F(0) = 1 and F'(0) = 1 for every distance (their conditions on g).
    assert f0[0] == pytest.approx(1.0, abs=1e-14) and fp0[0] == pytest.approx(1.0, abs=1e-12)
    assert (f > 0.5).all() and (f < 2.5).all()
    h = 1e-6  # central difference (mathematical identity for a smooth F; error O(h^2))
    numeric = (distance_function(u + h, distance="logit", bounds=(0.5, 2.5))[0]
               - distance_function(u - h, distance="logit", bounds=(0.5, 2.5))[0]) / (2 * h)
    np.testing.assert_allclose(fprime, numeric, rtol=1e-7)


def test_linear_calibration_on_one_margin_equals_poststratification() -> None:
    data, base = _data()
    cells = TargetTable({"a": {("1",): 2400.0, ("2",): 3200.0, ("3",): 2400.0}}, "test")
    cal = fit_recipe(data, [CalibrateStep(0, "linear", (("a",),), {}, cells)], base_weights=base).weights
    post = fit_recipe(data, [PoststratifyStep(0, ("a",), cells)], base_weights=base).weights
    np.testing.assert_allclose(cal, post, rtol=1e-10)  # identity: GREG on cell indicators = post-stratification


def test_infeasible_logit_bounds_are_reported() -> None:
    data, base = _data()
    step = CalibrateStep(0, "logit", (("a",), ("b",)), {}, MARGINS, bounds=(0.9, 1.1), total=POPULATION)
    with pytest.raises(DataError, match="did not converge"):
        fit_recipe(data, [step], base_weights=base * POPULATION / base.sum())
