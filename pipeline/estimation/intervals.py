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
    from scipy import special  # the distribution functions themselves (scipy.stats is slow to import)

    _check_level(level)
    p = 1.0 - (1.0 - level) / 2.0
    if df is None:
        return np.asarray(special.ndtri(p))
    df_arr = np.asarray(df, dtype=np.float64)
    usable = np.isfinite(df_arr) & (df_arr > 0)
    return np.where(usable, special.stdtrit(np.where(usable, df_arr, 1.0), p), special.ndtri(p))


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


# a variance below this share of p(1-p) (an effective base above 1e12) is rounding noise of a
# variance that is 0 (common practice, no source: double precision carries about 16 digits)
RELATIVE_VARIANCE_TOLERANCE = 1e-12


def effective_base(p: np.ndarray, var: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Korn-Graubard effective sample size n* = p(1-p) / v(p), capped at the unweighted base n.

    Cap (deff < 1 gives n* = n, never more): as in the data-presentation standard for proportions
    of the U.S. National Center for Health Statistics (Parker et al. 2017, Vital Health Stat
    2(175)); the rule is quoted from memory, the report's text was not found to confirm it.
    Edges: at p = 0 or p = 1, or when v(p) <= RELATIVE_VARIANCE_TOLERANCE * p(1-p) (a variance that
    is 0 up to rounding), n* = n, so the interval is the Clopper-Pearson interval of the unweighted
    base (Korn & Graubard 1998 use n when the variance is 0, from memory).
    """
    p = np.asarray(p, dtype=np.float64)
    var = np.asarray(var, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    spread = p * (1 - p)
    usable = (p > 0) & (p < 1) & (var > RELATIVE_VARIANCE_TOLERANCE * spread)
    with np.errstate(divide="ignore", invalid="ignore"):
        n_star = np.where(usable, spread / np.where(usable, var, 1.0), n)
    return np.minimum(n_star, n)


def korn_graubard_interval(
    p: np.ndarray, se: np.ndarray, n: np.ndarray, df: float | np.ndarray | None, *, level: float = 0.95
) -> tuple[np.ndarray, np.ndarray]:
    """Korn & Graubard (1998, Survey Methodology 24:193-201) interval for a proportion.

    Clopper-Pearson on the effective sample size n* (`effective_base`: p(1-p)/v(p), capped at n,
    n at p = 0, p = 1 or a zero variance), adjusted for the design df:
    n*_df = n* (t_{n-1, 1-alpha/2} / t_{df, 1-alpha/2})^2, x* = p n*_df, and
        low = Beta^{-1}(alpha/2; x*, n*_df - x* + 1),  high = Beta^{-1}(1 - alpha/2; x* + 1, n*_df - x*)
    with low = 0 when x* = 0 (p = 0) and high = 1 when x* = n*_df (p = 1). So at p = 0 the upper
    limit is 1 - (alpha/2)^(1/n*_df), the Beta(1, n*_df) quantile. NaN when p, se or n is missing
    or n < 1.
    """
    from scipy import special

    _check_level(level)
    p = np.asarray(p, dtype=np.float64)
    se = np.asarray(se, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    n_star = effective_base(p, se**2, n)
    ratio = critical_value(level, np.maximum(n - 1, 1)) / critical_value(level, df)
    n_df = n_star * ratio**2
    bad = ~np.isfinite(p) | ~np.isfinite(se) | ~np.isfinite(n_df) | (n < 1) | (n_df <= 0)
    n_df = np.where(bad, 1.0, n_df)
    x = np.where(bad, 0.5, np.clip(p, 0.0, 1.0) * n_df)
    alpha = 1.0 - level
    at_zero, at_one = x <= 0, x >= n_df
    low = np.where(at_zero, 0.0, special.betaincinv(np.where(at_zero, 1.0, x), n_df - x + 1, alpha / 2))
    high = np.where(at_one, 1.0, special.betaincinv(x + 1, np.where(at_one, 1.0, n_df - x), 1 - alpha / 2))
    return np.where(bad, np.nan, low), np.where(bad, np.nan, high)


def _check_level(level: float) -> None:
    if not 0.0 < level < 1.0:
        raise ValueError(f"confidence level must be between 0 and 1, not {level}")
