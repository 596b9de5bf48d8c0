"""Critical values, t / logit / Korn-Graubard intervals, and the Estimate result object."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from pipeline.estimation.intervals import critical_value, korn_graubard_interval, logit_interval, t_interval
from pipeline.estimation.result import Estimate


@pytest.mark.parametrize(
    ("level", "df", "expected"),
    [
        (0.90, None, 1.645),  # normal 95th percentile, handbook value (scipy.stats.norm.ppf(0.95) = 1.6449)
        (0.95, None, 1.960),  # handbook value
        (0.99, None, 2.576),  # handbook value
        (0.90, 29, 1.699),  # t table, 29 df, two-sided 90% (handbook value; scipy.stats.t.ppf(0.95, 29))
        (0.95, np.inf, 1.960),  # infinite df is the normal
    ],
)
def test_critical_values_are_handbook_values(level: float, df: float | None, expected: float) -> None:
    assert float(critical_value(level, df)) == pytest.approx(expected, abs=5e-4)


def test_t_interval_uses_t_quantile() -> None:
    low, high = t_interval(np.array([10.0]), np.array([2.0]), 29, level=0.90)
    # estimate -/+ t_{29, 0.95} se with t from scipy (reference library)
    half = stats.t.ppf(0.95, 29) * 2.0
    assert (low[0], high[0]) == pytest.approx((10 - half, 10 + half), rel=1e-12)


def test_logit_interval_matches_direct_computation() -> None:
    p, se, df = 0.2, 0.03, 40
    low, high = logit_interval(np.array([p]), np.array([se]), df, level=0.95)
    # identity: expit(logit(p) -/+ t se / (p (1-p))) computed with scipy.special
    from scipy.special import expit, logit

    t = stats.t.ppf(0.975, df)
    assert low[0] == pytest.approx(expit(logit(p) - t * se / (p * (1 - p))), rel=1e-12)
    assert high[0] == pytest.approx(expit(logit(p) + t * se / (p * (1 - p))), rel=1e-12)
    assert 0 < low[0] < p < high[0] < 1


def test_logit_interval_undefined_at_zero_and_one() -> None:
    low, high = logit_interval(np.array([0.0, 1.0]), np.array([0.0, 0.0]), 10, level=0.95)
    assert np.isnan(low).all() and np.isnan(high).all()


def kg_direct(p: float, se: float, n: int, df: float, level: float) -> tuple[float, float]:
    """Korn & Graubard (1998) written out with scipy.stats.beta (identity check of our vectorised code)."""
    alpha = 1 - level
    n_star = p * (1 - p) / se**2 if se > 0 else n
    n_df = n_star * (stats.t.ppf(1 - alpha / 2, n - 1) / stats.t.ppf(1 - alpha / 2, df)) ** 2
    x = p * n_df
    low = 0.0 if x == 0 else stats.beta.ppf(alpha / 2, x, n_df - x + 1)
    high = 1.0 if x == n_df else stats.beta.ppf(1 - alpha / 2, x + 1, n_df - x)
    return low, high


@pytest.mark.parametrize(
    ("p", "se", "n", "df"),
    [(0.3, 0.04, 500, 30), (0.02, 0.008, 1200, 15), (0.0, 0.0, 80, 12), (1.0, 0.0, 80, 12), (0.5, 0.05, 100, 99)],
)
def test_korn_graubard_matches_beta_quantiles(p: float, se: float, n: int, df: float) -> None:
    low, high = korn_graubard_interval(np.array([p]), np.array([se]), np.array([n]), df, level=0.95)
    assert (low[0], high[0]) == pytest.approx(kg_direct(p, se, n, df, 0.95), rel=1e-10, abs=1e-14)


def test_korn_graubard_edges_are_clopper_pearson_on_n() -> None:
    low, high = korn_graubard_interval(np.array([0.0, 1.0]), np.zeros(2), np.array([50, 50]), 49, level=0.95)
    # p = 0 with df = n - 1: the exact Clopper-Pearson upper limit 1 - (alpha/2)^(1/n) (identity)
    assert low[0] == 0.0 and high[0] == pytest.approx(1 - 0.025 ** (1 / 50), rel=1e-10)
    assert high[1] == 1.0 and low[1] == pytest.approx(0.025 ** (1 / 50), rel=1e-10)


def test_korn_graubard_with_srs_variance_is_near_clopper_pearson() -> None:
    # SRS variance p(1-p)/n and df = n - 1: n* = n, so the interval is Clopper-Pearson on (x, n)
    # (identity; Clopper-Pearson from scipy.stats.binomtest)
    n, x = 60, 12
    p = x / n
    low, high = korn_graubard_interval(np.array([p]), np.array([math.sqrt(p * (1 - p) / n)]), np.array([n]), n - 1, level=0.95)
    cp = stats.binomtest(x, n).proportion_ci(0.95, method="exact")
    assert (low[0], high[0]) == pytest.approx((cp.low, cp.high), rel=1e-9)


def test_estimate_ci_kinds() -> None:
    e = Estimate("proportion", "q1", "2", "", 0.25, 0.02, 30, 1.5, 900, 600.0, "taylor")
    t_low, t_high = e.ci(0.95)
    assert (t_low, t_high) == pytest.approx((0.25 - stats.t.ppf(0.975, 30) * 0.02, 0.25 + stats.t.ppf(0.975, 30) * 0.02))
    assert e.ci(0.95, "korn-graubard") == pytest.approx(kg_direct(0.25, 0.02, 900, 30, 0.95), rel=1e-10)
    logit_low, logit_high = e.ci(0.90, "logit")
    assert logit_low < 0.25 < logit_high
    assert e.deft == pytest.approx(math.sqrt(1.5))
    mean = Estimate("mean", "age", "", "", 40.0, 1.0, None, 2.0, 100, 50.0, "taylor")
    with pytest.raises(ValueError, match="proportions only"):
        mean.ci(0.95, "logit")
    with pytest.raises(ValueError, match="between 0 and 1"):
        mean.ci(1.5)


def test_estimate_table_rows_and_recomputed_intervals() -> None:
    import polars as pl

    from pipeline.estimation import estimate_table

    rng = np.random.default_rng(2)
    frame = pl.DataFrame({"w": rng.uniform(1, 2, 80), "y": rng.normal(size=80), "q": rng.integers(0, 2, 80), "j": np.arange(80) // 4})
    table = estimate_table(frame, weight="w", psu="j", mean="y", proportion="q")
    rows = list(table)
    assert len(table) == 3 and [r.statistic for r in rows] == ["mean", "proportion", "proportion"]
    prop = rows[2]
    assert prop.method == "taylor" and prop.df == 19 and prop.n == 80  # n is the base: everyone who answered
    assert prop.n_eff == pytest.approx(prop.n / prop.deff)
    kg = table.with_ci(kind="korn-graubard", level=0.9).frame
    assert np.isnan(kg["ci_low"][0])  # a mean has no Korn-Graubard interval
    # the table's KG limits are those of the single Estimate (same function, identity)
    assert (kg["ci_low"][2], kg["ci_high"][2]) == pytest.approx(prop.ci(0.9, "korn-graubard"), rel=1e-12)
    narrow = table.with_ci(level=0.5).frame
    assert (narrow["ci_high"] - narrow["ci_low"] < table.frame["ci_high"] - table.frame["ci_low"]).all()
