"""The cells export: one row per number the book shows, every number once, written beside the book.

`export_cells(cells, tables)` joins the two sources of a run into ONE frame (`EXPORT_SCHEMA`):
the Total rows, from the long cell frame of the toplines (`pipeline.tables.topline` rows with
the estimate columns of `pipeline.tables.weighted_cells` joined on), for every variable; and the
banner-column rows of the banner tables (`pipeline.tables.tabulation.Tabulation`), whose own
Total column is left out (it is the same estimate as the topline's: `tests/test_tables_demo.py`).
`write_cells(export, book_path, stem)` writes it as `<stem>_cells.parquet` and `<stem>_cells.csv`
in the book's folder (the run checks both paths with the book's, `pipeline.outputs.check_output`);
the book renders from the same frame, and `pipeline.book.store` keeps it for `wavebook book`.

Columns, one row per (wave, table, row, banner, column, statistic):

  wave, table, variable     wave id; the table (the stub variable's own table, named as the
                            variable); the variable (a multiple-response set's name)
  row, row_label, row_kind  the row's position in its table, its label and its kind (the
                            topline's: base, category, excluded, net, balance, item, statistic,
                            missing, not-asked)
  banner, break_variable,   "total" / "" / "total" / "Total" / "" for the Total; a banner
  column, column_label,     column: its banner's name, the break variable, the column key
  letter                    (`pipeline.tables.banners`), label and letter (A, B, ...)
  statistic                 "percent" (a share 0-1), "mean", "median", "minimum", "maximum",
                            "balance" (a share of one side minus a share of the other, -1 to 1)
                            or "count" (the unweighted respondents of a row: a base row, the count
                            shown beneath a percentage, the number of answers of a statistic; Total only)
  estimate, se,             the figure; in a weighted book the design-based estimate with its
  ci_low, ci_high,          standard error, interval, degrees of freedom and design effect
  df, deff                  (null where the book shows an unweighted figure)
  base_unweighted           respondents in the row's base (within the column)
  base_weighted             sum of final weights over the base (weighted books)
  base_effective            effective base n / deff (weighted books; null for a figure set by
                            the weighting, whose design effect is undefined)
  flags                     ";"-separated: "very-low-base", "low-base" (Total rows: the thresholds
                            of `pipeline.book`; banner columns: `[tables] low_base`), "suppressed"
                            (banner columns below `[tables] suppress_below`: no number at all),
                            "empty-column" (no respondent in the column's base), "set-by-weighting"
  sig_higher_than,          letters of the columns of the cell's own break it is significantly
  sig_higher_than_lighter   higher than, at the first level and only at the second ("" otherwise)
  vs_total                  "higher" / "lower": the column differs from the Total at the first level
  change_from_previous,     the change from the previous wave (same scale as the estimate), its
  se_change, change_mark    standard error and "up" / "down" when significant at the first level,
                            for the Total rows of every variable (with or without `[tables]`) and
                            every banner cell (`pipeline.tables.wave_change`; independent waves:
                            the sum of the two variances, Satterthwaite's df; with
                            `design.same_psus_across_waves` the stacked design); null on the
                            first wave, on counts and minimum / maximum, and where untested
  note                      the row's note (Total rows) or why a banner cell is empty

A suppressed or empty banner cell holds no number. No respondent-level value or id is ever part
of it: every row is an aggregate.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

import polars as pl

if TYPE_CHECKING:
    from pipeline.tables.result import BannerTables

EXPORT_SCHEMA: dict[str, pl.DataType] = {
    "wave": pl.String(),
    "table": pl.String(),
    "variable": pl.String(),
    "row": pl.Int32(),
    "row_label": pl.String(),
    "row_kind": pl.String(),
    "banner": pl.String(),
    "break_variable": pl.String(),
    "column": pl.String(),
    "column_label": pl.String(),
    "letter": pl.String(),
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
    "sig_higher_than": pl.String(),
    "sig_higher_than_lighter": pl.String(),
    "vs_total": pl.String(),
    "change_from_previous": pl.Float64(),
    "se_change": pl.Float64(),
    "change_mark": pl.String(),
    "note": pl.String(),
}
MARKS = ("sig_higher_than", "sig_higher_than_lighter", "vs_total")
CHANGE = ("change_from_previous", "se_change")
SHARES = ("percent", "balance")  # statistics held as 0-100 inside and exported as shares 0-1
TOTAL = "total"
TOTAL_LABEL = "Total"
PERCENT_KINDS = ("category", "excluded", "net", "item", "missing", "not-asked")
STATISTIC_NAMES = {"n": "count", "mean": "mean", "median": "median", "min": "minimum", "max": "maximum"}
# Low-base thresholds of the Total rows: common practice, no source (trade rules of thumb for
# unweighted bases); `pipeline.book` shows the same marks.
LOW_BASE = 50
VERY_LOW_BASE = 30


def _with_estimate_columns(cells: pl.DataFrame) -> pl.DataFrame:
    """The cells with every estimate column present (null in an unweighted run)."""
    missing = {
        "estimate": pl.Float64, "se": pl.Float64, "ci_low": pl.Float64, "ci_high": pl.Float64, "df": pl.Float64,
        "deff": pl.Float64, "n_eff": pl.Float64, "weighted_base": pl.Float64, "set_by_weighting": pl.Boolean,
    }
    return cells.with_columns(pl.lit(None, dtype=t).alias(c) for c, t in missing.items() if c not in cells.columns)


def _total_rows(cells: pl.DataFrame) -> pl.DataFrame:
    """The Total rows (`EXPORT_SCHEMA`, marks and changes empty) of a run's long cell frame, in the
    cells' row order, with `__order` / `__part` (the cell frame's row, then 0 for the figure and 1
    for the count beneath it).

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
        pl.col("row_label"), pl.col("row_kind"), pl.lit(TOTAL).alias("banner"), pl.lit("").alias("break_variable"),
        pl.lit(TOTAL).alias("column"), pl.lit(TOTAL_LABEL).alias("column_label"), pl.lit("").alias("letter"),
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
        pl.concat_str([flag_base, set_flag], separator=";", ignore_nulls=True).alias("flags"), "note",
    )
    counts = c.filter(kind.is_in(PERCENT_KINDS) | (kind == "base")).select(
        "__order", pl.lit(1).alias("__part"), *common, pl.lit("count").alias("statistic"),
        pl.col("count").cast(pl.Float64).alias("estimate"),
        *[pl.lit(None, dtype=pl.Float64).alias(k) for k in ("se", "ci_low", "ci_high", "df", "deff")],
        pl.col("base").alias("base_unweighted"),
        pl.when(kind == "base").then(None).otherwise(pl.col("weighted_base")).alias("base_weighted"),
        pl.lit(None, dtype=pl.Float64).alias("base_effective"),
        flag_base.alias("flags"), "note",
    )
    statistics = c.filter((kind == "statistic") & code.is_in(list(STATISTIC_NAMES))).select(
        "__order", pl.lit(0).alias("__part"), *common,
        code.replace_strict(STATISTIC_NAMES, return_dtype=pl.String).alias("statistic"),
        pl.when(weighted).then(pl.col("estimate")).otherwise(pl.col("value")).alias("estimate"),
        *[pl.when(weighted).then(pl.col(k)).alias(k) for k in ("se", "ci_low", "ci_high", "df", "deff")],
        pl.col("base").alias("base_unweighted"), pl.col("weighted_base").alias("base_weighted"),
        pl.col("n_eff").alias("base_effective"), flag_base.alias("flags"), "note",
    )
    balance = c.filter(kind == "balance").select(
        "__order", pl.lit(0).alias("__part"), *common, pl.lit("balance").alias("statistic"),
        (pl.when(weighted).then(pl.col("estimate")).otherwise(pl.col("value")) / 100).alias("estimate"),
        *[pl.when(weighted).then(pl.col(k) / 100).alias(k) for k in ("se", "ci_low", "ci_high")],
        *[pl.when(weighted).then(pl.col(k)).alias(k) for k in ("df", "deff")],
        pl.col("base").alias("base_unweighted"), pl.col("weighted_base").alias("base_weighted"),
        pl.col("n_eff").alias("base_effective"), flag_base.alias("flags"), "note",
    )
    out = pl.concat([percent, counts, statistics, balance], how="vertical_relaxed").sort("__order", "__part")
    return out.with_columns(pl.col("flags").fill_null(""), *[pl.lit("").alias(m) for m in MARKS])


