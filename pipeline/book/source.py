"""What the book reads: the unified cells export (`<stem>_cells`), the tests export and their checks.

The book renders every number from the frame the run writes beside it as `<stem>_cells.*` (its
columns are `CELL_COLUMNS`, the shared contract of the tables stage): one row per (wave, table,
row, banner, column, statistic). The Total has banner "total" and column "total"; a banner
column has its banner's name, its column key, its break variable and letter. Percentages and
balance scores are shares (0-1), as are their standard errors, intervals and changes; the book
prints them as percentages and points (`SHARE_STATISTICS`). The tests export (`<stem>_tests`)
gives the Rao-Scott independence test of each single-choice table (comparison "independence").

`unified_cells(toplines, banner_cells)` builds that frame from a run's topline cells (with their
weighted estimates) and the banner tables' cells, for the runner and the tests until the tables
stage writes it itself.
"""

from __future__ import annotations

import re
from functools import lru_cache

import polars as pl

from pipeline.errors import WavebookError
from pipeline.tables import tidy_cells

TOTAL = "total"
CELL_COLUMNS: tuple[str, ...] = (
    "wave", "table", "variable", "row", "row_label", "row_kind", "banner", "break_variable", "column",
    "column_label", "letter", "statistic", "estimate", "se", "ci_low", "ci_high", "df", "deff",
    "base_unweighted", "base_weighted", "base_effective", "flags", "sig_higher_than", "sig_higher_than_lighter",
    "vs_total", "change_from_previous", "se_change", "change_mark", "note",
)
REQUIRED_COLUMNS: tuple[str, ...] = (
    "wave", "table", "variable", "row", "row_label", "row_kind", "banner", "column", "column_label", "statistic",
    "estimate", "base_unweighted", "flags",
)
SHARE_STATISTICS = ("percent", "balance")
SHARE_VALUES = ("estimate", "se", "ci_low", "ci_high", "change_from_previous", "se_change")
TEXT_DEFAULTS = ("break_variable", "letter", "sig_higher_than", "sig_higher_than_lighter", "vs_total", "change_mark")


def check_cells(cells: pl.DataFrame) -> pl.DataFrame:
    """`cells` with every `CELL_COLUMNS` column (optional ones null or "" when absent); a
    WavebookError naming the missing required columns otherwise."""
    missing = [c for c in REQUIRED_COLUMNS if c not in cells.columns]
    if missing:
        raise WavebookError(f"the result cells lack the column(s) {', '.join(missing)}; cannot build the book")
    numbers = ("se", "ci_low", "ci_high", "df", "deff", "base_weighted", "base_effective", "change_from_previous",
               "se_change")
    out = cells.with_columns(
        [pl.lit("", dtype=pl.String).alias(c) for c in TEXT_DEFAULTS if c not in cells.columns]
        + [pl.lit(None, dtype=pl.Float64).alias(c) for c in numbers if c not in cells.columns]
        + ([pl.lit(None, dtype=pl.String).alias("note")] if "note" not in cells.columns else [])
    )
    return out.with_columns(pl.col(*TEXT_DEFAULTS, "flags").fill_null(""))


@lru_cache(maxsize=256)
def flag_set(flags: str | None) -> frozenset[str]:
    """The flags of a cell as a set of names with underscores ("low-base;set-by-weighting" and
    "low_base,set_by_weighting" give the same set)."""
    return frozenset(f.replace("-", "_") for f in re.split(r"[;,]", flags or "") if f)


def unified_cells(toplines: pl.DataFrame, banner_cells: pl.DataFrame | None = None) -> pl.DataFrame:
    """The unified cells frame (`CELL_COLUMNS`) of a run: the Total of every variable from its
    topline cells (through `pipeline.tables.tidy_cells`, with the topline's row kind and note),
    and the banner columns of `banner_cells` (`BannerTables.cells`: percentages 0-100, the banner's
    own Total column) without their Total, which only lends the Total rows its wave changes."""
    kinds = toplines.select(
        "wave", "variable", pl.col("row_order").alias("row"), "row_kind", pl.col("note").cast(pl.String)
    )
    total = tidy_cells(toplines).join(kinds, on=["wave", "variable", "row"], how="left", maintain_order="left")
    total = total.with_columns(
        pl.lit("").alias("break_variable"), pl.lit("").alias("letter"), pl.lit("").alias("sig_higher_than"),
        pl.lit("").alias("sig_higher_than_lighter"), pl.lit("").alias("vs_total"),
    )
    if banner_cells is None or banner_cells.height == 0:
        total = total.with_columns(
            pl.lit(None, dtype=pl.Float64).alias("change_from_previous"),
            pl.lit(None, dtype=pl.Float64).alias("se_change"), pl.lit("").alias("change_mark"),
        )
        return total.select(CELL_COLUMNS)
    share = pl.col("statistic").is_in(SHARE_STATISTICS)
    banner = banner_cells.with_columns(
        [pl.when(share).then(pl.col(c) / 100).otherwise(pl.col(c)).alias(c) for c in SHARE_VALUES]
    )
    change = (
        banner.filter(pl.col("break_variable") == "")
        .unique(["wave", "table", "row", "statistic"], keep="first", maintain_order=True)
        .select("wave", "table", "row", "statistic", "change_from_previous", "se_change", "change_mark")
    )
    total = total.join(change, on=["wave", "table", "row", "statistic"], how="left", maintain_order="left")
    total = total.with_columns(pl.col("change_mark").fill_null(""))
    columns = banner.filter(pl.col("break_variable") != "").join(
        kinds.drop("note").rename({"variable": "table"}), on=["wave", "table", "row"], how="left",
        maintain_order="left",
    )
    return pl.concat([total.select(CELL_COLUMNS), columns.select(CELL_COLUMNS)], how="vertical_relaxed")
