"""Confidence intervals and degrees of freedom for design-based estimates.

Degrees of freedom: Taylor uses the number of PSUs minus the number of strata (Korn & Graubard
1999, Analysis of Health Surveys, section 5.2, from memory); replicate methods use
`pipeline.estimation.replicate_variance.replicate_df`.
A df of None means the normal distribution (infinite df).

All functions are vectorised over numpy arrays of estimates.
"""

from __future__ import annotations

import numpy as np


def critical_value(level: float, df: float | np.ndarray | None) -> np.ndarray:
    """Two-sided critical value t_{df, 1-(1-level)/2} (normal quantile when df is None, inf or <= 0)."""
    from scipy import stats

    _check_level(level)
    p = 1.0 - (1.0 - level) / 2.0
    if df is None:
        return np.asarray(stats.norm.ppf(p))
    df_arr = np.asarray(df, dtype=np.float64)
    usable = np.isfinite(df_arr) & (df_arr > 0)
    return np.where(usable, stats.t.ppf(p, np.where(usable, df_arr, 1.0)), stats.norm.ppf(p))


def t_interval(
    estimate: np.ndarray, se: np.ndarray, df: float | np.ndarray | None, *, level: float = 0.95
) -> tuple[np.ndarray, np.ndarray]:
    """estimate -/+ t_{df, 1-alpha/2} * se (Lohr 3rd ed. section 2.5 / 9.6, from memory)."""
    half = critical_value(level, df) * np.asarray(se, dtype=np.float64)
    est = np.asarray(estimate, dtype=np.float64)
    return est - half, est + half


def logit_interval(
    p: np.ndarray, se: np.ndarray, df: float | np.ndarray | None, *, level: float = 0.95
) -> tuple[np.ndarray, np.ndarray]:
    """Interval for a proportion built on the logit scale and mapped back.

    l = log(p / (1-p)), se(l) = se(p) / (p (1-p)) (delta method), interval
    expit(l -/+ t_{df} se(l)) (Korn & Graubard 1999 section 5.2, from memory). Undefined (NaN) at
    p = 0 and p = 1; use the Korn-Graubard interval there.
    """
    p = np.asarray(p, dtype=np.float64)
    inside = (p > 0) & (p < 1)
    safe = np.where(inside, p, 0.5)
    logit = np.log(safe / (1 - safe))
    half = critical_value(level, df) * np.asarray(se, dtype=np.float64) / (safe * (1 - safe))
    low = 1.0 / (1.0 + np.exp(-(logit - half)))
    high = 1.0 / (1.0 + np.exp(-(logit + half)))
    return np.where(inside, low, np.nan), np.where(inside, high, np.nan)


def korn_graubard_interval(
    p: np.ndarray, se: np.ndarray, n: np.ndarray, df: float | np.ndarray | None, *, level: float = 0.95
) -> tuple[np.ndarray, np.ndarray]:
    """Korn & Graubard (1998, Survey Methodology 24:193-201) interval for a proportion.

    Clopper-Pearson on the effective sample size n* = p(1-p) / v(p), adjusted for the design df:
    n*_df = n* (t_{n-1, 1-alpha/2} / t_{df, 1-alpha/2})^2, x* = p n*_df, and
        low = Beta^{-1}(alpha/2; x*, n*_df - x* + 1),  high = Beta^{-1}(1 - alpha/2; x* + 1, n*_df - x*)
    with low = 0 when x* = 0 and high = 1 when x* = n*_df. When v(p) = 0 (including p = 0 or 1)
    n* is the unweighted base n (from memory).
    """
    from scipy import stats

    _check_level(level)
    p = np.asarray(p, dtype=np.float64)
    var = np.asarray(se, dtype=np.float64) ** 2
    n = np.asarray(n, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        n_star = np.where(var > 0, p * (1 - p) / var, n)
    ratio = critical_value(level, np.maximum(n - 1, 1)) / critical_value(level, df)
    n_df = n_star * ratio**2
    x = p * n_df
    alpha = 1.0 - level
    with np.errstate(divide="ignore", invalid="ignore"):
        low = np.where(x > 0, stats.beta.ppf(alpha / 2, np.maximum(x, 1e-300), n_df - x + 1), 0.0)
        high = np.where(x < n_df, stats.beta.ppf(1 - alpha / 2, x + 1, np.maximum(n_df - x, 1e-300)), 1.0)
    bad = ~np.isfinite(p) | ~np.isfinite(n_df) | (n_df <= 0)
    return np.where(bad, np.nan, low), np.where(bad, np.nan, high)


def _check_level(level: float) -> None:
    if not 0.0 < level < 1.0:
        raise ValueError(f"confidence level must be between 0 and 1, not {level}")
