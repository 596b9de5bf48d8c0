"""The replayable recipe: replay invariants, replicate re-weighting, trimming, nonresponse, collapsing, diagnostics."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from pipeline.weighting.diagnostics import WeightSummary
from pipeline.weighting.recipe import fit_recipe, largest
from pipeline.weighting.steps import NonresponseStep, PoststratifyStep, RakeStep, TrimStep
from pipeline.weighting.margins import Collapse
from pipeline.weighting.targets import TargetTable

TARGETS = TargetTable(
    {
        "a": {("1",): 0.3, ("2",): 0.4, ("3",): 0.3},
        "b": {("1",): 0.45, ("2",): 0.55},
        "a x b": {("1", "1"): 0.15, ("1", "2"): 0.15, ("2", "1"): 0.2, ("2", "2"): 0.2, ("3", "1"): 0.1, ("3", "2"): 0.2},
        "c": {("1",): 0.25, ("2",): 0.25, ("3",): 0.25, ("4",): 0.25},
    },
    source="test",
)


def _data(n: int = 800, seed: int = 5) -> tuple[pl.DataFrame, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    a = rng.choice([1, 2, 3], size=n, p=[0.5, 0.3, 0.2])
    b = np.where(rng.random(n) < 0.35, 1, 2)
    c = rng.integers(1, 5, size=n)
    psu = rng.integers(0, 40, size=n)
    data = pl.DataFrame({"respondent_id": [f"r{i}" for i in range(n)], "a": a, "b": b, "c": c, "psu": psu})
    return data, rng.uniform(1.0, 6.0, size=n), psu


STEPS = [
    PoststratifyStep(0, ("a", "b"), TARGETS, total=10_000.0),
    RakeStep(1, (("a",), ("c",)), TARGETS, total=10_000.0, tolerance=1e-11, max_iterations=500),
]


def test_replay_of_full_sample_totals_reproduces_weights_exactly() -> None:
    data, base, _ = _data()
    recipe = fit_recipe(data, STEPS, base_weights=base)
    f = recipe.replay(recipe.class_totals()[None, :])
    np.testing.assert_array_equal(recipe.adjusted_base * f[0, recipe.classes], recipe.weights)  # exact by contract
    assert recipe.calibration_matrix().shape == (len(recipe.class_labels), 3 + 3)  # a (3) + c without its first (3)


def _jackknife_factors(psu: np.ndarray, n_psu: int) -> np.ndarray:
    """(R, n) delete-one-PSU jackknife factors a_r = n_psu / (n_psu - 1) outside the deleted PSU (Lohr 3rd ed. 9.3.2)."""
    a = np.full((n_psu, psu.size), n_psu / (n_psu - 1))
    a[psu[None, :] == np.arange(n_psu)[:, None]] = 0.0
    return a


def test_replicate_replay_equals_refitting_on_replicate_base_weights() -> None:
    data, base, psu = _data()
    recipe = fit_recipe(data, STEPS, base_weights=base)
    a = _jackknife_factors(psu, 40)
    totals = np.stack([recipe.class_totals(recipe.adjusted_base * a[r]) for r in range(40)])
    factors = recipe.replay(totals)
    for r in (0, 17, 39):
        replicate = recipe.adjusted_base * a[r] * factors[r, recipe.classes]
        kept = a[r] > 0
        # DESIGN.md claim, checked against the naive per-respondent path: refit the recipe on the replicate's rows.
        refit = fit_recipe(data.filter(pl.Series(kept)), STEPS, base_weights=(base * a[r])[kept]).weights
        np.testing.assert_allclose(replicate[kept], refit, rtol=1e-8)
    one_by_one = np.vstack([recipe.replay(totals[r:r + 1]) for r in range(40)])
    np.testing.assert_allclose(factors, one_by_one, rtol=1e-12)  # batching replicates changes nothing


def test_trimming_bounds_hold_and_margins_are_met_again() -> None:
    data, base, _ = _data()
    steps = [RakeStep(0, (("a",), ("b",)), TARGETS, total=10_000.0, tolerance=1e-10),
             TrimStep(1, upper=3.0, lower=0.3, relative_to="mean")]
    recipe = fit_recipe(data, steps, base_weights=base)
    w = recipe.weights
    mean = 10_000.0 / data.height
    assert w.max() <= 3.0 * mean * (1 + 1e-6) and w.min() >= 0.3 * mean * (1 - 1e-6)
    a = data["a"].to_numpy()
    assert w[a == 3].sum() == pytest.approx(3000.0, rel=1e-8)  # margin a=3 still at its target after re-raking
    untrimmed = fit_recipe(data, steps[:1], base_weights=base).weights
    at_bound = int(((w >= 3.0 * mean * (1 - 1e-6)) | (w <= 0.3 * mean * (1 + 1e-6))).sum())
    assert recipe.reports[-1].trimmed == at_bound > 0 and (untrimmed > 3.0 * mean).any()
    np.testing.assert_array_equal(recipe.adjusted_base * recipe.replay(recipe.class_totals()[None, :])[0, recipe.classes], w)
    assert WeightSummary.of(w).deff < WeightSummary.of(untrimmed).deff


def test_nonresponse_adjustment_by_class_hand_computed() -> None:
    data = pl.DataFrame({
        "respondent_id": [f"r{i}" for i in range(8)],
        "status": [1, 1, 2, 3, 1, 2, 2, 1],
        "cls": [1, 1, 1, 1, 2, 2, 2, 2],
    })
    base = np.array([10.0, 20.0, 30.0, 40.0, 5.0, 5.0, 10.0, 15.0])
    step = NonresponseStep(0, "status", ("1",), ("2",), ("3",), ("cls",))
    recipe = fit_recipe(data, [step], base_weights=base)
    # hand computation: class 1 respondents 10 + 20 carry the nonrespondent's 30 -> factor 60/30 = 2;
    # class 2 respondents 5 + 15 carry 5 + 10 -> factor 35/20 = 1.75; the ineligible row leaves with its 40.
    np.testing.assert_allclose(recipe.weights, [20.0, 40.0, 8.75, 26.25])
    assert recipe.ids.to_list() == ["r0", "r1", "r4", "r7"]
    assert recipe.dropped == {"nonrespondents": 3, "ineligible": 1}
    rates = recipe.reports[0].response
    assert [r.response_rate for r in rates] == pytest.approx([2 / 3, 2 / 4])
    assert [r.weighted_response_rate for r in rates] == pytest.approx([30 / 60, 20 / 35])


def test_collapse_merges_declared_groups_and_reports_them() -> None:
    rng = np.random.default_rng(9)
    age = np.concatenate([np.repeat([1, 2, 3, 4], 50), [5] * 6, [6] * 16])
    data = pl.DataFrame({"respondent_id": [str(i) for i in range(age.size)], "age": age, "sex": rng.integers(1, 3, age.size)})
    targets = TargetTable({"age": {(str(k),): v for k, v in zip(range(1, 7), [0.2, 0.2, 0.2, 0.2, 0.1, 0.1])},
                           "sex": {("1",): 0.5, ("2",): 0.5}}, "test")
    step = RakeStep(0, (("age",), ("sex",)), targets, collapse=Collapse(20, {"age": (("5", "6"), ("1", "2"))}))
    recipe = fit_recipe(data, [step], base_weights=np.ones(age.size))
    report = recipe.reports[0]
    assert [m.category for m in report.margins if m.margin == "age"] == ["1", "2", "3", "4", "5+6"]
    assert any("merged age codes 5+6" in note for note in report.collapsed)
    assert recipe.weights[age >= 5].sum() == pytest.approx(0.2 * age.size)  # merged target 0.1 + 0.1
    adjacent = RakeStep(0, (("age",), ("sex",)), targets, collapse=Collapse(20, {"age": "adjacent"}))
    merged = fit_recipe(data, [adjacent], base_weights=np.ones(age.size)).reports[0]
    # 5 (6 respondents) joins its smaller neighbour 6 (16), not 4 (50)
    assert [m.category for m in merged.margins if m.margin == "age"] == ["1", "2", "3", "4", "5+6"]


def test_kish_summaries_hand_computed() -> None:
    s = WeightSummary.of(np.array([1.0, 3.0]))
    # hand computation (Kish 1992, eq. 2): mean 2, CV (divisor n) = 1/2, deff = 1.25, n_eff = 16 / 10 = 1.6
    assert (s.mean, s.cv, s.deff, s.n_eff, s.efficiency_pct) == pytest.approx((2.0, 0.5, 1.25, 1.6, 80.0))
    equal = WeightSummary.of(np.full(5, 7.0))
    assert (equal.deff, equal.n_eff, equal.efficiency_pct) == pytest.approx((1.0, 5.0, 100.0))
    w = np.random.default_rng(1).uniform(1, 9, 1000)
    s = WeightSummary.of(w)
    assert s.deff == pytest.approx(w.size * np.sum(w**2) / w.sum() ** 2, rel=1e-12)  # identity 1 + CV^2 = n sum w^2 / (sum w)^2
    assert s.n_eff == pytest.approx(w.size / s.deff, rel=1e-12)


def test_largest_weights_carry_profiles_not_ids() -> None:
    data, base, _ = _data()
    recipe = fit_recipe(data, STEPS, base_weights=base)
    top = largest(recipe)
    assert len(top) == 10 and top[0].weight == pytest.approx(recipe.weights.max())
    assert [t.weight for t in top] == sorted((t.weight for t in top), reverse=True)
    assert set(top[0].profile) == {"a", "b", "c"}
    assert not any(v.startswith("r") for t in top for v in t.profile.values())


def test_targets_vs_sample_vs_weighted_diagnostics() -> None:
    data, base, _ = _data()
    recipe = fit_recipe(data, STEPS, base_weights=base)
    checks = {(m.margin, m.category): m for m in recipe.reports[1].margins}
    a3 = checks[("a", "3")]
    assert a3.target_share == pytest.approx(0.3)
    assert a3.sample_count == int((data["a"] == 3).sum())
    assert a3.achieved_share == pytest.approx(0.3, rel=1e-9)


def test_replicates_with_proportion_targets_rescale_the_estimated_population() -> None:
    data, base, psu = _data()
    steps = [RakeStep(0, (("a",), ("c",)), TARGETS, tolerance=1e-11, max_iterations=500)]  # proportions, no total
    recipe = fit_recipe(data, steps, base_weights=base)
    assert recipe.weights.sum() == pytest.approx(base.sum(), rel=1e-12)  # population estimated by the base weights
    a = _jackknife_factors(psu, 40)
    totals = np.stack([recipe.class_totals(recipe.adjusted_base * a[r]) for r in (3, 21)])
    factors = recipe.replay(totals)
    for row, r in enumerate((3, 21)):
        kept = a[r] > 0
        refit = fit_recipe(data.filter(pl.Series(kept)), steps, base_weights=(base * a[r])[kept]).weights
        # naive path: the replicate's own population estimate sum(d a_r) scales its proportion targets
        np.testing.assert_allclose((recipe.adjusted_base * a[r] * factors[row, recipe.classes])[kept], refit, rtol=1e-8)


def test_replicate_with_an_empty_category_is_flagged_not_silent() -> None:
    data = pl.DataFrame({"respondent_id": [str(i) for i in range(6)], "a": [1, 1, 2, 2, 3, 3]})
    targets = TargetTable({"a": {("1",): 10.0, ("2",): 10.0, ("3",): 10.0}}, "test")
    recipe = fit_recipe(data, [RakeStep(0, (("a",),), targets)], base_weights=np.ones(6))
    assert recipe.warnings == []
    factors = recipe.replay(np.array([[1.0, 1.0, 0.0], [2.0, 2.0, 2.0]]))
    # hand computed: in the first replicate category 3 is empty, so its target 10 joins its only
    # neighbour with weight, category 2 (target 20 on a total of 1); the margin's total 30 is kept
    np.testing.assert_allclose(factors[:, :2], [[10.0, 20.0], [5.0, 5.0]])
    assert [w.rule for w in recipe.warnings] == ["replicate-empty-category"]
    assert recipe.replicate_adjustments() == {"collapsed": 1, "unconverged": 0}


def test_replicate_empty_category_follows_the_step_collapse_order() -> None:
    data = pl.DataFrame({"respondent_id": [str(i) for i in range(6)], "a": [1, 1, 2, 2, 3, 3]})
    targets = TargetTable({"a": {("1",): 10.0, ("2",): 10.0, ("3",): 10.0}}, "test")
    step = RakeStep(0, (("a",),), targets, collapse=Collapse(1, {"a": (("1", "3"),)}))
    recipe = fit_recipe(data, [step], base_weights=np.ones(6))
    factors = recipe.replay(np.array([[0.0, 1.0, 1.0]]))
    # hand computed: category 1 is empty in the replicate; the step's collapse order groups it with
    # category 3 (not its code neighbour 2), so category 3 takes target 20 on a total of 1
    np.testing.assert_allclose(factors[0, 1:], [10.0, 20.0])
    assert recipe.replicate_adjustments()["collapsed"] == 1
