"""Re-weighted replicates: replaying a raking recipe in every replicate from group totals equals the
naive computation (respondent-level replicate weights, raking each replicate on respondents).

The raking used here is the test's own small implementation (iterative proportional fitting,
Deming & Stephan 1940), written twice: once on (replicates x classes) class totals as the
`reweight` callable the estimation engine expects, once per respondent for the naive reference.
"""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from pipeline.estimation.estimands import Ratios
from pipeline.estimation.replicate_variance import replicate_variance
from pipeline.estimation.replicates import make_replicates, replicate_totals, reweighted_totals
from pipeline.estimation.totals import group_totals

ITERATIONS = 300
AGE_TARGETS = np.array([300.0, 450.0, 250.0])
SEX_TARGETS = np.array([480.0, 520.0])


FEW_STRATA = [[6, 9, 4], [7, 5, 8, 3], [10, 6]]
MANY_STRATA = [[4, 5], [3, 6, 2], [5, 5], [2, 7], [6, 3, 3], [4, 4], [5, 2], [3, 3, 4], [6, 5], [4, 7], [5, 3], [2, 6, 4]]


def make_frame(seed: int, sizes: list[list[int]] = FEW_STRATA) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    rows = [(h, j) for h, psus in enumerate(sizes) for j, m in enumerate(psus) for _ in range(m)]
    n = len(rows)
    age = rng.integers(0, 3, n)
    sex = rng.integers(0, 2, n)
    return pl.DataFrame(
        {
            "stratum": [h for h, _ in rows],
            "psu": [j for _, j in rows],
            "w0": rng.uniform(5.0, 20.0, n),
            "age": age,
            "sex": sex,
            "cls": age * 2 + sex,
            "y": rng.gamma(2.0, 2.0, n) + age,
            "q": (rng.random(n) < 0.3 + 0.2 * sex).astype(np.float64),
        }
    )


CLASS_AGE = np.array([0, 0, 1, 1, 2, 2])
CLASS_SEX = np.array([0, 1, 0, 1, 0, 1])


def rake_classes(b: np.ndarray) -> np.ndarray:
    """Class-level replay: (R, C) class totals of base weights -> (R, C) raking factors."""
    f = np.ones_like(b)
    for _ in range(ITERATIONS):
        for category, targets in ((CLASS_AGE, AGE_TARGETS), (CLASS_SEX, SEX_TARGETS)):
            sums = np.stack([(f * b)[:, category == k].sum(axis=1) for k in range(len(targets))], axis=1)
            f = f * (targets / sums)[:, category]
    return f


def rake_respondents(w: np.ndarray, age: np.ndarray, sex: np.ndarray) -> np.ndarray:
    """Respondent-level raking of one weight vector to the same margins."""
    w = w.copy()
    for _ in range(ITERATIONS):
        for category, targets in ((age, AGE_TARGETS), (sex, SEX_TARGETS)):
            sums = np.bincount(category, weights=w, minlength=len(targets))
            w = w * (targets / sums)[category]
    return w


QUANTITIES = {
    "one": pl.lit(1.0),
    "y": pl.col("y"),
    "q": pl.col("q"),
    "age0": (pl.col("age") == 0).cast(pl.Float64),
    "q_female": pl.col("q") * (pl.col("sex") == 1).cast(pl.Float64),
    "female": (pl.col("sex") == 1).cast(pl.Float64),
}


def naive_replicate_totals(frame: pl.DataFrame, factors: np.ndarray, psu_index: np.ndarray) -> np.ndarray:
    """Respondent-level reference: every replicate's weights built and raked row by row."""
    y = frame.select([e.alias(k) for k, e in QUANTITIES.items()]).to_numpy()
    age, sex, w0 = frame["age"].to_numpy(), frame["sex"].to_numpy(), frame["w0"].to_numpy()
    return np.stack([rake_respondents(a[psu_index] * w0, age, sex) @ y for a in factors])


FULL_GRID = [[40, 35, 44], [38, 45], [50, 36, 41, 39]]  # every PSU holds every class: the layout is a view


