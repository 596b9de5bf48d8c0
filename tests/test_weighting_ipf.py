"""Raking (iterative proportional fitting) against published tables, an independent solver and invariants."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy import optimize

from pipeline.weighting.classes import Margin
from pipeline.weighting.ipf import rake
from pipeline.weighting.recipe import fit_recipe
from pipeline.weighting.steps import PoststratifyStep, RakeStep
from pipeline.weighting.targets import TargetTable

REFERENCE = Path(__file__).resolve().parents[1].parent / "shared" / "reference" / "ipf_examples"


def _reference(name: str) -> pl.DataFrame:
    if not REFERENCE.is_dir():
        pytest.skip(f"reference folder {REFERENCE} is absent")
    return pl.read_csv(REFERENCE / name)


def _table_margins(seed: np.ndarray, row_targets: np.ndarray, col_targets: np.ndarray) -> list[Margin]:
    """Cells of an r x c table as classes (row-major); the row and column margins."""
    r, c = seed.shape
    rows = np.repeat(np.arange(r), c)
    cols = np.tile(np.arange(c), r)
    return [
        Margin("row", ("row",), tuple(map(str, range(r))), rows, row_targets.astype(float), "count"),
        Margin("col", ("col",), tuple(map(str, range(c))), cols, col_targets.astype(float), "count"),
    ]


def _wikipedia() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    seed = _reference("wikipedia_ipf_seed.csv").drop("row").to_numpy().astype(float)
    targets = _reference("wikipedia_ipf_targets.csv")
    rows = targets.filter(pl.col("margin") == "row")["target"].to_numpy()
    cols = targets.filter(pl.col("margin") == "col")["target"].to_numpy()
    return seed, rows, cols


def test_wikipedia_table_after_exactly_three_cycles() -> None:
    seed, rows, cols = _wikipedia()
    margins = _table_margins(seed, rows, cols)
    fit = rake(seed.reshape(-1, 1), margins, np.array([1000.0]), tolerance=0.0, max_iterations=3)
    fitted = (seed.reshape(-1) * fit.factors[:, 0]).reshape(seed.shape)
    published = _reference("wikipedia_ipf_published_after_3_cycles.csv").drop("row").to_numpy()
    # Wikipedia, "Iterative proportional fitting", section Example (via ../shared/reference/ipf_examples/SOURCE.md):
    # the published table after 3 cycles, rows first, rounded to 2 dp -> agree within half a unit of the 2nd decimal.
    assert fit.iterations == 3
    np.testing.assert_allclose(fitted, published, atol=0.005 + 1e-9)


def test_wikipedia_table_converged_regression() -> None:
    seed, rows, cols = _wikipedia()
    fit = rake(seed.reshape(-1, 1), _table_margins(seed, rows, cols), np.array([1000.0]), tolerance=1e-12, max_iterations=500)
    fitted = (seed.reshape(-1) * fit.factors[:, 0]).reshape(seed.shape)
    converged = _reference("wikipedia_ipf_converged_computed_here.csv").drop("row").to_numpy()
    # Regression value, computed here (by the reference collector, tolerance 1e-12), not published; file holds 6 dp.
    np.testing.assert_allclose(fitted, converged, atol=1e-5)
    np.testing.assert_allclose(fitted.sum(axis=0), cols, rtol=1e-11)  # identity: margins met
    np.testing.assert_allclose(fitted.sum(axis=1), rows, rtol=1e-11)


def test_bfh_structural_zeros_and_odds_ratios_kept() -> None:
    seed_frame = _reference("bfh1975_age_marital_seed.csv")
    seed = seed_frame.drop("age").to_numpy().astype(float)
    targets = _reference("bfh1975_age_marital_targets.csv")
    rows = targets.filter(pl.col("margin") == "age")["target"].to_numpy()
    cols = targets.filter(pl.col("margin") == "marital")["target"].to_numpy()
    fit = rake(seed.reshape(-1, 1), _table_margins(seed, rows, cols), np.array([rows.sum()]), tolerance=1e-12, max_iterations=1000)
    fitted = (seed.reshape(-1) * fit.factors[:, 0]).reshape(seed.shape)
    assert fit.converged
    # Bishop, Fienberg & Holland (1975) example as described in ../shared/reference/ipf_examples/SOURCE.md:
    # structural zeros stay zero ...
    assert fitted[seed == 0].tolist() == [0.0]
    # ... and IPF keeps every cross-product ratio of the seed (identity: row and column scalings cancel).
    for i, j in [(1, 2), (3, 5), (6, 7)]:
        for a, b in [(0, 1), (1, 2), (0, 2)]:
            before = seed[i, a] * seed[j, b] / (seed[i, b] * seed[j, a])
            after = fitted[i, a] * fitted[j, b] / (fitted[i, b] * fitted[j, a])
            assert after == pytest.approx(before, rel=1e-10)
    converged = _reference("bfh1975_age_marital_converged_computed_here.csv").drop("age").to_numpy()
    # Regression value computed here (reference collector, tolerance 1e-10), not the published fitted table; 6 dp.
    np.testing.assert_allclose(fitted, converged, atol=1e-4)


def _respondents(n: int, seed: int) -> tuple[pl.DataFrame, np.ndarray]:
    rng = np.random.default_rng(seed)
    a = rng.choice([1, 2, 3], size=n, p=[0.5, 0.3, 0.2])
    b = np.where(rng.random(n) < 0.3 + 0.2 * (a == 1), 1, 2)
    c = rng.integers(1, 5, size=n)
    data = pl.DataFrame({"respondent_id": [f"r{i}" for i in range(n)], "a": a, "b": b, "c": c})
    return data, rng.uniform(0.5, 4.0, size=n)


TARGETS = TargetTable(
    {
        "a": {("1",): 0.3, ("2",): 0.4, ("3",): 0.3},
        "b": {("1",): 0.45, ("2",): 0.55},
        "c": {("1",): 0.1, ("2",): 0.2, ("3",): 0.3, ("4",): 0.4},
    },
    source="test",
)


def test_raking_equals_minimum_discrimination_solution_from_scipy() -> None:
    data, base = _respondents(600, 1)
    recipe = fit_recipe(data, [RakeStep(0, (("a",), ("b",), ("c",)), TARGETS, total=5000.0, tolerance=1e-12, max_iterations=500)],
                        base_weights=base)
    # Independent solution: raking = calibration with the exponential (raking ratio) distance, w = d exp(x'lam),
    # Deville & Sarndal (1992), JASA 87, section 2 case 2. Solve its dual equations sum_i d_i exp(x_i'lam) x_i = t
    # with scipy.optimize.root on a reference-coded X (intercept + categories 2.. of each margin).
    a, b, c = (data[v].to_numpy() for v in ("a", "b", "c"))
    x = np.column_stack([np.ones(len(a)), a == 2, a == 3, b == 2, c == 2, c == 3, c == 4]).astype(float)
    t = 5000.0 * np.array([1.0, 0.4, 0.3, 0.55, 0.2, 0.3, 0.4])
    sol = optimize.root(lambda lam: x.T @ (base * np.exp(x @ lam)) / t - 1.0, np.zeros(x.shape[1]), tol=1e-13)
    assert np.abs(sol.fun).max() < 1e-10  # the dual equations are solved
    np.testing.assert_allclose(recipe.weights, base * np.exp(x @ sol.x), rtol=1e-9)


def test_single_margin_raking_equals_poststratification() -> None:
    data, base = _respondents(400, 2)
    cells = TargetTable({"a x b": {(i, j): v for (i, j), v in zip(
        [("1", "1"), ("1", "2"), ("2", "1"), ("2", "2"), ("3", "1"), ("3", "2")], [900, 800, 700, 600, 500, 400])}}, "test")
    raked = fit_recipe(data, [RakeStep(0, (("a", "b"),), cells)], base_weights=base)
    post = fit_recipe(data, [PoststratifyStep(0, ("a", "b"), cells)], base_weights=base)
    # Mathematical identity: post-stratified weight = d_i N_c / sum_{j in c} d_j, computed directly here.
    key = data["a"].cast(str) + "," + data["b"].cast(str)
    cell_total = pl.DataFrame({"k": key, "d": base}).group_by("k").agg(pl.col("d").sum())
    by = dict(cell_total.iter_rows())
    target = {"1,1": 900, "1,2": 800, "2,1": 700, "2,2": 600, "3,1": 500, "3,2": 400}
    direct = np.array([base[i] * target[k] / by[k] for i, k in enumerate(key.to_list())])
    np.testing.assert_allclose(post.weights, direct, rtol=1e-12)
    np.testing.assert_allclose(raked.weights, direct, rtol=1e-10)
    assert raked.reports[-1].iterations == 1


@st.composite
def _raking_case(draw: st.DrawFn) -> tuple[pl.DataFrame, np.ndarray, TargetTable]:
    n = draw(st.integers(40, 150))
    seed = draw(st.integers(0, 2**31 - 1))
    rng = np.random.default_rng(seed)
    a = np.concatenate([np.arange(1, 4), rng.integers(1, 4, size=n - 3)])
    b = np.concatenate([np.arange(1, 3), np.arange(1, 2), rng.integers(1, 3, size=n - 3)])
    rng.shuffle(b)
    # feasible targets: margins of a positive table (every cell present in the data gets positive weight)
    props_a = rng.dirichlet(np.ones(3)) * 0.8 + 0.2 / 3
    props_b = rng.dirichlet(np.ones(2)) * 0.8 + 0.2 / 2
    data = pl.DataFrame({"respondent_id": [str(i) for i in range(n)], "a": a, "b": b})
    targets = TargetTable({"a": {(str(k + 1),): float(p) for k, p in enumerate(props_a)},
                           "b": {(str(k + 1),): float(p) for k, p in enumerate(props_b)}}, "hypothesis")
    return data, rng.uniform(0.2, 5.0, size=n), targets


def _full_cross(data: pl.DataFrame) -> bool:
    return data.select("a", "b").unique().height == 6


@settings(max_examples=40, deadline=None)
@given(_raking_case())
def test_property_margins_met_positive_and_invariant(case: tuple[pl.DataFrame, np.ndarray, TargetTable]) -> None:
    data, base, targets = case
    assume(_full_cross(data))  # every cell present: the targets are then feasible (IPF converges for positive tables)
    step = [RakeStep(0, (("a",), ("b",)), targets, tolerance=1e-10, max_iterations=2000)]
    w = fit_recipe(data, step, base_weights=base).weights
    total = base.sum()
    for var in ("a", "b"):
        codes = data[var].to_numpy()
        for (code,), p in targets.margins[var].items():
            # identity: each margin category sums to its share of the incoming total (proportion targets)
            assert w[codes == int(code)].sum() == pytest.approx(p * total, rel=1e-8)
    assert (w > 0).all()
    # row order: permuting respondents permutes the weights
    order = np.random.default_rng(0).permutation(data.height)
    w_perm = fit_recipe(data[order], step, base_weights=base[order]).weights
    np.testing.assert_allclose(w_perm, w[order], rtol=1e-9)
    # scaling the base weights by k scales the (proportion-targeted) weights by k
    w_scaled = fit_recipe(data, step, base_weights=3.5 * base).weights
    np.testing.assert_allclose(w_scaled, 3.5 * w, rtol=1e-9)