def _as_shares(frame: pl.DataFrame, columns: tuple[str, ...]) -> pl.DataFrame:
    """`columns` of the percentage and balance rows divided by 100 (0-100 inside, shares 0-1 in the export)."""
    shares = pl.col("statistic").is_in(SHARES)
    return frame.with_columns(pl.when(shares).then(pl.col(c) / 100).otherwise(pl.col(c)).alias(c) for c in columns)


def export_cells(cells: pl.DataFrame, tables: BannerTables | None = None) -> pl.DataFrame:
    """The export frame (module docstring) of a run: the Total rows of every variable from `cells`
    (the long cell frame of the toplines with the weighted estimates joined on), with their change
    from the previous wave from `tables.totals`, then, per wave and table, the banner-column rows
    of `tables.cells` row by row (their banner's own Total column left out: it is the Total row).

    tables: the run's `BannerTables` (`Tabulation.finish`); None for an unweighted run (the Total
    rows alone, without changes).
    """
    total = _total_rows(cells)
    key = ["wave", "table", "row"]
    tested = pl.col("statistic").is_in(("percent", "balance", "mean"))
    if tables is not None and tables.totals.height:
        changes = tables.totals.select(*key, *CHANGE, "change_mark").with_columns(tested=pl.lit(True))
        total = total.with_columns(tested=tested).join(changes, on=[*key, "tested"], how="left",
                                                        maintain_order="left").drop("tested")
    else:
        total = total.with_columns(*[pl.lit(None, dtype=pl.Float64).alias(c) for c in CHANGE],
                                   change_mark=pl.lit(None, dtype=pl.String))
    total = _as_shares(total.with_columns(pl.col("change_mark").fill_null(""), __group=pl.lit(0)), CHANGE)
    parts = [total]
    if tables is not None and tables.cells.height:
        kinds = cells.select("wave", pl.col("variable").alias("table"), pl.col("row_order").alias("row"), "row_kind")
        banner = (
            tables.cells.filter(pl.col("column") != TOTAL).with_row_index("__order")
            .join(kinds, on=key, how="left", maintain_order="left")
            .with_columns(pl.lit(0).alias("__part"), __group=pl.lit(1))
        )
        parts.append(_as_shares(banner, ("estimate", "se", "ci_low", "ci_high", *CHANGE)))
    columns = [*EXPORT_SCHEMA, "__order", "__part", "__group"]
    out = pl.concat([p.select(columns) for p in parts], how="vertical_relaxed")
    place = {name: i for i, name in enumerate(dict.fromkeys(cells["wave"].to_list()))}
    tables_at = {name: i for i, name in enumerate(dict.fromkeys(cells["variable"].to_list()))}
    out = out.with_columns(
        __w=pl.col("wave").replace_strict(place, default=len(place), return_dtype=pl.Int64),
        __t=pl.col("table").replace_strict(tables_at, default=len(tables_at), return_dtype=pl.Int64),
        __r=pl.when(pl.col("__group") == 1).then(pl.col("row")).otherwise(0),
    ).sort("__w", "__t", "__group", "__r", "__order", "__part")
    return out.select([pl.col(name).cast(dtype) for name, dtype in EXPORT_SCHEMA.items()])


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
