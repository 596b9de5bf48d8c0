"""Replicate factors and replicate variances: exact identities with the with-replacement PSU formula.

Every expected value here is either an algebraic identity (named beside its assertion) or a
property of the construction; no value is copied from this code's own output.
"""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.errors import DataError, SpecError
from pipeline.estimation.estimands import Ratios
from pipeline.estimation.replicate_variance import replicate_covariance, replicate_df, replicate_variance
from pipeline.estimation.replicates import (
    make_replicates,
    replicate_totals,
    supplied_factors,
    supplied_replicate_totals,
)
from pipeline.estimation.totals import group_totals


def wr_variance(psu_totals: np.ndarray, psu_stratum: np.ndarray, fraction: np.ndarray | None = None) -> np.ndarray:
    """The with-replacement ultimate-cluster variance, written out independently of the package:
    sum_h (1 - f_h) n_h/(n_h-1) sum_j (z_hj - zbar_h)^2 (Cochran 1977 eq. 11.30 with replacement, from memory)."""
    out = np.zeros(psu_totals.shape[1])
    for h in np.unique(psu_stratum):
        z = psu_totals[psu_stratum == h]
        n = len(z)
        f = 0.0 if fraction is None else fraction[h]
        out += (1 - f) * n / (n - 1) * ((z - z.mean(axis=0)) ** 2).sum(axis=0)
    return out


def design_frame(sizes: list[list[int]], seed: int) -> pl.DataFrame:
    """A small stratified clustered sample: sizes[h][j] respondents in PSU j of stratum h."""
    rng = np.random.default_rng(seed)
    rows = [(h, j) for h, psus in enumerate(sizes) for j, m in enumerate(psus) for _ in range(m)]
    n = len(rows)
    return pl.DataFrame(
        {
            "stratum": [f"s{h}" for h, _ in rows],
            "psu": [j for _, j in rows],
            "w": rng.uniform(1.0, 5.0, n),
            "y": rng.gamma(2.0, 3.0, n),
            "d": rng.integers(0, 2, n).astype(np.float64),
        }
    )


QUANTITIES = {
    "y": pl.col("y"),
    "one": pl.lit(1.0),
    "yd": pl.col("y") * pl.col("d"),
    "d": pl.col("d"),
}


def totals_of(frame: pl.DataFrame):
    return group_totals(frame, QUANTITIES, weight="w", strata="stratum", psu="psu")


def test_srs_jackknife_variance_of_mean_is_s2_over_n():
    rng = np.random.default_rng(1)
    y = rng.normal(10.0, 3.0, 57)
    frame = pl.DataFrame({"y": y, "w": np.full(57, 2.5)})
    gt = group_totals(frame, {"y": pl.col("y"), "one": pl.lit(1.0)}, weight="w", strata=None, psu=None)
    rf = make_replicates("jackknife", gt.psu_stratum)
    mean = Ratios([0], [1])
    theta = mean.value(gt.totals.sum(axis=0))
    theta_r = mean.value(replicate_totals(gt, rf))
    # identity: delete-one jackknife variance of the SRS mean = s^2 / n (Wolter 2007 section 4.2)
    expected = np.var(y, ddof=1) / len(y)
    np.testing.assert_allclose(replicate_variance(theta, theta_r, rf), [expected], rtol=1e-12)
    # identity: the delete-one means average to the full mean, so both centres agree
    np.testing.assert_allclose(replicate_variance(theta, theta_r, rf, centre="replicate-mean"), [expected], rtol=1e-12)
    assert replicate_df(rf) == 56


@settings(max_examples=30, deadline=None)
@given(
    sizes=st.lists(st.lists(st.integers(1, 4), min_size=2, max_size=5), min_size=1, max_size=8),
    seed=st.integers(0, 2**31),
    fpc=st.booleans(),
)
def test_stratified_jackknife_of_linear_total_equals_with_replacement_formula(sizes, seed, fpc):
    frame = design_frame(sizes, seed)
    gt = totals_of(frame)
    fraction = np.random.default_rng(seed).uniform(0, 0.3, gt.n_strata) if fpc else None
    rf = make_replicates("stratified-jackknife", gt.psu_stratum, sampling_fraction=fraction)
    totals = Ratios([0, 2], [-1, -1])
    theta = totals.value(gt.totals.sum(axis=0))
    theta_r = totals.value(replicate_totals(gt, rf))
    psu_z = gt.psu_totals()[:, [0, 2]]
    # identity: the stratified jackknife with multipliers (1-f_h)(n_h-1)/n_h on a linear estimator = ultimate-cluster variance
    # (Rust & Rao 1996 section 3; Wolter 2007 section 4.5)
    np.testing.assert_allclose(replicate_variance(theta, theta_r, rf), wr_variance(psu_z, gt.psu_stratum, fraction), rtol=1e-10)
    # identity: per-stratum replicate means of a linear total equal the full total, so centres agree
    np.testing.assert_allclose(
        replicate_variance(theta, theta_r, rf, centre="replicate-mean"), replicate_variance(theta, theta_r, rf), rtol=1e-9
    )
    assert replicate_df(rf) == gt.n_psus - gt.n_strata


