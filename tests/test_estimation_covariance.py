"""Taylor covariances in a two-stage design with a first-stage FPC: the within-PSU cross-moment."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from pipeline.estimation import SampleDesign, estimate, group_totals, taylor_variance
from pipeline.estimation.api import product_moments
from pipeline.estimation.estimands import Ratios
from pipeline.estimation.replicate_variance import replicate_covariance
from pipeline.estimation.replicates import make_replicates, replicate_totals
from pipeline.estimation.taylor import (
    Calibration,
    ProductMoments,
    product_pairs,
    within_psu_covariance,
)

QUANTITIES = {
    "one": pl.lit(1.0),
    "y": pl.col("y"),
    "dom": pl.col("dom").cast(pl.Float64),
    "y_dom": pl.col("y") * pl.col("dom"),
    "big_dom": (pl.col("y") > 1).cast(pl.Float64) * pl.col("dom"),
}


def _two_stage(seed: int, sizes: dict[str, tuple[int, int]], per_psu: tuple[int, int]) -> pl.DataFrame:
    """Invented stratified two-stage sample: stratum -> (PSUs sampled, PSUs in the population)."""
    rng = np.random.default_rng(seed)
    rows = []
    for stratum, (n_psu, _) in sizes.items():
        for j in range(n_psu):
            effect = rng.normal(0, 1)
            for _ in range(int(rng.integers(*per_psu))):
                y = effect + rng.normal(0, 2)
                rows.append({"h": stratum, "j": j, "w": float(rng.uniform(20, 60)), "y": y,
                             "dom": int(rng.random() < 0.6), "c": int(rng.integers(0, 3))})
    return pl.DataFrame(rows)


def _estimands(gt) -> Ratios:
    col = gt.column
    # overall mean of y, the domain's mean of y, the domain's share with y > 1: overlapping estimates
    return Ratios(num=[col("y"), col("y_dom"), col("big_dom")], den=[col("one"), col("dom"), col("dom")])


def _direct(frame: pl.DataFrame, population: dict[str, int], *, calibrated: bool) -> np.ndarray:
    """The two-stage covariance respondent by respondent (numpy only, no group totals).

    cov = sum_h [(1 - f_h) n_h/(n_h - 1) sum_j (U_hj - Ubar_h)(U_hj - Ubar_h)'
                 + f_h sum_j m_j/(m_j - 1) sum_{i in j} (u_i - ubar_j)(u_i - ubar_j)']
    with u_i = w_i e_i, e_i the linearized values (Woodruff 1971) or, for post-stratified weights,
    their residuals from the weighted class means (Deville & Sarndal 1992, section 3), and f_2 = 0
    (Cochran 1977, Sampling Techniques, 3rd ed., section 11.9, from memory).
    """
    w, y, dom, c = (frame[k].to_numpy().astype(float) for k in ("w", "y", "dom", "c"))
    h, j = frame["h"].to_numpy(), frame["j"].to_numpy()
    big = (y > 1).astype(float)
    ybar = (w * y).sum() / w.sum()
    tdom = (w * dom).sum()
    ydom = (w * y * dom).sum() / tdom
    pdom = (w * big * dom).sum() / tdom
    z = np.column_stack([(y - ybar) / w.sum(), dom * (y - ydom) / tdom, dom * (big - pdom) / tdom])
    if calibrated:
        for cls in np.unique(c):
            inside = c == cls
            z[inside] -= (w[inside, None] * z[inside]).sum(axis=0) / w[inside].sum()
    u = w[:, None] * z
    cov = np.zeros((3, 3))
    for s, big_n in population.items():
        ids = np.unique(j[h == s])
        f = len(ids) / big_n
        totals = np.array([u[(h == s) & (j == p)].sum(axis=0) for p in ids])
        dev = totals - totals.mean(axis=0)
        cov += (1 - f) * len(ids) / (len(ids) - 1) * dev.T @ dev
        for p in ids:
            uj = u[(h == s) & (j == p)]
            dj = uj - uj.mean(axis=0)
            cov += f * len(uj) / (len(uj) - 1) * dj.T @ dj
    return cov


def _taylor(frame: pl.DataFrame, population: dict[str, int], *, calibrated: bool) -> tuple[np.ndarray, ...]:
    gt = group_totals(frame, QUANTITIES, weight="w", strata="h", psu="j", classes="c")
    fpc = {k: float(v[1]) for k, v in population.items()}
    layout = SampleDesign(weight="w", strata="h", psu="j", population_size=fpc).layout(gt, fpc_values=fpc)
    ratios = _estimands(gt)
    one = gt.column("one")
    calibration = Calibration(np.eye(3), one) if calibrated else None
    pairs = product_pairs(gt, ratios, weight_column=one)
    moments = product_moments(frame, QUANTITIES, gt, pairs, weight="w", strata="h", psu="j", classes="c")
    within = within_psu_covariance(gt, ratios, moments, weight_column=one, calibration=calibration)
    theta, cov = taylor_variance(gt, ratios, layout, calibration=calibration, covariance=True, within=within)
    return gt, ratios, layout, calibration, within, cov


@pytest.mark.parametrize("calibrated", [False, True])
def test_two_stage_covariance_equals_a_direct_computation(calibrated: bool) -> None:
    sizes = {"A": (5, 12), "B": (4, 9)}
    frame = _two_stage(3, sizes, (6, 10))
    *_, cov = _taylor(frame, sizes, calibrated=calibrated)
    expected = _direct(frame, {k: v[1] for k, v in sizes.items()}, calibrated=calibrated)
    assert cov == pytest.approx(expected, rel=1e-9, abs=1e-12 * np.abs(expected).max())
    assert abs(expected[0, 1]) > 0.1 * np.sqrt(expected[0, 0] * expected[1, 1])  # the estimates overlap


@pytest.mark.parametrize("calibrated", [False, True])
def test_covariance_diagonal_is_the_variance_of_estimate(calibrated: bool) -> None:
    sizes = {"A": (5, 12), "B": (4, 9)}
    frame = _two_stage(4, sizes, (5, 9)).with_columns(big=(pl.col("y") > 1).cast(pl.Int64))
    *_, cov = _taylor(frame, sizes, calibrated=calibrated)
    fpc = {k: float(v[1]) for k, v in sizes.items()}
    extra = {"classes": "c", "calibration_matrix": np.eye(3)} if calibrated else {}
    out = estimate(frame, weight="w", strata="h", psu="j", population_size=fpc, mean="y", proportion="big", by="dom", **extra)
    mean = out.filter((pl.col("statistic") == "mean") & (pl.col("domain") == ""))["se"][0]
    mean_dom = out.filter((pl.col("statistic") == "mean") & (pl.col("domain") == "dom=1"))["se"][0]
    share = out.filter((pl.col("category") == "1") & (pl.col("domain") == "dom=1"))["se"][0]
    # identity: the covariance's diagonal is the two-stage variance of the variance path
    assert np.diag(cov) == pytest.approx(np.array([mean, mean_dom, share]) ** 2, rel=1e-9)


def test_large_sample_taylor_covariance_agrees_with_the_stratified_jackknife() -> None:
    # 3 strata x 40 of 80 PSUs (f_h = 1/2), 12-20 respondents each: the jackknife (with its
    # (1 - f_h) factor, plus the same within-PSU term) and Taylor agree to first order (Wolter 2007,
    # Introduction to Variance Estimation, section 4.5 / 6.x on the asymptotic equivalence, from memory)
    sizes = {"A": (40, 80), "B": (40, 80), "C": (40, 80)}
    frame = _two_stage(11, sizes, (12, 21))
    gt, ratios, layout, _, within, cov = _taylor(frame, sizes, calibrated=False)
    rf = make_replicates("stratified-jackknife", layout.psu_stratum, sampling_fraction=layout.fraction,
                         stratum_labels=layout.stratum_labels)
    theta = ratios.value(gt.totals.sum(axis=0))
    jack = replicate_covariance(theta, ratios.value(replicate_totals(gt, rf)), rf) + layout.second_stage_covariance(within)
    assert np.diag(jack) == pytest.approx(np.diag(cov), rel=0.02)
    corr = cov / np.sqrt(np.outer(np.diag(cov), np.diag(cov)))
    corr_jack = jack / np.sqrt(np.outer(np.diag(jack), np.diag(jack)))
    assert corr_jack == pytest.approx(corr, abs=0.01)
    assert abs(corr[0, 1]) > 0.3  # overlapping estimates: a covariance that matters


def test_missing_product_moments_are_an_error() -> None:
    sizes = {"A": (5, 12), "B": (4, 9)}
    frame = _two_stage(3, sizes, (6, 10))
    gt = group_totals(frame, QUANTITIES, weight="w", strata="h", psu="j", classes="c")
    ratios = _estimands(gt)
    partial = ProductMoments(np.array([[1, 1]]), np.zeros((len(gt.psu), 1)))
    with pytest.raises(ValueError, match="lack"):
        within_psu_covariance(gt, ratios, partial, weight_column=gt.column("one"))
