"""The tidy cells export: one row per number the book shows, written beside the book.

`tidy_cells(cells)` turns the long cell frame of a run (`pipeline.tables.topline` rows with the estimate
columns of `pipeline.tables.weighted_cells` joined on) into the frame `EXPORT_SCHEMA` describes, and
`write_cells(export, book_path, stem)` writes it as `<stem>_cells.parquet` and `<stem>_cells.csv`
in the book's folder (the run checks both paths with the book's, `pipeline.outputs.check_output`). The book renders its numbers from this same frame (`pipeline.book`), so the
two cannot disagree.

Columns, one row per (wave, table, row, banner, column, statistic):

  wave, table, variable     wave id; the table (for toplines the variable's own table, named as
                            the variable); the variable (a multiple-response set's name)
  row, row_label            the row's position in its table and its label
  banner, column,           the banner and its column; "total" / "total" / "Total" for toplines
  column_label
  statistic                 "percent" (a share 0-1), "mean", "median", "minimum", "maximum",
                            "balance" (a share of one side minus a share of the other, -1 to 1)
                            or "count" (the unweighted respondents of a row: a base row, the count
                            shown beneath a percentage, the number of answers of a statistic)
  estimate, se,             the figure; in a weighted book the design-based estimate with its
  ci_low, ci_high,          standard error, interval, degrees of freedom and design effect
  df, deff                  (null where the book shows an unweighted figure)
  base_unweighted           respondents in the row's base
  base_weighted             sum of final weights over the base (weighted books)
  base_effective            effective base n / deff (weighted books; null for a figure set by
                            the weighting, whose design effect is undefined)
  flags                     ";"-separated: "very-low-base", "low-base" (thresholds of
                            `pipeline.book`), "set-by-weighting"

No respondent-level value or id is ever part of it: every row is an aggregate.
"""

from __future__ import annotations

from pathlib import Path

import polars as pl

EXPORT_SCHEMA: dict[str, pl.DataType] = {
    "wave": pl.String(),
    "table": pl.String(),
    "variable": pl.String(),
    "row": pl.Int32(),
    "row_label": pl.String(),
    "banner": pl.String(),
    "column": pl.String(),
    "column_label": pl.String(),
    "statistic": pl.String(),
    "estimate": pl.Float64(),
    "se": pl.Float64(),
    "ci_low": pl.Float64(),
    "ci_high": pl.Float64(),
    "df": pl.Float64(),
    "deff": pl.Float64(),
    "base_unweighted": pl.Int64(),
    "base_weighted": pl.Float64(),
    "base_effective": pl.Float64(),
    "flags": pl.String(),
}
TOTAL = "total"
TOTAL_LABEL = "Total"
PERCENT_KINDS = ("category", "excluded", "net", "item", "missing", "not-asked")
STATISTIC_NAMES = {"n": "count", "mean": "mean", "median": "median", "min": "minimum", "max": "maximum"}
ESTIMATED = ("estimate", "se", "ci_low", "ci_high", "df", "deff", "n_eff", "weighted_base", "set_by_weighting")
# Low-base thresholds: common practice, no source (trade rules of thumb for unweighted bases);
# `pipeline.book` shows the same marks.
LOW_BASE = 50
VERY_LOW_BASE = 30


def _with_estimate_columns(cells: pl.DataFrame) -> pl.DataFrame:
    """The cells with every estimate column present (null in an unweighted run)."""
    missing = {
        "estimate": pl.Float64, "se": pl.Float64, "ci_low": pl.Float64, "ci_high": pl.Float64, "df": pl.Float64,
        "deff": pl.Float64, "n_eff": pl.Float64, "weighted_base": pl.Float64, "set_by_weighting": pl.Boolean,
    }
    return cells.with_columns(pl.lit(None, dtype=t).alias(c) for c, t in missing.items() if c not in cells.columns)