@settings(max_examples=30, deadline=None)
@given(n_strata=st.integers(1, 70), seed=st.integers(0, 2**31), rho=st.sampled_from([0.0, 0.3, 0.5]))
def test_brr_and_fay_of_linear_total_equal_with_replacement_formula(n_strata, seed, rho):
    frame = design_frame([[2, 3]] * n_strata, seed)
    gt = totals_of(frame)
    rf = make_replicates("fay" if rho else "brr", gt.psu_stratum, fay=rho)
    totals = Ratios([0, 1], [-1, -1])
    theta = totals.value(gt.totals.sum(axis=0))
    theta_r = totals.value(replicate_totals(gt, rf))
    # identity: BRR/Fay with a fully orthogonal balanced set is exact for linear estimators
    # (Wolter 2007 section 3.3; Fay 1989; Judkins 1990 for rho > 0)
    expected = wr_variance(gt.psu_totals()[:, [0, 1]], gt.psu_stratum)
    np.testing.assert_allclose(replicate_variance(theta, theta_r, rf), expected, rtol=1e-10)
    # identity: full orthogonal balance (sum_r alpha_rh = 0) makes the replicate mean of a total the full total
    np.testing.assert_allclose(theta_r.mean(axis=0), theta, rtol=1e-12)
    # R is a Hadamard order above H (2, or a multiple of 4), at most H + 4 plus the few orders not built in
    # (Wolter 2007 section 3.3)
    assert n_strata < rf.n_replicates <= n_strata + 8
    assert rf.n_replicates % 4 == 0 or rf.n_replicates == 2
    assert replicate_df(rf) == n_strata


def test_fay_with_rho_zero_is_brr():
    psu_stratum = np.repeat(np.arange(9), 2)
    brr = make_replicates("brr", psu_stratum)
    fay0 = make_replicates("brr", psu_stratum, fay=0.0)
    # identity: Fay factors 1 +- (1 - rho) alpha with rho = 0 are the BRR factors 2 / 0
    np.testing.assert_array_equal(brr.factors, fay0.factors)
    assert set(np.unique(brr.factors)) == {0.0, 2.0}
    fay = make_replicates("fay", psu_stratum, fay=0.5)
    assert set(np.unique(fay.factors)) == {0.5, 1.5}
    # Fay 1989: variance multiplier 1 / (R (1 - rho)^2)
    assert fay.multiplier == pytest.approx(1 / (fay.n_replicates * 0.25))


def test_bootstrap_factors_follow_rao_wu_construction():
    psu_stratum = np.array([0, 0, 0, 1, 1, 2, 2, 2, 2, 2])
    rf = make_replicates("bootstrap", psu_stratum, replicates=300, seed=7)
    n_h = np.bincount(psu_stratum)
    sums = np.stack([rf.factors[:, psu_stratum == h].sum(axis=1) for h in range(3)], axis=1)
    # construction (Rao & Wu 1988, m_h = n_h - 1): the factors of a stratum sum to n_h/(n_h-1) * m_h = n_h
    np.testing.assert_allclose(sums, np.broadcast_to(n_h, sums.shape), rtol=1e-12)
    multiplicity = rf.factors * ((n_h - 1) / n_h)[psu_stratum]
    np.testing.assert_allclose(multiplicity, np.round(multiplicity), atol=1e-12)
    again = make_replicates("bootstrap", psu_stratum, replicates=300, seed=7)
    np.testing.assert_array_equal(rf.factors, again.factors)
    assert rf.multiplier == pytest.approx(1 / 300)
    assert replicate_df(rf) == 10 - 3


