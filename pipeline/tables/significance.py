"""Column tests: within each break every pair of columns, and every column against the Total.

For cells a and b of one stub row (two columns of one break, or a column and the Total) the test
statistic is

    t = (theta_a - theta_b) / se(theta_a - theta_b),    two-sided p = 2 P(T_df > |t|)

where the variance of the difference is the design variance of the linear contrast, covariance
included (`pipeline.tables.fit.FitState.difference_variance`: Taylor with calibration residuals, or
replicates), and df is the smaller of the two cells' domain degrees of freedom (common practice,
no source). Under simple random sampling with equal weights and two columns that share no
respondent it reduces to the two-sample test of proportions (`tests/test_tables_significance.py`
derives both that and the part-whole form of the column-vs-Total test).

A cell is tested only when both cells have at least `low_base` respondents, are not suppressed,
and are not set by the weighting. Optional multiplicity control within a stub row (all the row's
pair and Total tests of one wave and banner): Holm (1979, Scand. J. Statist. 6:65-70) step-down
adjusted p-values, or Benjamini and Hochberg (1995, JRSS B 57:289-300) step-up adjusted p-values.

Marks: a cell lists, in `sig_higher_than`, the letters of the columns of its own break it is
significantly higher than at the first (strongest) level, and in `sig_higher_than_lighter` those
significant only at the second level; `vs_total` is "higher" or "lower" when the column differs
from the Total at the first level.
"""

from __future__ import annotations

import numpy as np
import polars as pl
from scipy import special

from pipeline.tables.spec import TablesSpec

TEST_COLUMNS: dict[str, pl.DataType] = {
    "comparison": pl.String(),
    "wave": pl.String(),
    "wave_b": pl.String(),
    "table": pl.String(),
    "variable": pl.String(),
    "row": pl.Int32(),
    "banner": pl.String(),
    "column_a": pl.String(),
    "column_b": pl.String(),
    "difference": pl.Float64(),
    "se_difference": pl.Float64(),
    "statistic": pl.Float64(),
    "df_num": pl.Float64(),
    "df_den": pl.Float64(),
    "p_value": pl.Float64(),
    "p_adjusted": pl.Float64(),
    "significant": pl.Boolean(),
    "significant_lighter": pl.Boolean(),
}
TESTED = ("percent", "balance", "mean")
KEY = ["wave", "table", "row", "banner"]


def testable(cells: pl.DataFrame, spec: TablesSpec) -> pl.Expr:
    """Cells that may be tested: a percentage or mean with a number, a base of at least `low_base`, not set by weighting."""
    return (
        pl.col("statistic").is_in(TESTED)
        & pl.col("estimate").is_not_null()
        & (pl.col("base_unweighted") >= max(spec.low_base, 1))
        & ~pl.col("flags").str.contains("suppressed|empty-column|set-by-weighting")
    )


def _pairs(cells: pl.DataFrame, spec: TablesSpec) -> pl.DataFrame:
    """Every tested pair: columns of one break (a before b in banner order), and each column with its Total."""
    keep = ["wave", "table", "variable", "row", "banner", "column", "break_variable", "estimate", "df", "estimator",
            "statistic"]
    ok = cells.filter(testable(cells, spec)).select(keep)
    cols = ok.filter(pl.col("break_variable") != "")
    within = cols.join(cols, on=[*KEY, "break_variable"], suffix="_b").filter(pl.col("estimator") < pl.col("estimator_b"))
    total = ok.filter(pl.col("break_variable") == "").select(*KEY, "column", "estimate", "df", "estimator")
    versus = cols.join(total, on=KEY, suffix="_b")
    return pl.concat(
        [within.with_columns(comparison=pl.lit("columns")).select(_PAIR),
         versus.with_columns(comparison=pl.lit("total")).select(_PAIR)]
    )


_PAIR = ["comparison", *KEY, "variable", "statistic", "column", "column_b", "estimate", "estimate_b", "df", "df_b",
         "estimator", "estimator_b"]


def adjust(p: pl.Expr, method: str, group: list[str]) -> pl.Expr:
    """Adjusted p-values within `group`: "none", Holm (step-down) or Benjamini-Hochberg (step-up) (module docstring).

    Holm: with p_(1) <= ... <= p_(k), p~_(i) = max_{j <= i} min(1, (k - j + 1) p_(j)).
    BH: p~_(i) = min_{j >= i} min(1, k p_(j) / j). Untested rows (p null) are not counted in k.
    """
    if method == "none":
        return p
    k = p.count().over(group)
    rank = p.rank("ordinal").over(group)
    if method == "holm":
        return ((k - rank + 1) * p).clip(upper_bound=1.0).cum_max().over(group, order_by=p)
    return (k * p / rank).clip(upper_bound=1.0).cum_min(reverse=True).over(group, order_by=p)