def tidy_cells(cells: pl.DataFrame) -> pl.DataFrame:
    """The export frame (module docstring) of a run's long cell frame, in the cells' row order.

    Percentages are shares: estimate, se and interval divided by 100. A row without a weighted
    estimate (an unweighted book, a base row, minimum and maximum) carries the unweighted figure
    in `estimate` and nulls in se, ci_low, ci_high, df and deff.
    """
    c = _with_estimate_columns(cells).with_row_index("__order")
    kind, code = pl.col("row_kind"), pl.col("code")
    weighted = pl.col("estimate").is_not_null()
    flag_base = (
        pl.when(pl.col("base").is_null() | (pl.col("base") == 0)).then(None)
        .when(pl.col("base") < VERY_LOW_BASE).then(pl.lit("very-low-base"))
        .when(pl.col("base") < LOW_BASE).then(pl.lit("low-base"))
    )
    set_flag = pl.when(pl.col("set_by_weighting").fill_null(False) & weighted).then(pl.lit("set-by-weighting"))
    common = [
        pl.col("wave"), pl.col("variable").alias("table"), pl.col("variable"), pl.col("row_order").alias("row"),
        pl.col("row_label"), pl.lit(TOTAL).alias("banner"), pl.lit(TOTAL).alias("column"),
        pl.lit(TOTAL_LABEL).alias("column_label"),
    ]

    percent = c.filter(kind.is_in(PERCENT_KINDS)).select(
        "__order", pl.lit(0).alias("__part"), *common, pl.lit("percent").alias("statistic"),
        pl.when(weighted).then(pl.col("estimate") / 100).otherwise(pl.col("percent") / 100).alias("estimate"),
        *[pl.when(weighted).then(pl.col(k) / 100).alias(k) for k in ("se", "ci_low", "ci_high")],
        *[pl.when(weighted).then(pl.col(k)).alias(k) for k in ("df", "deff")],
        pl.col("base").alias("base_unweighted"), pl.col("weighted_base").alias("base_weighted"),
        pl.when(pl.col("set_by_weighting").fill_null(False)).then(None).otherwise(pl.col("n_eff")).alias(
            "base_effective"
        ),
        pl.concat_str([flag_base, set_flag], separator=";", ignore_nulls=True).alias("flags"),
    )
    counts = c.filter(kind.is_in(PERCENT_KINDS) | (kind == "base")).select(
        "__order", pl.lit(1).alias("__part"), *common, pl.lit("count").alias("statistic"),
        pl.col("count").cast(pl.Float64).alias("estimate"),
        *[pl.lit(None, dtype=pl.Float64).alias(k) for k in ("se", "ci_low", "ci_high", "df", "deff")],
        pl.col("base").alias("base_unweighted"),
        pl.when(kind == "base").then(None).otherwise(pl.col("weighted_base")).alias("base_weighted"),
        pl.lit(None, dtype=pl.Float64).alias("base_effective"),
        flag_base.alias("flags"),
    )
    statistics = c.filter((kind == "statistic") & code.is_in(list(STATISTIC_NAMES))).select(
        "__order", pl.lit(0).alias("__part"), *common,
        code.replace_strict(STATISTIC_NAMES, return_dtype=pl.String).alias("statistic"),
        pl.when(weighted).then(pl.col("estimate")).otherwise(pl.col("value")).alias("estimate"),
        *[pl.when(weighted).then(pl.col(k)).alias(k) for k in ("se", "ci_low", "ci_high", "df", "deff")],
        pl.col("base").alias("base_unweighted"), pl.col("weighted_base").alias("base_weighted"),
        pl.col("n_eff").alias("base_effective"), flag_base.alias("flags"),
    )
    balance = c.filter(kind == "balance").select(
        "__order", pl.lit(0).alias("__part"), *common, pl.lit("balance").alias("statistic"),
        (pl.when(weighted).then(pl.col("estimate")).otherwise(pl.col("value")) / 100).alias("estimate"),
        *[pl.when(weighted).then(pl.col(k) / 100).alias(k) for k in ("se", "ci_low", "ci_high")],
        *[pl.when(weighted).then(pl.col(k)).alias(k) for k in ("df", "deff")],
        pl.col("base").alias("base_unweighted"), pl.col("weighted_base").alias("base_weighted"),
        pl.col("n_eff").alias("base_effective"), flag_base.alias("flags"),
    )
    out = pl.concat([percent, counts, statistics, balance], how="vertical_relaxed").sort("__order", "__part")
    return out.with_columns(pl.col("flags").fill_null("")).select(
        [pl.col(name).cast(dtype) for name, dtype in EXPORT_SCHEMA.items()]
    )


def export_paths(book_path: Path, stem: str) -> tuple[Path, Path]:
    """(`<book folder>/<stem>_cells.parquet`, `<book folder>/<stem>_cells.csv`)."""
    folder = Path(book_path).parent
    return folder / f"{stem}_cells.parquet", folder / f"{stem}_cells.csv"


def write_cells(export: pl.DataFrame, book_path: Path, stem: str) -> tuple[Path, Path]:
    """Write the export as Parquet and CSV beside the book through `pipeline.outputs.write_output`
    (a temporary file moved into place and recorded in the folder's marker; a failed write is a
    WavebookError cannot-write that leaves the file as it was). Returns both paths."""
    from pipeline.outputs import write_output

    parquet, csv = export_paths(book_path, stem)
    write_output(parquet, export.write_parquet)
    write_output(csv, export.write_csv)
    return parquet, csv