def test_bootstrap_variance_of_linear_total_is_unbiased_for_with_replacement_formula():
    frame = design_frame([[3, 2, 4], [2, 2], [1, 3, 2, 2, 5]], seed=3)
    gt = totals_of(frame)
    rf = make_replicates("bootstrap", gt.psu_stratum, replicates=40_000, seed=11)
    theta = gt.totals.sum(axis=0)[[0]]
    theta_r = replicate_totals(gt, rf)[:, [0]]
    # Rao & Wu 1988 section 4: with m_h = n_h - 1 the bootstrap expectation of v is the
    # with-replacement variance; 40,000 replicates give a Monte Carlo relative error near 1%
    expected = wr_variance(gt.psu_totals()[:, [0]], gt.psu_stratum)
    np.testing.assert_allclose(replicate_variance(theta, theta_r, rf), expected, rtol=0.04)


def test_unstratified_jackknife_multiplier_and_factors():
    rf = make_replicates("jackknife", np.array([0, 0, 1, 1, 1]))
    # unstratified jackknife (Wolter 2007 section 4.2): factor P/(P-1) except the deleted PSU, multiplier (P-1)/P
    assert rf.multiplier == pytest.approx(4 / 5)
    np.testing.assert_allclose(np.diag(rf.factors), 0.0)
    np.testing.assert_allclose(rf.factors[0, 1:], 5 / 4)
    assert rf.notes and "one stratum" in rf.notes[0]


def test_contrast_variance_from_covariance():
    frame = design_frame([[3, 2, 4], [2, 2, 2], [4, 3]], seed=5)
    gt = totals_of(frame)
    rf = make_replicates("stratified-jackknife", gt.psu_stratum)
    ratios = Ratios([0, 2], [1, 3])  # mean of y overall and in domain d
    theta = ratios.value(gt.totals.sum(axis=0))
    theta_r = ratios.value(replicate_totals(gt, rf))
    cov = replicate_covariance(theta, theta_r, rf)
    contrast = np.array([[1.0, -1.0]])
    v_diff = replicate_variance(theta @ contrast.T, theta_r @ contrast.T, rf)
    # identity: v(a - b) = v(a) + v(b) - 2 cov(a, b) = C cov C^T
    np.testing.assert_allclose(v_diff, [cov[0, 0] + cov[1, 1] - 2 * cov[0, 1]], rtol=1e-10)
    np.testing.assert_allclose(np.diag(cov), replicate_variance(theta, theta_r, rf), rtol=1e-12)


def test_scaling_weights_leaves_mean_se_and_scales_total_se():
    frame = design_frame([[3, 2, 4], [2, 2], [5, 1, 2]], seed=9)
    scaled = frame.with_columns(pl.col("w") * 7.0)
    ratios = Ratios([0, 0], [1, -1])
    out = []
    for data in (frame, scaled):
        gt = totals_of(data)
        rf = make_replicates("stratified-jackknife", gt.psu_stratum)
        out.append(replicate_variance(ratios.value(gt.totals.sum(axis=0)), ratios.value(replicate_totals(gt, rf)), rf))
    # identity: a mean is invariant to a common weight factor, a total scales with it
    np.testing.assert_allclose(out[1], out[0] * np.array([1.0, 49.0]), rtol=1e-10)


def test_row_order_does_not_change_replicate_variance():
    frame = design_frame([[3, 2, 4], [2, 2], [5, 1, 2]], seed=2)
    shuffled = frame.sample(fraction=1.0, shuffle=True, seed=4)
    ratios = Ratios([0, 2], [1, 3])
    out = []
    for data in (frame, shuffled):
        gt = totals_of(data)
        rf = make_replicates("stratified-jackknife", gt.psu_stratum)
        out.append(replicate_variance(ratios.value(gt.totals.sum(axis=0)), ratios.value(replicate_totals(gt, rf)), rf))
    # invariant (../shared/DESIGN.md): results do not depend on row order
    np.testing.assert_allclose(out[0], out[1], rtol=1e-12)


def test_brr_needs_two_psus_per_stratum_and_names_every_bad_stratum():
    with pytest.raises(DataError) as err:
        make_replicates("brr", np.array([0, 0, 1, 1, 1, 2, 3, 3]), stratum_labels=["A", "B", "C", "D"])
    text = err.value.render()
    assert "B: 3" in text and "C: 1" in text and "stratified-jackknife" in text
    assert err.value.problems[0].count == 2


def test_jackknife_and_bootstrap_refuse_single_psu_strata():
    for method in ("stratified-jackknife", "bootstrap"):
        with pytest.raises(DataError) as err:
            make_replicates(method, np.array([0, 0, 1, 2, 2, 3]), stratum_labels=["A", "B", "C", "D"])
        assert err.value.problems[0].examples == ("B", "D")