def column_tests(cells: pl.DataFrame, state: object, spec: TablesSpec, wave_plan: object) -> pl.DataFrame:
    """The pair and Total tests of one wave's cells (`TEST_COLUMNS`); `wave_plan` names the products
    of the paired cells' quantities for the within-PSU term (`cells.WavePlan.pair_cross`)."""
    pairs = _pairs(cells, spec)
    if pairs.height == 0:
        return pl.DataFrame(schema=TEST_COLUMNS)
    a = pairs["estimator"].to_numpy()
    b = pairs["estimator_b"].to_numpy()
    scale = np.where(np.isin(pairs["statistic"].to_numpy(), ["percent", "balance"]), 100.0, 1.0)
    cross = None
    if state.within is not None:  # type: ignore[attr-defined]
        cross = state.cross(wave_plan.pair_cross(a, b))  # type: ignore[attr-defined]
    var = state.difference_variance(a, b, cross) * scale**2  # type: ignore[attr-defined]
    diff = (pairs["estimate"] - pairs["estimate_b"]).to_numpy()
    se = np.sqrt(np.maximum(var, 0.0))
    df = np.minimum(pairs["df"].to_numpy(), pairs["df_b"].to_numpy())
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(se > 0, diff / se, np.nan)
    p = 2 * special.stdtr(df, -np.abs(t))  # t survival function
    out = pairs.select(
        "comparison", "wave", "table", "variable", "row", "banner",
        pl.col("column").alias("column_a"), pl.col("column_b"),
    ).with_columns(
        wave_b=pl.lit(None, dtype=pl.String),
        difference=pl.Series(diff),
        se_difference=pl.Series(se),
        statistic=pl.Series(t),
        df_num=pl.lit(1.0),
        df_den=pl.Series(df.astype(float)),
        p_value=pl.Series(p),
    ).with_columns(pl.col(c).fill_nan(None) for c in ("se_difference", "statistic", "p_value"))
    return mark(out, spec, group=KEY)


def mark(tests: pl.DataFrame, spec: TablesSpec, *, group: list[str]) -> pl.DataFrame:
    """p_adjusted (within `group`), significant at the first level and significant only at the second."""
    out = tests.with_columns(p_adjusted=adjust(pl.col("p_value"), spec.adjust, group))
    first = spec.levels[0]
    second = spec.levels[1] if len(spec.levels) > 1 else None
    significant = (pl.col("p_adjusted") < first).fill_null(False)
    lighter = ((pl.col("p_adjusted") < second) & ~significant).fill_null(False) if second else pl.lit(False)
    return out.with_columns(significant=significant, significant_lighter=lighter).select(list(TEST_COLUMNS))


def letters(cells: pl.DataFrame, tests: pl.DataFrame) -> pl.DataFrame:
    """`cells` with sig_higher_than, sig_higher_than_lighter (letters, in banner order) and vs_total."""
    lookup = cells.select(*KEY, "column", "letter", "estimator")
    pair = tests.filter(pl.col("comparison") == "columns")
    higher = pl.concat([
        pair.select(*KEY, pl.col("column_a").alias("column"), pl.col("column_b").alias("other"), "significant",
                    "significant_lighter", (pl.col("difference") > 0).alias("up")),
        pair.select(*KEY, pl.col("column_b").alias("column"), pl.col("column_a").alias("other"), "significant",
                    "significant_lighter", (pl.col("difference") < 0).alias("up")),
    ]).filter(pl.col("up")).join(
        lookup.select(*KEY, pl.col("column").alias("other"), pl.col("letter").alias("other_letter"),
                      pl.col("estimator").alias("other_position")),
        on=[*KEY, "other"],
    ).sort("other_position")
    marks = higher.group_by([*KEY, "column"], maintain_order=True).agg(
        sig_higher_than=pl.col("other_letter").filter(pl.col("significant")).str.join(""),
        sig_higher_than_lighter=pl.col("other_letter").filter(pl.col("significant_lighter")).str.join(""),
    )
    total = tests.filter((pl.col("comparison") == "total") & pl.col("significant")).select(
        *KEY, pl.col("column_a").alias("column"),
        vs_total=pl.when(pl.col("difference") > 0).then(pl.lit("higher")).otherwise(pl.lit("lower")),
    )
    return (
        cells.join(marks, on=[*KEY, "column"], how="left")
        .join(total, on=[*KEY, "column"], how="left")
        .with_columns(pl.col("sig_higher_than", "sig_higher_than_lighter", "vs_total").fill_null(""))
    )
