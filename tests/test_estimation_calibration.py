"""Taylor variance with calibration residuals (post-stratified weights)."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from pipeline.estimation import estimate


def srs_with_poststrata(seed: int, n: int = 400, population: int = 20_000) -> tuple[pl.DataFrame, np.ndarray]:
    """An invented SRS of n from `population` people in 4 age groups whose population counts are known."""
    rng = np.random.default_rng(seed)
    counts = np.array([0.2, 0.3, 0.35, 0.15]) * population
    cls = rng.choice(4, size=n, p=counts / population)
    y = rng.normal(np.array([20.0, 35.0, 50.0, 65.0])[cls], 8.0)
    n_c = np.bincount(cls, minlength=4)
    frame = pl.DataFrame({"cls": cls, "y": y, "w": counts[cls] / n_c[cls], "w0": np.full(n, population / n)})
    return frame, counts


def test_poststratified_residual_variance_is_the_textbook_formula() -> None:
    frame, counts = srs_with_poststrata(3)
    n, population = frame.height, counts.sum()
    row = estimate(
        frame, weight="w", population_size={"all": float(population)}, mean="y", classes="cls", calibration_matrix=np.eye(4)
    ).row(0, named=True)
    share = counts / population
    stats = frame.group_by("cls").agg(pl.len().alias("n"), pl.col("y").var().alias("s2")).sort("cls")
    n_h, s2 = stats["n"].to_numpy(), stats["s2"].to_numpy()
    f = n / population
    # post-stratified mean sum_h (N_h/N) ybar_h (Lohr 3rd ed. section 4.4, from memory)
    ybar_h = frame.group_by("cls").agg(pl.col("y").mean()).sort("cls")["y"].to_numpy()
    assert row["estimate"] == pytest.approx((share * ybar_h).sum(), rel=1e-12)
    # the residual method e_i = (y_i - ybar_h)/N reduces exactly to
    # (1-f) n/(n-1) sum_h (N_h/N)^2 (n_h-1) s_h^2 / n_h^2 (algebraic identity, derived in taylor.py terms)
    exact = (1 - f) * n / (n - 1) * (share**2 * (n_h - 1) * s2 / n_h**2).sum()
    assert row["se"] ** 2 == pytest.approx(exact, rel=1e-10)
    # Lohr 3rd ed. section 4.4 (from memory): v = (1-f)/n sum_h (N_h/N) s_h^2, the same to O(1/n_h)
    lohr = (1 - f) / n * (share * s2).sum()
    assert row["se"] ** 2 == pytest.approx(lohr, rel=0.05)
    # without the residuals the variance ignores the post-stratification and is far larger
    plain = estimate(frame, weight="w", population_size={"all": float(population)}, mean="y").row(0, named=True)
    assert plain["se"] > 2 * row["se"]


def clustered_sample(seed: int) -> tuple[pl.DataFrame, np.ndarray]:
    """An invented stratified cluster sample (12 strata x 6 PSUs x 15 people) with 4 post-strata."""
    rng = np.random.default_rng(seed)
    h = np.repeat(np.arange(12), 6 * 15)
    j = np.repeat(np.arange(72), 15)
    psu_effect = rng.normal(0, 3, 72)[j]
    cls = rng.choice(4, size=len(h), p=[0.25, 0.3, 0.25, 0.2])
    y = 20 + 10 * cls + psu_effect + rng.normal(0, 6, len(h))
    yes = (rng.uniform(size=len(h)) < 0.2 + 0.15 * cls).astype(np.int64)
    w0 = rng.uniform(50, 150, 72)[j]
    counts = np.array([30_000.0, 25_000.0, 28_000.0, 20_000.0])
    base_c = np.bincount(cls, weights=w0, minlength=4)
    frame = pl.DataFrame({"h": h, "j": j, "cls": cls, "y": y, "yes": yes, "w0": w0, "w": w0 * (counts / base_c)[cls]})
    return frame, counts


def test_taylor_residuals_agree_with_reweighted_jackknife() -> None:
    frame, counts = clustered_sample(11)
    common = {"strata": "h", "psu": "j", "mean": "y", "proportion": "yes", "quantile": ("y", 0.5), "classes": "cls"}
    taylor = estimate(frame, weight="w", calibration_matrix=np.eye(4), **common).sort("statistic", "category")
    # jackknife (E2's stratified delete-one-PSU replicates) replaying the post-stratification in every
    # replicate: f_r(c) = N_c / (replicate base-weight total of c)
    jackknife = estimate(
        frame, weight="w0", variance="stratified-jackknife", reweight=lambda b: counts[None, :] / b, **common
    ).sort("statistic", "category")
    assert jackknife["estimate"].to_numpy() == pytest.approx(taylor["estimate"].to_numpy(), rel=1e-12)
    # the linearization and the jackknife estimate the same variance to first order (Wolter 2007,
    # section 6 comparisons, from memory): within 2 % on 72 PSUs (seeded; 0.4-0.7 % observed)
    assert jackknife["se"].to_numpy() == pytest.approx(taylor["se"].to_numpy(), rel=0.02)
    # and both differ from Taylor without residuals, which ignores the post-stratification
    plain = estimate(frame, weight="w", **common).sort("statistic", "category")
    assert plain["se"][0] > 1.3 * jackknife["se"][0]
    # the replayed recipe gives the final weights w0 f(c): the median is that of the final weights (numpy reference)
    median = np.quantile(frame["y"].to_numpy(), 0.5, weights=frame["w"].to_numpy(), method="inverted_cdf")
    assert jackknife.filter(pl.col("statistic") == "quantile")["estimate"][0] == pytest.approx(median, rel=1e-12)
    assert (jackknife["df"] == taylor["df"]).all()  # both P - H = 60