@pytest.mark.parametrize("method", ["stratified-jackknife", "bootstrap"])
def test_certainty_policy_gives_lone_psus_no_variance(method):
    frame = design_frame([[3, 2, 4], [5], [2, 2], [4]], seed=6)
    gt = totals_of(frame)
    rf = make_replicates(method, gt.psu_stratum, single_psu="certainty", replicates=20_000, seed=2)
    lone = np.isin(gt.psu_stratum, [1, 3])
    # certainty: the lone PSUs keep factor 1 in every replicate
    np.testing.assert_array_equal(rf.factors[:, lone], 1.0)
    theta = gt.totals.sum(axis=0)[[0]]
    v = replicate_variance(theta, replicate_totals(gt, rf)[:, [0]], rf)
    multi = ~lone
    expected = wr_variance(gt.psu_totals()[multi][:, [0]], gt.psu_stratum[multi])
    # identity (stratified jackknife, exact) / Rao & Wu 1988 expectation (bootstrap, 20,000 replicates: about 1.5% MC error):
    # the with-replacement variance over the strata with 2+ PSUs, lone strata contributing 0
    np.testing.assert_allclose(v, expected, rtol=1e-10 if method == "stratified-jackknife" else 0.06)
    assert replicate_df(rf) == (3 + 2) - 2  # PSUs minus strata, over the strata with 2+ PSUs
    assert any("certainty" in note for note in rf.notes)


def test_bad_options_are_all_reported():
    with pytest.raises(SpecError) as err:
        make_replicates("halfsample", np.array([0, 0]), fay=1.2, replicates=1, single_psu="grand-mean")
    assert len(err.value.problems) == 4
    with pytest.raises(SpecError, match="sampling fractions"):
        make_replicates("stratified-jackknife", np.array([0, 0, 1, 1]), sampling_fraction=np.array([0.1]))


def test_jackknife_over_too_many_psus_is_refused_with_advice():
    # a jackknife over 20,000 respondent-level PSUs would need a 20,000 x 20,000 factor matrix (3 GiB)
    with pytest.raises(DataError) as err:
        make_replicates("jackknife", np.zeros(20_000, dtype=np.int64))
    assert "bootstrap" in err.value.render()


def test_supplied_replicate_totals_and_problems():
    frame = pl.DataFrame(
        {"y": [1.0, 2.0, 3.0], "w1": [1.0, 2.0, 0.5], "w2": [2.0, 0.0, 1.0], "w3": [1.0, None, None], "w4": [np.inf, 1.0, 1.0]}
    )
    t = supplied_replicate_totals(frame, {"y": pl.col("y"), "one": pl.lit(1.0)}, ["w1", "w2"])
    # identity: t_rk = sum_i W_ir y_ik
    np.testing.assert_allclose(t, [[1 + 4 + 1.5, 3.5], [2 + 0 + 3, 3.0]])
    with pytest.raises(DataError) as err:
        supplied_replicate_totals(frame, {"y": pl.col("y")}, ["w1", "w3", "w9"], source="wave1.csv")
    assert [p.column for p in err.value.problems] == ["w9"]
    with pytest.raises(DataError) as err:
        supplied_replicate_totals(frame, {"y": pl.col("y")}, ["w1", "w3", "w4"], source="wave1.csv")
    found = {(p.column, p.message, p.count) for p in err.value.problems}
    assert found == {("w3", "missing replicate weights", 2), ("w4", "non-finite replicate weights", 1)}
    assert all(p.file == "wave1.csv" for p in err.value.problems)
    # negative replicate weights are legitimate (calibrated successive-difference replicates)
    negative = frame.with_columns(pl.lit(-0.5).alias("w2"))
    np.testing.assert_allclose(supplied_replicate_totals(negative, {"y": pl.col("y")}, ["w2"]), [[-3.0]])


def test_supplied_multipliers():
    # successive differences: 4/R (Fay & Train 1995; ACS PUMS User Guide VII.B); jackknife (R-1)/R; Fay 1/(R(1-rho)^2)
    assert supplied_factors("sdr", 80).multiplier == pytest.approx(0.05)
    assert supplied_factors("jackknife", 10).multiplier == pytest.approx(0.9)
    assert supplied_factors("fay", 16, fay=0.5, df=8).multiplier == pytest.approx(1 / 4)
    assert replicate_df(supplied_factors("sdr", 80)) == 79
    with pytest.raises(SpecError):
        supplied_factors("stratified-jackknife", 10)