@pytest.mark.parametrize("how", ["auto", "sparse", "layout", "groups"])
@pytest.mark.parametrize(
    ("method", "sizes"),
    [
        ("stratified-jackknife", FEW_STRATA),
        ("stratified-jackknife", MANY_STRATA),
        ("jackknife", FEW_STRATA),
        ("bootstrap", FEW_STRATA),
        ("bootstrap", FULL_GRID),
        ("brr", [[5, 4]] * 6),
        ("fay", [[30, 42]] * 5),
    ],
)
def test_group_total_replay_equals_naive_replicate_raking(method, sizes, how):
    # auto: with 12 strata the jackknife changes under 10% of the (replicate, PSU) factors (sparse
    # correction); FULL_GRID and the Fay design fill the (PSU, class) grid (layout product); the
    # small PSUs of the others leave most of it empty (groups product). Every formulation is run.
    frame = make_frame(seed=4, sizes=sizes)
    gt = group_totals(frame, QUANTITIES, weight="w0", strata="stratum", psu="psu", classes="cls")
    rf = make_replicates(method, gt.psu_stratum, replicates=60, seed=3, fay=0.5 if method == "fay" else 0.0)
    psu_index = (
        frame.select(pl.struct("stratum", "psu").rank("dense") - 1).to_series().to_numpy().astype(np.int64)
    )
    expected = naive_replicate_totals(frame, rf.factors, psu_index)
    # invariant (../shared/DESIGN.md): the group-total path equals the per-respondent computation
    np.testing.assert_allclose(
        replicate_totals(gt, rf, reweight=rake_classes, base="one", how=how), expected, rtol=1e-9
    )


def test_full_sample_replay_equals_respondent_raking():
    frame = make_frame(seed=8)
    gt = group_totals(frame, QUANTITIES, weight="w0", strata="stratum", psu="psu", classes="cls")
    w = rake_respondents(frame["w0"].to_numpy(), frame["age"].to_numpy(), frame["sex"].to_numpy())
    y = frame.select([e.alias(k) for k, e in QUANTITIES.items()]).to_numpy()
    # invariant (../shared/DESIGN.md): class factors replayed on group totals give the raked totals
    np.testing.assert_allclose(reweighted_totals(gt, reweight=rake_classes, base="one"), w @ y, rtol=1e-9)


def test_raked_margin_total_has_zero_replicate_variance():
    frame = make_frame(seed=1)
    gt = group_totals(frame, QUANTITIES, weight="w0", strata="stratum", psu="psu", classes="cls")
    rf = make_replicates("stratified-jackknife", gt.psu_stratum)
    estimands = Ratios([gt.column("age0"), gt.column("y"), gt.column("q_female")], [-1, -1, gt.column("female")])
    theta = estimands.value(reweighted_totals(gt, reweight=rake_classes, base="one"))
    raked = replicate_variance(theta, estimands.value(replicate_totals(gt, rf, reweight=rake_classes, base="one")), rf)
    plain = replicate_variance(theta, estimands.value(replicate_totals(gt, rf)), rf)
    # identity: every replicate is raked to the same age target, so the age-0 total never varies
    assert raked[0] == pytest.approx(0.0, abs=1e-12 * AGE_TARGETS[0] ** 2)
    assert plain[0] > 1.0
    # the estimate of the age-0 total is the target itself (raking constraint)
    assert theta[0] == pytest.approx(AGE_TARGETS[0], rel=1e-10)
    assert raked[1] > 0 and raked[2] > 0


def test_replay_needs_the_weight_quantity():
    frame = make_frame(seed=2)
    gt = group_totals(frame, QUANTITIES, weight="w0", strata="stratum", psu="psu", classes="cls")
    rf = make_replicates("stratified-jackknife", gt.psu_stratum)
    with pytest.raises(ValueError, match="base"):
        replicate_totals(gt, rf, reweight=rake_classes)
    with pytest.raises(KeyError, match="no quantity 'w'"):
        replicate_totals(gt, rf, reweight=rake_classes, base="w")
