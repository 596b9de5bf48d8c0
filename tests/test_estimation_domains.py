"""Domains keep the full design; contrasts of domain means carry their covariance; quantiles."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from scipy import stats

from pipeline.estimation import SampleDesign, estimate, group_totals, taylor_variance
from pipeline.estimation.estimands import Ratios


def sample(seed: int = 5, n: int = 300) -> pl.DataFrame:
    """Invented: 5 strata x 6 PSUs; domain 'club' members are absent from some PSUs."""
    rng = np.random.default_rng(seed)
    h = rng.integers(0, 5, n)
    j = rng.integers(0, 6, n)
    club = np.where(j == 0, "no", rng.choice(["yes", "no"], n))
    return pl.DataFrame(
        {"h": h, "j": j, "w": rng.uniform(1, 3, n), "y": rng.gamma(2.0, 10.0, n).round(2), "club": club}
    )


def manual_variance(frame: pl.DataFrame, z: np.ndarray) -> float:
    """sum_h n_h/(n_h-1) sum_j (z_hj - zbar_h)^2 by a plain loop (Lohr 3rd ed. section 6/7 with replacement, from memory)."""
    v = 0.0
    h, j = frame["h"].to_numpy(), frame["j"].to_numpy()
    for stratum in np.unique(h):
        totals = np.array([z[(h == stratum) & (j == p)].sum() for p in np.unique(j[h == stratum])])
        v += len(totals) / (len(totals) - 1) * ((totals - totals.mean()) ** 2).sum()
    return v


def test_domain_variance_uses_every_psu_not_a_row_subset() -> None:
    frame = sample()
    row = estimate(frame, weight="w", strata="h", psu="j", mean="y", by="club").filter(pl.col("domain") == "club=yes").row(0, named=True)
    w, y = frame["w"].to_numpy(), frame["y"].to_numpy()
    d = (frame["club"] == "yes").to_numpy().astype(float)
    mean = (w * d * y).sum() / (w * d).sum()
    full = manual_variance(frame, w * d * (y - mean) / (w * d).sum())
    assert row["se"] ** 2 == pytest.approx(full, rel=1e-10)  # domain estimation (Lohr 3rd ed. section 4.3 / 14.x, from memory)
    subset = frame.filter(pl.col("club") == "yes")
    wrong = estimate(subset, weight="w", strata="h", psu="j", mean="y").row(0, named=True)
    assert wrong["estimate"] == pytest.approx(row["estimate"], rel=1e-12)
    assert wrong["se"] != pytest.approx(row["se"], rel=1e-3)  # subsetting drops the PSUs without members
    # per-domain df: PSUs holding club members minus strata holding them (Korn & Graubard 1999,
    # Analysis of Health Surveys, section 5.2, from memory), counted here from the rows
    members = frame.filter(pl.col("club") == "yes")
    assert row["df"] == members.select("h", "j").unique().height - members["h"].n_unique()


def test_difference_of_domain_means_includes_covariance() -> None:
    frame = sample(8)
    quantities = {
        "yes": (pl.col("club") == "yes").cast(pl.Float64),
        "no": (pl.col("club") == "no").cast(pl.Float64),
        "y_yes": pl.col("y") * (pl.col("club") == "yes"),
        "y_no": pl.col("y") * (pl.col("club") == "no"),
    }
    gt = group_totals(frame, quantities, weight="w", strata="h", psu="j")
    layout = SampleDesign(weight="w", strata="h", psu="j").layout(gt)
    ratios = Ratios(num=[gt.column("y_yes"), gt.column("y_no")], den=[gt.column("yes"), gt.column("no")])
    theta, cov = taylor_variance(gt, ratios, layout, covariance=True)
    diff, v_diff = taylor_variance(gt, ratios.contrast([[1.0, -1.0]]), layout)
    assert diff[0] == pytest.approx(theta[0] - theta[1], rel=1e-12)
    # var(a - b) = var a + var b - 2 cov(a, b) (identity), and cov != 0 because both share PSUs
    assert v_diff[0] == pytest.approx(cov[0, 0] + cov[1, 1] - 2 * cov[0, 1], rel=1e-10)
    assert abs(cov[0, 1]) > 1e-6 * cov[0, 0]
    # by hand: z_i = d_a (y - mean_a)/N_a - d_b (y - mean_b)/N_b
    w, y = frame["w"].to_numpy(), frame["y"].to_numpy()
    a = (frame["club"] == "yes").to_numpy()
    b = ~a
    z = w * (a * (y - theta[0]) / (w * a).sum() - b * (y - theta[1]) / (w * b).sum())
    assert v_diff[0] == pytest.approx(manual_variance(frame, z), rel=1e-10)


def test_quantiles_match_numpy_inverted_cdf() -> None:
    frame = sample(2)
    out = estimate(frame, weight="w", strata="h", psu="j", quantile=[("y", 0.25), ("y", 0.5), ("y", 0.9)])
    y, w = frame["y"].to_numpy(), frame["w"].to_numpy()
    for row in out.iter_rows(named=True):
        q = float(row["category"])
        # weighted left-inverse of the CDF: numpy.quantile(method="inverted_cdf", weights=...) (reference library)
        assert row["estimate"] == pytest.approx(np.quantile(y, q, weights=w, method="inverted_cdf"), rel=1e-12)
        assert row["ci_low"] <= row["estimate"] <= row["ci_high"]
    unit = estimate(frame.with_columns(w=pl.lit(1.0)), weight="w", quantile=("y", 0.5)).row(0, named=True)
    assert unit["estimate"] == pytest.approx(np.quantile(y, 0.5, method="inverted_cdf"))


def test_woodruff_interval_maps_the_proportion_interval_back() -> None:
    frame = sample(4)
    level = 0.9
    row = estimate(frame, weight="w", strata="h", psu="j", quantile=("y", 0.5), level=level).row(0, named=True)
    below = frame.with_columns(below=(pl.col("y") <= row["estimate"]).cast(pl.Int64))
    p = estimate(below, weight="w", strata="h", psu="j", proportion="below").filter(pl.col("category") == "1").row(0, named=True)
    t = stats.t.ppf(0.95, p["df"])
    y, w = frame["y"].to_numpy(), frame["w"].to_numpy()
    # Woodruff (1952): F^-1(0.5 -/+ t se(p)) with p = F(q_hat); numpy's weighted inverted CDF as F^-1
    assert row["ci_low"] == pytest.approx(np.quantile(y, 0.5 - t * p["se"], weights=w, method="inverted_cdf"))
    assert row["ci_high"] == pytest.approx(np.quantile(y, 0.5 + t * p["se"], weights=w, method="inverted_cdf"))
    assert row["se"] == pytest.approx((row["ci_high"] - row["ci_low"]) / (2 * t), rel=1e-12)
    # a quantile carries no design effect (the proportion's is not the median's), and says so
    assert row["deff"] is None and row["n_eff"] is None and "no design effect" in row["reason"]


def test_quantile_in_domains() -> None:
    frame = sample(6)
    out = estimate(frame, weight="w", strata="h", psu="j", quantile=("y", 0.5), by="club").sort("domain")
    for row in out.iter_rows(named=True):
        keep = frame if not row["domain"] else frame.filter(pl.col("club") == row["domain"].split("=")[1])
        expected = np.quantile(keep["y"].to_numpy(), 0.5, weights=keep["w"].to_numpy(), method="inverted_cdf")
        assert row["estimate"] == pytest.approx(expected)  # numpy reference (weighted inverted CDF)
