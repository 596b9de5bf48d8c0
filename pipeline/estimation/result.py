"""Result objects: one `Estimate` with named fields and a `ci()` method; `EstimateTable` for many cells."""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Literal

import numpy as np
import polars as pl

from pipeline.estimation import intervals

IntervalKind = Literal["t", "logit", "korn-graubard"]

COLUMNS: tuple[str, ...] = (
    "statistic",
    "variable",
    "category",
    "domain",
    "estimate",
    "se",
    "ci_low",
    "ci_high",
    "df",
    "deff",
    "n",
    "n_eff",
    "reason",
)


@dataclass(frozen=True)
class Estimate:
    """One design-based estimate.

    statistic: "mean", "total", "proportion", "ratio" or "quantile"; category: the category of a
    proportion (or the probability of a quantile) else ""; domain: "" for the whole sample or
    "VAR=VALUE"; df: design degrees of freedom (None = normal); n: unweighted base; n_eff = n / deff;
    method: "taylor" or the replicate method; reason: why the estimate is missing ("" when it is not).
    """

    statistic: str
    variable: str
    category: str
    domain: str
    estimate: float
    se: float
    df: float | None
    deff: float
    n: int
    n_eff: float
    method: str
    reason: str = ""

    @property
    def deft(self) -> float:
        """sqrt(deff) (Kish 1965 section 8.2)."""
        return math.sqrt(self.deff) if self.deff >= 0 else math.nan

    @property
    def cv(self) -> float:
        """Coefficient of variation se / |estimate|."""
        return self.se / abs(self.estimate) if self.estimate else math.nan

    def ci(self, level: float = 0.95, kind: IntervalKind = "t") -> tuple[float, float]:
        """Confidence interval: "t" (estimate -/+ t_df se), or for proportions "logit" or "korn-graubard".

        A quantile's `se` is the Woodruff-interval half-width divided by t, so its "t" interval is
        symmetric; the asymmetric Woodruff interval is what `estimate()` reports in ci_low/ci_high.
        """
        low, high = interval(
            np.array([self.estimate]), np.array([self.se]), np.array([self.n]), self.df, level=level, kind=kind,
            proportion=self.statistic == "proportion",
        )
        return float(low[0]), float(high[0])


def interval(
    estimate: np.ndarray,
    se: np.ndarray,
    n: np.ndarray,
    df: float | np.ndarray | None,
    *,
    level: float,
    kind: IntervalKind,
    proportion: bool | np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """Dispatch to the interval functions ("logit" and "korn-graubard" for proportions only)."""
    if kind == "t":
        return intervals.t_interval(estimate, se, df, level=level)
    if kind not in ("logit", "korn-graubard"):
        raise ValueError(f"interval kind must be 't', 'logit' or 'korn-graubard', not {kind!r}")
    if not np.all(proportion):
        raise ValueError(f"the {kind} interval is for proportions only")
    if kind == "logit":
        return intervals.logit_interval(estimate, se, df, level=level)
    return intervals.korn_graubard_interval(estimate, se, n, df, level=level)


@dataclass(frozen=True)
class EstimateTable:
    """Many estimates as one polars DataFrame with the columns of `COLUMNS` plus `method`."""

    frame: pl.DataFrame

    def __len__(self) -> int:
        return self.frame.height

    def __iter__(self) -> Iterator[Estimate]:
        for row in self.frame.iter_rows(named=True):
            yield Estimate(
                statistic=row["statistic"],
                variable=row["variable"],
                category=row["category"],
                domain=row["domain"],
                estimate=_num(row["estimate"]),
                se=_num(row["se"]),
                df=row["df"],
                deff=_num(row["deff"]),
                n=int(row["n"]),
                n_eff=_num(row["n_eff"]),
                method=row["method"],
                reason=row["reason"],
            )

    def with_ci(self, *, level: float = 0.95, kind: IntervalKind = "t") -> EstimateTable:
        """A copy whose ci_low / ci_high are recomputed at `level` with `kind` (proportion rows only for logit/KG)."""
        f = self.frame
        prop = (f["statistic"] == "proportion").to_numpy()
        est, se = f["estimate"].to_numpy().astype(float), f["se"].to_numpy().astype(float)
        df = f["df"].to_numpy().astype(float)
        if kind == "t":
            low, high = intervals.t_interval(est, se, df, level=level)
        else:
            low, high = np.full(len(f), np.nan), np.full(len(f), np.nan)
            if prop.any():
                n = f["n"].to_numpy()[prop]
                lo, hi = interval(est[prop], se[prop], n, df[prop], level=level, kind=kind, proportion=True)
                low[prop], high[prop] = lo, hi
        return EstimateTable(f.with_columns(ci_low=pl.Series(low), ci_high=pl.Series(high)))


def _num(value: float | None) -> float:
    return math.nan if value is None else float(value)
