"""The first-stage FPC in a two-stage design: (1 - f_1h) on the PSU term only, plus the within-PSU term.

In a two-stage design the unbiased variance estimator of an estimated total is
    v = sum_h [ (1 - f_1h) n_h/(n_h - 1) sum_j (z_hj - zbar_h)^2  +  f_1h sum_j v2(z_hj) ]
where v2(z_hj) estimates the second-stage variance of the PSU's weighted total (Cochran 1977,
Sampling Techniques, 3rd ed., section 11.9, unequal-size two-stage unbiased estimator; Lohr,
Sampling: Design and Analysis, 3rd ed., section 5.3, eq. for v(t_unb) -- both from memory).
Multiplying the whole PSU term by (1 - f_1h) and dropping the second term underestimates the
variance by f_1h times the within-PSU part. wavebook does not know the second-stage fractions, so
v2 is taken with f_2 = 0: v2(z_hj) = m_j/(m_j - 1) sum_i (u_i - ubar_j)^2 with u_i = w_i z_i
(conservative by at most f_1h f_2 times the within term).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline.estimation import estimate

LOHR = Path(__file__).resolve().parents[1].parent / "shared" / "reference" / "lohr_sda3"


def _two_stage_by_hand(h: np.ndarray, psu: np.ndarray, u: np.ndarray, population: dict) -> float:
    """The two-term estimator of the module docstring, respondent by respondent (numpy only)."""
    v = 0.0
    for s in np.unique(h):
        in_h = h == s
        ids = np.unique(psu[in_h])
        n, f = len(ids), len(ids) / population[s]
        z = np.array([u[in_h & (psu == j)].sum() for j in ids])
        within = 0.0
        for j in ids:
            uj = u[in_h & (psu == j)]
            within += len(uj) / (len(uj) - 1) * ((uj - uj.mean()) ** 2).sum()
        v += (1 - f) * n / (n - 1) * ((z - z.mean()) ** 2).sum() + f * within
    return v


def _invented_two_stage(seed: int = 3) -> pl.DataFrame:
    """Invented: 2 strata of 12 and 9 PSUs, 5 and 4 sampled, 6-9 respondents per PSU, unequal weights."""
    rng = np.random.default_rng(seed)
    rows = []
    for stratum, n_psu in (("A", 5), ("B", 4)):
        for j in range(n_psu):
            effect = rng.normal(0, 1.0)
            for _ in range(int(rng.integers(6, 10))):
                rows.append({"h": stratum, "j": j, "w": float(rng.uniform(20, 60)), "y": float(effect + rng.normal(0, 3))})
    return pl.DataFrame(rows)


def test_total_with_first_stage_fpc_adds_the_within_psu_term() -> None:
    frame = _invented_two_stage()
    population = {"A": 12.0, "B": 9.0}
    row = estimate(frame, weight="w", strata="h", psu="j", population_size=population, total="y").row(0, named=True)
    u = (frame["w"] * frame["y"]).to_numpy()
    expected = _two_stage_by_hand(frame["h"].to_numpy(), frame["j"].to_numpy(), u, population)
    # two-stage unbiased estimator with f_2 = 0 (Cochran 1977 section 11.9 / Lohr 3rd ed. section 5.3, from memory)
    assert row["se"] ** 2 == pytest.approx(expected, rel=1e-10)


def test_mean_and_domain_proportion_use_linearized_values_in_both_terms() -> None:
    frame = _invented_two_stage(5).with_columns(big=(pl.col("y") > 1).cast(pl.Int64), dom=(pl.col("y") > -2).cast(pl.Int64))
    population = {"A": 12.0, "B": 9.0}
    out = estimate(frame, weight="w", strata="h", psu="j", population_size=population, mean="y", proportion="big", by="dom")
    w, y, big, dom = (frame[c].to_numpy().astype(float) for c in ("w", "y", "big", "dom"))
    h, j = frame["h"].to_numpy(), frame["j"].to_numpy()
    ybar = (w * y).sum() / w.sum()
    u_mean = w * (y - ybar) / w.sum()  # linearized ratio mean (Woodruff 1971), summed with weights
    mean_row = out.filter((pl.col("statistic") == "mean") & (pl.col("domain") == "")).row(0, named=True)
    # identity: the two-term estimator applied to the linearized variable (module docstring sources)
    assert mean_row["se"] ** 2 == pytest.approx(_two_stage_by_hand(h, j, u_mean, population), rel=1e-9)
    p = (w * big * dom).sum() / (w * dom).sum()
    u_p = w * dom * (big - p) / (w * dom).sum()  # domain: zero outside, full design kept
    p_row = out.filter((pl.col("statistic") == "proportion") & (pl.col("domain") == "dom=1") & (pl.col("category") == "1")).row(0, named=True)
    assert p_row["se"] ** 2 == pytest.approx(_two_stage_by_hand(h, j, u_p, population), rel=1e-9)


def test_without_fpc_the_with_replacement_formula_is_unchanged() -> None:
    frame = _invented_two_stage()
    row = estimate(frame, weight="w", strata="h", psu="j", total="y").row(0, named=True)
    z = frame.group_by("h", "j").agg((pl.col("w") * pl.col("y")).sum().alias("z"))
    expected = 0.0
    for s in ("A", "B"):
        zs = z.filter(pl.col("h") == s)["z"].to_numpy()
        expected += len(zs) / (len(zs) - 1) * ((zs - zs.mean()) ** 2).sum()
    # with-replacement PSU formula (Wolter 2007 section 1.4, from memory): no FPC, no second term
    assert row["se"] ** 2 == pytest.approx(expected, rel=1e-10)


@pytest.mark.skipif(not LOHR.is_dir(), reason=f"reference folder {LOHR} is absent")
def test_schools_two_stage_between_the_two_term_value_and_its_f2_zero_bound() -> None:
    frame = pl.read_csv(LOHR / "schools.csv")
    row = estimate(frame, weight="finalwt", psu="schoolid", population_size={"all": 75.0}, mean="math").row(0, named=True)
    w, y = frame["finalwt"].to_numpy(), frame["math"].to_numpy().astype(float)
    u = w * (y - (w * y).sum() / w.sum()) / w.sum()
    by_hand = _two_stage_by_hand(np.zeros(len(u)), frame["schoolid"].to_numpy(), u, {0.0: 75.0})
    assert row["se"] ** 2 == pytest.approx(by_hand, rel=1e-9)  # the f_2 = 0 two-term formula (sources above)
    # check_values schools_twostage_ratio_mean_math (computed_here): the two-term SE with the actual
    # second-stage fractions 20 / M_i is 1.660487; taking f_2 = 0 can only add to it, by a little
    assert 1.660487 <= row["se"] <= 1.660487 * 1.02


def test_post_stratified_two_stage_uses_the_residuals_in_both_terms() -> None:
    frame = _invented_two_stage(11)
    rng = np.random.default_rng(2)
    frame = frame.with_columns(c=pl.Series(rng.integers(0, 3, frame.height)), q=(pl.col("y") > 0).cast(pl.Int64))
    targets = np.array([4000.0, 6000.0, 5000.0])

    def poststratify(class_totals: np.ndarray) -> np.ndarray:
        return targets[None, :] / class_totals  # f(c) = N_c / base-weight total of c

    population = {"A": 12.0, "B": 9.0}
    row = estimate(frame, weight="w", strata="h", psu="j", population_size=population, proportion="q", classes="c",
                   calibration_matrix=np.eye(3), reweight=poststratify).filter(pl.col("category") == "1").row(0, named=True)
    c = frame["c"].to_numpy()
    w = frame["w"].to_numpy() * (targets / np.bincount(c, weights=frame["w"].to_numpy()))[c]
    q = frame["q"].to_numpy().astype(float)
    p = (w * q).sum() / w.sum()
    z = (q - p) / w.sum()
    residual = z - np.array([(w * z)[c == k].sum() / w[c == k].sum() for k in range(3)])[c]  # post-stratum means
    # post-stratified estimator: variance of the weighted residuals (Deville & Sarndal 1992 section 3;
    # Lohr 3rd ed. section 4.4, from memory) put through the two-term formula of the module docstring
    expected = _two_stage_by_hand(frame["h"].to_numpy(), frame["j"].to_numpy(), w * residual, population)
    assert row["estimate"] == pytest.approx(p, rel=1e-12)
    assert row["se"] ** 2 == pytest.approx(expected, rel=1e-9)


def test_spec_second_stage_fraction_is_read_and_checked(tmp_path: Path) -> None:
    from conftest import TRACKER_SPEC

    from pipeline.errors import SpecError
    from pipeline.staging.spec import load_spec

    design = 'population = { 1 = 220, 2 = 180 }\n'
    good = tmp_path / "good.toml"
    good.write_text(TRACKER_SPEC.replace(design, design + "second_stage_fraction = 1\n"), encoding="utf-8")
    assert load_spec(good).design.second_stage_fraction == 1.0
    bad = tmp_path / "bad.toml"
    bad.write_text(TRACKER_SPEC.replace(design, "second_stage_fraction = 1.5\n"), encoding="utf-8")
    with pytest.raises(SpecError) as info:
        load_spec(bad)
    text = info.value.render()
    assert "design.second_stage_fraction" in text and "between 0 and 1" in text


def test_whole_psus_drop_the_within_term() -> None:
    frame = _invented_two_stage()
    population = {"A": 12.0, "B": 9.0}
    whole = estimate(frame, weight="w", strata="h", psu="j", population_size=population, total="y", second_stage_fraction=1.0)
    half = estimate(frame, weight="w", strata="h", psu="j", population_size=population, total="y", second_stage_fraction=0.5)
    unknown = estimate(frame, weight="w", strata="h", psu="j", population_size=population, total="y")
    z = frame.group_by("h", "j").agg((pl.col("w") * pl.col("y")).sum().alias("z"))
    first = 0.0
    for s, big_n in population.items():
        zs = z.filter(pl.col("h") == s)["z"].to_numpy()
        first += (1 - len(zs) / big_n) * len(zs) / (len(zs) - 1) * ((zs - zs.mean()) ** 2).sum()
    # one-stage cluster sample: the PSU term with the FPC alone (Cochran 1977 section 9.15 / Lohr 3rd ed.
    # section 5.2, from memory); f_2 = 1/2 halves the within term (the (1 - f_2) factor of section 11.9)
    assert whole["se"][0] ** 2 == pytest.approx(first, rel=1e-10)
    assert half["se"][0] ** 2 - first == pytest.approx((unknown["se"][0] ** 2 - first) / 2, rel=1e-9)


def test_covariance_needs_the_within_psu_cross_moments() -> None:
    from pipeline.estimation import SampleDesign, group_totals, taylor_variance
    from pipeline.estimation.estimands import Ratios

    frame = _invented_two_stage()
    gt = group_totals(frame, {"y": pl.col("y")}, weight="w", strata="h", psu="j")
    layout = SampleDesign(weight="w", strata="h", psu="j", population_size={"A": 12.0, "B": 9.0}).layout(
        gt, fpc_values={"A": 12.0, "B": 9.0})
    ratios = Ratios(num=[0], den=[-1])
    # per-PSU variances cannot stand in for the (P, m, m) cross-moments of a covariance
    # (`taylor.within_psu_covariance`; tests/test_estimation_covariance.py checks the values)
    with pytest.raises(ValueError, match="covariances with covariance=True"):
        taylor_variance(gt, ratios, layout, covariance=True, within=np.zeros((gt.n_psus, 1)))


def test_jackknife_of_a_total_with_first_stage_fpc_matches_the_two_stage_estimator() -> None:
    frame = _invented_two_stage()
    options = {"weight": "w", "strata": "h", "psu": "j", "population_size": {"A": 12.0, "B": 9.0}, "total": "y"}
    stratified = estimate(frame, **options, variance="stratified-jackknife").row(0, named=True)
    taylor = estimate(frame, **options).row(0, named=True)
    # identity: for a linear total the stratified jackknife reproduces the PSU-level formula exactly
    # (Wolter 2007 section 4.5, from memory); with a first-stage FPC the unbiased two-stage estimator
    # adds sum_h f_h sum_j v2(z_hj) (Cochran 1977 section 11.9, from memory), which Taylor computes
    assert stratified["se"] == pytest.approx(taylor["se"], rel=1e-10)
