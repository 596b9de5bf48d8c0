"""Weighted quantiles and Woodruff intervals.

The weighted distribution function of y in a domain d is
    F(y) = sum_i w_i d_i 1[y_i <= y] / sum_i w_i d_i
and the q-quantile is its left inverse, the smallest observed y with F(y) >= q (Sarndal, Swensson &
Wretman 1992 section 5.11, from memory; with unit weights this is the "inverted CDF" sample
quantile, numpy's method "inverted_cdf").

Whole-number answers (rating scales) can instead take the interpolated quantile of grouped data:
each answer k counts as spread evenly over [k - 1/2, k + 1/2], so the smoothed distribution function
F~ is linear between half-integers and the q-quantile is k - 1/2 + (q W - C(k-)) / W_k, with W the
domain's weight total, C(k-) the weight below k and W_k the weight at k (the usual grouped-data
median, common practice, no source). Its Woodruff interval uses F~ on both sides: the proportion
estimated at q_hat = k - 1/2 + lambda is the mean of 1[y < k] + lambda 1[y = k] (whose weighted mean is
exactly q), and both ends map back through F~^-1, so the interval never collapses on a tie.

Woodruff (1952, JASA 47:635-646) interval: estimate the design variance of the proportion
p = F(q_hat) (an ordinary ratio estimate, linearized or replicated with the full design), form the
interval q -/+ t_df se(p) for F, and map both ends back through F^-1. The quantile's standard
error is the interval half-width divided by t_df (Francisco & Fuller 1991, Ann. Statist.
19:454-469, from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl


@dataclass(frozen=True)
class WeightedCdf:
    """The weighted distribution function of one domain: distinct values and their cumulative weights."""

    values: np.ndarray  # (k,) sorted distinct values
    cumulative: np.ndarray  # (k,) running weight totals

    @property
    def total(self) -> float:
        """The domain's weight total."""
        return float(self.cumulative[-1]) if len(self.cumulative) else 0.0

    def quantile(self, q: np.ndarray | float) -> np.ndarray:
        """F^-1(q) = min{y : F(y) >= q}, q clipped to [0, 1]; NaN for an empty domain."""
        q = np.clip(np.asarray(q, dtype=np.float64), 0.0, 1.0)
        if not len(self.values) or self.total <= 0:
            return np.full(q.shape, np.nan)
        target = q * self.total * (1 - 1e-12)
        idx = np.searchsorted(self.cumulative, target, side="left")
        return self.values[np.minimum(idx, len(self.values) - 1)]

    def interpolated_quantile(self, q: np.ndarray | float) -> np.ndarray:
        """F~^-1(q) of the grouped-data rule (module docstring), q clipped to [0, 1]; NaN for an empty domain."""
        q = np.clip(np.asarray(q, dtype=np.float64), 0.0, 1.0)
        if not len(self.values) or self.total <= 0:
            return np.full(q.shape, np.nan)
        idx, lam = self.interpolation_point(q)
        return self.values[idx] - 0.5 + lam

    def interpolation_point(self, q: np.ndarray | float) -> tuple[np.ndarray, np.ndarray]:
        """(index of the answer k holding F~^-1(q), lambda in [0, 1]): F~^-1(q) = k - 1/2 + lambda."""
        q = np.clip(np.asarray(q, dtype=np.float64), 0.0, 1.0)
        target = q * self.total
        idx = np.minimum(np.searchsorted(self.cumulative, target, side="left"), len(self.values) - 1)
        weight = np.diff(self.cumulative, prepend=0.0)[idx]
        below = self.cumulative[idx] - weight
        return idx, np.clip((target - below) / weight, 0.0, 1.0)


def weighted_cdfs(
    frame: pl.DataFrame, *, value: str, weight: str, domains: dict[str, pl.Expr]
) -> dict[str, WeightedCdf]:
    """The weighted CDF of `value` in each domain (label -> boolean expression; a null counts as
    outside); rows with y missing or a weight that is not positive are left out of F.

    One grouped pass for all domains: the rows are grouped by the value once and each domain's
    weight is summed per value, W_d(y) = sum_i w_i d_i 1[y_i = y]; each domain keeps the values it
    holds (W_d(y) > 0) and its CDF is their running sum.
    """
    if not domains:
        return {}
    names = {label: f"__domain_{k}" for k, label in enumerate(domains)}
    w = pl.col(weight).cast(pl.Float64)
    agg = (
        frame.lazy()
        .filter(pl.col(value).is_not_null() & (pl.col(weight) > 0))
        .group_by(value)
        .agg(pl.when(expr.fill_null(False)).then(w).otherwise(0.0).sum().alias(names[label])
             for label, expr in domains.items())
        .sort(value)
        .collect()
    )
    values = agg[value].cast(pl.Float64).to_numpy()
    out = {}
    for label, name in names.items():
        weights = agg[name].to_numpy()
        held = weights > 0
        out[label] = WeightedCdf(values=values[held], cumulative=np.cumsum(weights[held]))
    return out


def woodruff_interval(
    cdf: WeightedCdf, q: float, se_p: float, t: float, *, interpolated: bool = False
) -> tuple[float, float, float]:
    """(low, high, se): F^-1(q - t se_p), F^-1(q + t se_p), and (high - low) / (2 t) (Woodruff 1952).

    interpolated: map the ends through the grouped-data F~^-1 instead (module docstring)."""
    ends = np.array([q - t * se_p, q + t * se_p])
    low, high = cdf.interpolated_quantile(ends) if interpolated else cdf.quantile(ends)
    se = (high - low) / (2 * t) if np.isfinite(se_p) else np.nan
    return float(low), float(high), float(se)
