"""What the book reads: the unified cells export (`<stem>_cells`), the tests export and their checks.

The book renders every number from the frame the run writes beside it as `<stem>_cells.*` (its
columns are `CELL_COLUMNS`, the shared contract of the tables stage): one row per (wave, table,
row, banner, column, statistic). The Total has banner "total" and column "total"; a banner
column has its banner's name, its column key, its break variable and letter. Percentages and
balance scores are shares (0-1), as are their standard errors, intervals and changes; the book
prints them as percentages and points (`SHARE_STATISTICS`). The tests export (`<stem>_tests`)
gives the Rao-Scott independence test of each single-choice table (comparison "independence").

The tables stage makes the frame (`pipeline.tables.export_cells`); the book only reads it.
"""

from __future__ import annotations

import re
from functools import lru_cache

import polars as pl

from pipeline.errors import WavebookError

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
