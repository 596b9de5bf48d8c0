"""Read the cells export the run wrote beside a book, for the book's tests.

`written_cells(book)` reads `<stem>_cells.parquet` from the book's folder. While the Total and
the banner columns are still written as two files (`<stem>_cells` and `<stem>_banner_cells`),
it puts the banner file's columns beside the Total the way `pipeline.book.source.unified_cells`
does (shares; the banner's own Total only lends the Total its wave changes), so the tests compare the book with the files a
reader gets.
"""

from __future__ import annotations

from pathlib import Path

import polars as pl

from pipeline.book.source import SHARE_STATISTICS, SHARE_VALUES, TOTAL


def written_cells(book: Path) -> pl.DataFrame:
    """The unified cells (`pipeline.book.source.CELL_COLUMNS` where the files have them) of `book`."""
    book = Path(book)
    cells = pl.read_parquet(book.with_name(f"{book.stem}_cells.parquet"))
    banner_file = book.with_name(f"{book.stem}_banner_cells.parquet")
    if (cells["banner"] != TOTAL).any() or not banner_file.is_file():
        return cells
    share = pl.col("statistic").is_in(SHARE_STATISTICS)
    banner = pl.read_parquet(banner_file).with_columns(
        [pl.when(share).then(pl.col(c) / 100).otherwise(pl.col(c)).alias(c) for c in SHARE_VALUES]
    )
    change = banner.filter(pl.col("break_variable") == "").unique(["wave", "table", "row", "statistic"]).select(
        "wave", "table", "row", "statistic", "change_from_previous", "se_change", "change_mark")
    cells = cells.join(change, on=["wave", "table", "row", "statistic"], how="left", maintain_order="left")
    return pl.concat([cells.with_columns(pl.col("change_mark").fill_null("")),
                      banner.filter(pl.col("break_variable") != "")], how="diagonal_relaxed")
